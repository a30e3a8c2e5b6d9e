"""File-level unwarping job: EPI runs + one B0 map -> corrected runs and shift outputs.

For each run the B0 map (Hz, undistorted space) is resampled onto the run's grid through
the affines, turned into a shift map with the run's readout timing and phase-encode code
(:mod:`fieldfix.shift`), and the index/weight tables of the pull-back are built once
(:mod:`fieldfix.unwarp`). The run is then streamed: volume by volume through nibabel's
lazy proxy (one file handle kept open, so a compressed file is decompressed once, in
order), unwarped by the numba kernel and appended to a :class:`fieldfix.io.StreamingWriter`.
Peak memory is a few volumes plus the tables, whatever the number of volumes.

Outputs per run, in ``out_dir`` (``<p>`` = prefix, ``<stem>`` = run file name without
suffix): ``<p><stem>_corrected.nii.gz`` (same grid, TR and dimensions as the run,
float32), ``<p><stem>_shift_vox.nii.gz``, ``<p><stem>_jacobian.nii.gz``,
``<p><stem>_fold_mask.nii.gz``, ``<p><stem>_displacement_mm.nii.gz`` (NIfTI-1 intent
1006, displacement vector: for each corrected voxel the world-mm vector to the point of
the distorted run its signal is taken from), ``<p><stem>_unwarp.json``, and a provenance
JSON beside each image.

Research software, not a medical device: inspect corrected images before they are used
for any decision about a person.
"""

from __future__ import annotations

import os
import queue
import threading
from pathlib import Path

import nibabel as nib
import numpy as np

from .._progress import progress_bar
from ..errors import GeometryError, InputError, MetadataError
from ..geometry import parse_pe_code, pe_world_direction, resample_to_grid, voxel_sizes_mm
from ..outdir import check_name_prefix
from ..io import (
    NIFTI_INTENT_DISPVECT,
    Image,
    Provenance,
    StreamingWriter,
    image_stem,
    load_image,
    output_paths_guard,
    save_image,
    sidecar_path,
    write_json,
)
from ..shift import (
    DEFAULT_JACOBIAN_FLOOR,
    displacement_field_mm,
    resolve_timing,
    shift_summary,
)
from ..unwarp import INTERPOLATIONS, apply_tables, build_tables, shift_maps

__all__ = ["run_unwarp", "output_names", "MAX_SHIFT_FOV_FRACTION"]

#: Shifts larger than this fraction of the field of view along the PE axis are refused
#: unless forced: they almost always mean wrong timing units or a wrong field map.
MAX_SHIFT_FOV_FRACTION = 0.25

CAUTION = ("Research software, not a medical device: inspect corrected images before they are used for any "
           "decision about a person.")

#: A run whose voxels are covered by the B0 map's field of view to less than this percentage
#: is corrected with a warning and flagged (``partial_coverage``) in its summary.
PARTIAL_COVERAGE_PERCENT = 99.0

_SUFFIXES = {
    "corrected": "_corrected.nii.gz",
    "shift_vox": "_shift_vox.nii.gz",
    "jacobian": "_jacobian.nii.gz",
    "fold_mask": "_fold_mask.nii.gz",
    "displacement_mm": "_displacement_mm.nii.gz",
    "summary": "_unwarp.json",
}


def output_names(run_path: str | os.PathLike, out_dir: str | os.PathLike, prefix: str = "") -> dict[str, Path]:
    """Output paths of one run (images and the summary JSON).

    Examples
    --------
    >>> output_names("/data/sub-01_bold.nii.gz", "/out")["corrected"].name
    'sub-01_bold_corrected.nii.gz'
    """
    stem = check_name_prefix(prefix) + image_stem(run_path)
    return {key: Path(out_dir) / (stem + suffix) for key, suffix in _SUFFIXES.items()}


class _BackgroundWriter:
    """Feed a StreamingWriter from a second thread through a short queue.

    Compressing the output (zlib releases the GIL) then overlaps with reading,
    decompressing and unwarping the next volumes. At most `depth` volumes wait in the
    queue, so memory stays at a few volumes. An error in the writing thread is raised in
    the caller at the next :meth:`put` or at :meth:`close`; :meth:`close` always waits for
    the thread, so the writer's context can then clean up.
    """

    def __init__(self, writer: StreamingWriter, depth: int = 2):
        self._writer = writer
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._work, name="fieldfix-writer", daemon=True)
        self._thread.start()

    def _work(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            if self._error is None:  # after a failure, keep draining so the caller never blocks
                try:
                    self._writer.write(item)
                except BaseException as err:  # noqa: BLE001 - handed to the caller
                    self._error = err

    def put(self, volume: np.ndarray) -> None:
        if self._error is not None:
            raise self._error
        self._queue.put(volume)

    def close(self) -> None:
        self._queue.put(None)
        self._thread.join()
        if self._error is not None:
            raise self._error


def _sequential(image: Image) -> Image:
    """The same image with a proxy that keeps its file open across volume reads.

    nibabel reopens a file for every proxy slice by default; for ``.nii.gz`` each read of
    volume t would then decompress everything before it. With one open handle, reading
    volumes in order decompresses the file once.
    """
    nifti = nib.load(str(image.path), keep_file_open=True)
    if tuple(nifti.shape) != image.shape:
        nifti = type(nifti)(nifti.dataobj.reshape(image.shape), nifti.affine, nifti.header)
    return Image(path=image.path, nifti=nifti, sidecar=image.sidecar, file_shape=image.file_shape,
                 file_zooms=image.file_zooms)


def _resolve_pe_code(pe_code, image: Image, timing_win) -> tuple[str, str]:
    side = image.sidecar.get("PhaseEncodingDirection")
    if side is not None:
        try:
            parse_pe_code(side)
        except InputError:
            raise MetadataError(f"PhaseEncodingDirection {side!r} in the sidecar is not a BIDS code",
                                sidecar_path(image.path)) from None
    if pe_code is None and side is None:
        raise MetadataError("no phase-encode direction: give one (e.g. j-) or add PhaseEncodingDirection "
                            "to the run's JSON sidecar", image.path)
    if pe_code is None:
        return side, "sidecar"
    parse_pe_code(pe_code)
    if side is None or side == pe_code:
        return pe_code, "arguments" if side is None else "arguments+sidecar"
    if timing_win == "sidecar":
        return side, "sidecar"
    if timing_win == "arguments":
        return pe_code, "arguments"
    raise MetadataError(f"phase-encode direction {pe_code} contradicts the sidecar's {side}; say which one wins",
                        image.path)


def _b0_values(b0: Image) -> np.ndarray:
    values = b0.get_fdata(np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("the B0 map contains NaN or infinite values; it must be defined (extended) everywhere",
                         b0.path)
    return values


def _find_mask(b0_path: Path, b0_mask_path) -> Path | None:
    if b0_mask_path is not None:
        return Path(b0_mask_path)
    name = b0_path.name
    for suffix in ("b0_hz.nii.gz", "b0_hz.nii"):
        if name.endswith(suffix):
            candidate = b0_path.with_name(name[: -len(suffix)] + "b0_mask" + suffix[len("b0_hz"):])
            if candidate.is_file():
                return candidate
    return None


def _check_recon_matrix(image: Image, n_lines: int) -> None:
    """The sidecar's ReconMatrixPE, when present, must be the grid's size along the PE axis."""
    recon = image.sidecar.get("ReconMatrixPE")
    if recon is None:
        return
    where = sidecar_path(image.path)
    if isinstance(recon, bool) or not isinstance(recon, (int, float)) or not float(recon).is_integer():
        raise MetadataError(f"ReconMatrixPE in the sidecar must be a whole number of lines, got {recon!r}", where)
    if int(recon) != n_lines:
        raise MetadataError(f"ReconMatrixPE {int(recon)} in the sidecar differs from the image's {n_lines} voxels "
                            f"along the phase-encode axis", where)


def _finite_volume(image: Image, volume: np.ndarray, t: int) -> np.ndarray:
    """Refuse a volume with NaN or infinite voxels: the interpolation would spread them."""
    if not np.isfinite(volume).all():
        where = f"volume {t}" if image.ndim == 4 else "the image"
        raise InputError(f"{where} contains NaN or infinite values; unwarping would spread them into "
                         f"neighbouring voxels", image.path)
    return volume


def _check_shift_size(maps, mask, run_path, b0_path, force):
    n = maps.shift_vox.shape[maps.pe_axis]
    inside = np.abs(maps.shift_vox[mask]) if mask.any() else np.abs(maps.shift_vox).ravel()
    largest = float(inside.max()) if inside.size else 0.0
    limit = MAX_SHIFT_FOV_FRACTION * n
    if largest > limit and not force:
        raise GeometryError(
            f"shifts up to {largest:.1f} voxels exceed a quarter of the field of view along the phase-encode axis "
            f"({limit:.1f} voxels) with the field map {Path(b0_path).name}; check the readout timing units and the "
            f"field map, or force the correction", run_path)
    return largest


def run_unwarp(
    run_paths,
    b0_path,
    out_dir,
    *,
    pe_code: str | None = None,
    readout_time_s: float | None = None,
    echo_spacing_s: float | None = None,
    timing_win: str | None = None,
    interp: str = "linear",
    jacobian: bool = True,
    b0_mask_path=None,
    force: bool = False,
    prefix: str = "",
    overwrite: bool = False,
    progress: bool = False,
    command: str | None = None,
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR,
    parallel: bool = True,
) -> list[dict]:
    """Unwarp one or more EPI runs that share one B0 map.

    Parameters
    ----------
    run_paths : path or sequence of paths
        3D or 4D EPI NIfTI files.
    b0_path : path
        B0 map in Hz (3D, undistorted space, any grid overlapping the runs).
    out_dir : path
        Output folder (created if missing).
    pe_code : str, optional
        BIDS phase-encode code; defaults to each run's sidecar ``PhaseEncodingDirection``.
    readout_time_s, echo_spacing_s : float, optional
        Total readout time or effective echo spacing in seconds; default from each run's
        sidecar (``TotalReadoutTime`` / ``EffectiveEchoSpacing``).
    timing_win : {None, 'arguments', 'sidecar'}
        Which source wins when the arguments contradict a sidecar (timing and
        phase-encode code); None makes a contradiction an error.
    interp : {'linear', 'cubic', 'sinc'}
        Interpolation along the phase-encode axis.
    jacobian : bool
        Apply the Jacobian intensity correction.
    b0_mask_path : path, optional
        Mask of where the field map is measured (statistics only). Default: the
        ``<prefix>b0_mask.nii.gz`` beside a ``<prefix>b0_hz.nii.gz`` when present, else the
        part of the run covered by the B0 map.
    force : bool
        Correct even when shifts exceed a quarter of the field of view.
    prefix : str
        Prepended to every output name.
    overwrite : bool
        Replace existing outputs (never inputs).
    progress : bool
        Show a progress bar per run.
    command : str, optional
        Recorded in the provenance sidecars.
    jacobian_floor : float
        Jacobian at or below which voxels count as folded.
    parallel : bool
        Run the unwarping kernel on all numba threads; pass False when several jobs
        already share the cores (e.g. one process per core in a batch).

    Returns
    -------
    list of dict
        One JSON-serialisable summary per run (also written as ``<p><stem>_unwarp.json``).

    Raises
    ------
    InputError, MetadataError, GeometryError, OutputError
        Metadata, overlap and shift sizes of every run are checked before anything is
        written. A volume with NaN or infinite voxels stops the job while streaming; the
        unfinished corrected run is removed (runs finished earlier in the same call stay).

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> from fieldfix.io import save_image
    >>> folder = tempfile.mkdtemp()
    >>> run = save_image(os.path.join(folder, "run.nii.gz"), np.ones((4, 16, 2, 3)), np.eye(4))
    >>> b0 = save_image(os.path.join(folder, "b0_hz.nii.gz"), np.full((4, 16, 2), 20.0), np.eye(4))
    >>> summary = run_unwarp([run], b0, os.path.join(folder, "out"), pe_code="j-", readout_time_s=0.03)
    >>> round(summary[0]["max_abs_shift_vox"], 3)  # 20 Hz x 0.03 s / 15 x 16 lines
    0.64
    """
    if isinstance(run_paths, (str, os.PathLike)):
        run_paths = [run_paths]
    run_paths = [Path(p) for p in run_paths]
    if not run_paths:
        raise InputError("no runs given")
    if interp not in INTERPOLATIONS:
        raise InputError(f"unknown interpolation {interp!r}; choose one of {', '.join(INTERPOLATIONS)}")
    if len({image_stem(p) for p in run_paths}) != len(run_paths):
        raise InputError("two runs have the same file name; their outputs would collide (use separate calls "
                         "with different prefixes)")
    out_dir = Path(out_dir)
    b0_path = Path(b0_path)
    b0 = load_image(b0_path, ndim=(3,))
    b0_hz = _b0_values(b0)
    mask_path = _find_mask(b0_path, b0_mask_path)
    mask_values = None
    if mask_path is not None:
        mask_image = load_image(mask_path, ndim=(3,), sidecar=False)
        mask_values = mask_image.get_fdata(np.float64)
        if mask_values.shape != b0_hz.shape:
            raise GeometryError(f"the mask's shape {mask_values.shape} differs from the B0 map's {b0_hz.shape}",
                                mask_path)
        mask_values = (np.nan_to_num(mask_values) > 0.5).astype(float)

    runs = [load_image(p, ndim=(3, 4)) for p in run_paths]
    inputs = [*run_paths, b0_path] + ([mask_path] if mask_path is not None else [])
    names = [output_names(p, out_dir, prefix) for p in run_paths]
    guarded = []
    for paths in names:
        for key, path in paths.items():
            guarded.append(path)
            if key != "summary":
                guarded.append(sidecar_path(path))
    output_paths_guard(guarded, inputs, overwrite)

    # Resolve metadata of every run before writing anything.
    plans = []
    for image in runs:
        code, code_source = _resolve_pe_code(pe_code, image, timing_win)
        axis, _ = parse_pe_code(code)
        n_lines = image.shape[axis]
        _check_recon_matrix(image, n_lines)
        try:
            timing = resolve_timing(n_lines, readout_time_s=readout_time_s, echo_spacing_s=echo_spacing_s,
                                    sidecar=image.sidecar, timing_win=timing_win)
        except MetadataError as err:
            raise MetadataError(err.message, image.path) from None
        # Shift maps and their size check, for every run before any output is written.
        maps, mask = _maps_on_run_grid(image, code, timing, b0, b0_hz, mask_values, jacobian_floor)
        _check_shift_size(maps, mask, image.path, b0.path, force)
        plans.append((image, code, code_source, timing, maps, mask))

    summaries = []
    for (image, code, code_source, timing, maps, mask), paths in zip(plans, names):
        summaries.append(_unwarp_one(
            image, code, code_source, timing, maps, mask, b0, mask_path, paths, inputs=inputs,
            interp=interp, jacobian=jacobian, jacobian_floor=jacobian_floor, force=force, overwrite=overwrite,
            progress=progress, command=command, parallel=parallel))
    return summaries


def _maps_on_run_grid(image, code, timing, b0, b0_hz, mask_values, jacobian_floor):
    """B0 map resampled onto the run's grid through the affines, turned into shift maps."""
    grid = image.shape[:3]
    affine = image.affine
    field, covered = resample_to_grid(b0_hz, b0.affine, grid, affine, order=1)
    if not covered.any():
        raise GeometryError(f"the B0 map {b0.path.name} does not overlap this run's field of view", image.path)
    if mask_values is not None:
        mask_on_grid, _ = resample_to_grid(mask_values, b0.affine, grid, affine, order=0, outside=0.0)
        mask = (mask_on_grid > 0.5) & covered
    else:
        mask = covered
    maps = shift_maps(field, code, timing.echo_spacing_s, n_pe_lines=timing.n_pe_lines, inside=covered,
                      jacobian_floor=jacobian_floor)
    return maps, mask


def _unwarp_one(image, code, code_source, timing, maps, mask, b0, mask_path, paths, *, inputs, interp,
                jacobian, jacobian_floor, force, overwrite, progress, command, parallel) -> dict:
    affine = image.affine
    covered = maps.inside
    # NIfTI volumes come Fortran-ordered from nibabel and are written the same way.
    tables = build_tables(maps.shift_vox, maps.pe_axis, interp=interp, jacobian=jacobian,
                          jacobian_floor=jacobian_floor, layout="F")

    parameters = {
        "pe_code": code,
        "pe_code_source": code_source,
        "effective_echo_spacing_s": timing.echo_spacing_s,
        "total_readout_time_s": timing.readout_time_s,
        "n_pe_lines": timing.n_pe_lines,
        "timing_source": timing.source,
        "interp": interp,
        "jacobian": bool(jacobian),
        "jacobian_floor": float(jacobian_floor),
        "force": bool(force),
    }
    provenance = Provenance(command, parameters, inputs)

    # Corrected run, streamed.
    source = _sequential(image)
    if image.ndim == 4:
        n_volumes = image.shape[3]
        with StreamingWriter(paths["corrected"], image.shape, affine, template=image, inputs=inputs,
                             overwrite=overwrite, provenance=provenance) as writer:
            background = _BackgroundWriter(writer)
            try:
                for t in progress_bar(range(n_volumes), total=n_volumes, desc=image_stem(image.path),
                                      enabled=progress, unit="vol"):
                    volume = _finite_volume(image, source.volume(t), t)
                    background.put(apply_tables(tables, volume, parallel=parallel))
            finally:
                background.close()
    else:
        n_volumes = 1
        volume = _finite_volume(image, source.volume(0), 0)
        corrected = apply_tables(tables, volume, parallel=parallel)
        if len(image.file_shape) == 4:  # a one-volume run stays a 4D file, as it came
            corrected = corrected[..., None]
        save_image(paths["corrected"], corrected, affine, template=image, inputs=inputs, overwrite=overwrite,
                   provenance=provenance)
    del source

    common = dict(template=image, inputs=inputs, overwrite=overwrite, provenance=provenance)
    save_image(paths["shift_vox"], maps.shift_vox, affine, **common)
    save_image(paths["jacobian"], maps.jacobian, affine, **common)
    save_image(paths["fold_mask"], maps.fold, affine, dtype=np.uint8, **common)
    displacement = displacement_field_mm(maps.shift_vox, maps.pe_axis, affine)
    save_image(paths["displacement_mm"], displacement[:, :, :, None, :], affine, intent=NIFTI_INTENT_DISPVECT,
               **common)

    stats = shift_summary(maps.shift_vox, maps.jacobian, maps.pe_axis, affine, mask, jacobian_floor)
    coverage_percent = float(100.0 * covered.mean())
    warnings = []
    if coverage_percent < PARTIAL_COVERAGE_PERCENT:
        warnings.append(f"partial coverage: the B0 map covers {coverage_percent:.1f}% of this run's voxels; "
                        "outside it the field is continued from the map's nearest edge, so the correction "
                        "there is a guess (see the run's B0 coverage in the report)")
    summary = {
        "run": str(image.path),
        "b0_map": str(b0.path),
        "b0_mask": str(mask_path) if mask_path is not None else None,
        "statistics_region": "field-map mask" if mask_path is not None else "run voxels covered by the B0 map",
        "n_volumes": int(n_volumes),
        "pe_code": code,
        "pe_direction_world": pe_world_direction(code, affine),
        "timing": {**timing.as_dict()},
        "interp": interp,
        "jacobian": bool(jacobian),
        **stats,
        "folded_voxels_total": int(np.count_nonzero(maps.fold)),
        "coverage_percent": coverage_percent,
        "partial_coverage": coverage_percent < PARTIAL_COVERAGE_PERCENT,
        "warnings": warnings,
        "voxel_size_mm": [float(v) for v in voxel_sizes_mm(affine)],
        "displacement_convention": "world mm (NIfTI RAS+), from each corrected voxel to where its signal lies "
                                   "in the distorted run",
        "folded_voxel_rule": f"voxels with Jacobian <= {jacobian_floor:g} are flagged in the fold mask and "
                             f"weighted by {jacobian_floor:g} instead of the Jacobian; their intensity is not "
                             f"reliable",
        "outputs": {key: str(path) for key, path in paths.items()},
        "caution": CAUTION,
    }
    write_json(paths["summary"], summary, inputs=inputs, overwrite=overwrite)
    return summary
