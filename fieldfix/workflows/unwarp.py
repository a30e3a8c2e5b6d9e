"""File-level unwarping job: EPI runs + one B0 map -> corrected runs and shift outputs.

For each run the B0 map (Hz, undistorted space) is resampled onto the run's grid through
the affines, turned into a shift map with the run's readout timing and phase-encode code
(:mod:`fieldfix.shift`), and the index/weight tables of the pull-back are built once
(:mod:`fieldfix.unwarp`). The run is then streamed volume by volume
(:mod:`fieldfix.workflows._stream`): peak memory is a few volumes plus the tables,
whatever the number of volumes.

Outputs per run (:class:`fieldfix.outputs.UnwarpFiles`, ``<t>`` = the job's tag,
``<stem>`` = run file name without suffix; images end in ``.nii.gz`` or, for a ``.nii`` run
or ``compress='none'``, ``.nii``): ``<t><stem>_corrected.nii.gz`` (same grid, TR
and dimensions as the run, float32), ``<t><stem>_shift_vox.nii.gz``,
``<t><stem>_jacobian.nii.gz``, ``<t><stem>_fold_mask.nii.gz``,
``<t><stem>_displacement_mm.nii.gz`` (NIfTI-1 intent 1006, displacement vector: for each
corrected voxel the world-mm vector to the point of the distorted run its signal is taken
from), ``<t><stem>_unwarp.json`` (:class:`fieldfix.outputs.UnwarpSummary`), and a
provenance JSON beside each image.

Research software, not a medical device: inspect corrected images before they are used
for any decision about a person.
"""

from __future__ import annotations

import dataclasses
import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import GeometryError, InputError, MetadataError, check_choice
from ..geometry import parse_pe_code, pe_world_direction, voxel_sizes_mm
from ..io import GZIP_EFFORTS, NIFTI_INTENT_DISPVECT, Image, Provenance, image_stem, load_image, output_paths_guard, save_image
from ..jsonfile import write_json
from ..outdir import output_folder
from ..outputs import (CAUTION, CombinedFiles, JobOptions, MotionRecord, TimingRecord, UnwarpFiles, UnwarpSummary,
                       job_and_settings)
from ..shift import DEFAULT_JACOBIAN_FLOOR, DISPLACEMENT_FRAMES, Timing, displacement_field_mm, resolve_timing, shift_summary
from ..units import check_plausible
from ..unwarp import INTERPOLATIONS, ShiftMaps, apply_tables, build_tables, shift_maps
from ._run_checks import (
    MAX_SHIFT_FOV_FRACTION,
    check_recon_matrix,
    ShiftCheck,
    check_shift_size,
    find_b0_mask,
    finite_volume,
    resolve_pe_code,
    signal_mask,
)
from ._b0 import read_field_hz
from ..shift import Readout
from ._motion_step import MotionFollower
from ._placement import Placement, find_b0_magnitude, mask_on_run, place_field, read_magnitude_on_map
from ._combine import check_combinable, write_combined_run
from ._stream import write_corrected_run

__all__ = ["run_unwarp", "UnwarpSettings", "COMPRESSIONS", "MAX_SHIFT_FOV_FRACTION", "CAUTION"]

#: Choices of the outputs' compression: as the run, gzip, none.
COMPRESSIONS = ("auto", "gzip", "none")

_DISPLACEMENT_WORDS = {
    "ras": "world mm (NIfTI RAS+: x right, y anterior, z superior), from each corrected voxel to where its signal "
           "lies in the distorted run",
    "lps": "world mm (LPS+: x left, y posterior, z superior, i.e. the NIfTI x and y components negated), from each "
           "corrected voxel to where its signal lies in the distorted run",
}

#: A run whose voxels are covered by the B0 map's field of view to less than this percentage
#: is corrected with a warning and flagged (``partial_coverage``) in its summary.
PARTIAL_COVERAGE_PERCENT = 99.0


@dataclass(frozen=True)
class UnwarpSettings:
    """How the runs are corrected.

    Attributes
    ----------
    pe_code : str, optional
        BIDS phase-encode code; default: each run's sidecar ``PhaseEncodingDirection``.
    readout_time_s, echo_spacing_s : float, optional
        Total readout time or effective echo spacing in seconds; default: each run's
        sidecar (``TotalReadoutTime`` / ``EffectiveEchoSpacing``).
    timing_win : {None, 'arguments', 'sidecar'}
        Which source wins when the arguments contradict a sidecar (timing and phase-encode
        code); None makes a contradiction an error.
    te_s : float, optional
        Echo time of the runs (s); default: each run's sidecar ``EchoTime``. It sets the signal loss
        under the field that the field-map alignment models (:mod:`fieldfix.workflows._placement`).
    interp : {'cubic', 'linear', 'sinc'}
        Interpolation along the phase-encode axis (default cubic B-spline: exact on samples,
        smoother and closer to the true image than linear; see :mod:`fieldfix.unwarp`).
    jacobian : bool
        Apply the Jacobian intensity correction.
    jacobian_floor : float
        Jacobian at or below which voxels count as folded.
    b0_mask : path, optional
        Mask of where the field map is measured (statistics only). Default: the
        ``<tag>b0_mask.nii.gz`` beside a ``<tag>b0_hz.nii.gz`` when present, else the part of
        the run covered by the B0 map.
    force : bool
        Correct even when the shifts over the run's signal exceed half the field of view along
        the phase-encode axis (the guard against unit and timing mistakes).
    parallel : bool
        Run the kernel on all numba threads (3D images; a streamed 4D run always corrects on one
        thread beside its reader and writer threads); False when several jobs share the cores.
    b0_units : str, optional
        Units of the B0 map (Hz, rad/s, ppm, T); default: its sidecar's ``Units``, else Hz. A
        phase image is refused.
    field_strength_t : float, optional
        For a map in ppm; default: the sidecar's ``MagneticFieldStrength``.
    align_fieldmap : bool
        Put the field map where the head is in each run: align its magnitude rigidly to the
        run's first volume, distortion in the loop (:mod:`fieldfix.workflows._placement`), and
        resample the field through that transform (default). Off: the scanner coordinates alone.
    b0_magnitude : path, optional
        The field map's magnitude for the alignment; default: ``<tag>b0_magnitude.nii.gz``
        beside a ``<tag>b0_hz.nii.gz``.
    motion : bool
        Also follow head motion through the run: each volume's rigid pose against the first
        (distortion-aware), the field moved with the head, and motion and distortion undone in
        one cubic interpolation (:mod:`fieldfix.motion`); writes ``<stem>_motion.tsv``.
    displacement_frame : {'ras', 'lps'}
        World frame of the displacement field's vectors: NIfTI RAS+ (default) or LPS+, the frame of
        most registration toolkits' physical space; its sidecar and the summary state it.
    combine_polarities : bool
        With exactly two runs of opposite polarity on one grid, also write one run restored
        jointly from both (``<tag><first stem>_combined.nii.gz``, see
        :mod:`fieldfix.workflows._combine`); each run is still unwarped on its own too.
    compress : {'auto', 'gzip', 'none'}
        Image outputs of a run as ``.nii.gz`` (gzip) or ``.nii``; ``'auto'`` keeps the run's
        own (a ``.nii`` run gives ``.nii`` outputs).
    gzip_effort : {'fast', 'small'}
        Compression of ``.nii.gz`` outputs (:data:`fieldfix.io.GZIP_EFFORTS`): ``'fast'``
        (ISA-L level 1) or ``'small'`` (level 3, slower, int16 files a few percent smaller).
    """

    pe_code: str | None = None
    readout_time_s: float | None = None
    echo_spacing_s: float | None = None
    timing_win: str | None = None
    te_s: float | None = None
    interp: str = "cubic"
    jacobian: bool = True
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR
    b0_mask: object = None
    force: bool = False
    parallel: bool = True
    combine_polarities: bool = False
    align_fieldmap: bool = True
    b0_magnitude: object = None
    motion: bool = False
    displacement_frame: str = "ras"
    b0_units: str | None = None
    field_strength_t: float | None = None
    compress: str = "auto"
    gzip_effort: str = "fast"

    def check(self) -> None:
        check_choice("displacement_frame", self.displacement_frame, DISPLACEMENT_FRAMES, "frame")
        if self.te_s is not None:
            check_plausible("te_s", self.te_s, parameter="te_s")
        for name in ("readout_time_s", "echo_spacing_s"):
            if getattr(self, name) is not None:
                check_plausible(name, getattr(self, name))
        check_choice("interp", self.interp, INTERPOLATIONS, "interpolation")
        check_choice("compress", self.compress, COMPRESSIONS, "compression")
        check_choice("gzip_effort", self.gzip_effort, GZIP_EFFORTS)

    def output_suffix(self, run_path) -> str:
        """``'.nii.gz'`` or ``'.nii'`` for the image outputs of the run at `run_path`."""
        if self.compress == "auto":
            return ".nii.gz" if str(run_path).endswith(".gz") else ".nii"
        return ".nii.gz" if self.compress == "gzip" else ".nii"


@dataclass(frozen=True)
class _FieldMapInput:
    """The B0 map a job unwarps with: its image, the mask found or given, how its units were known."""

    image: Image
    mask_path: Path | None
    units: str


@dataclass
class _RunPlan:
    """One run, checked and ready: its image, direction, timing, shift maps and outputs."""

    image: Image
    pe_code: str
    pe_code_source: str
    timing: Timing
    maps: ShiftMaps
    mask: np.ndarray
    files: UnwarpFiles
    field_hz: np.ndarray
    shift_check: ShiftCheck
    placement: Placement
    reference: np.ndarray


def run_unwarp(run_paths, b0_path, job: JobOptions | str, settings: UnwarpSettings | None = None,
               **changes) -> list[UnwarpSummary]:
    """Unwarp one or more EPI runs that share one B0 map.

    Parameters
    ----------
    run_paths : path or sequence of paths
        3D or 4D EPI NIfTI files.
    b0_path : path
        B0 map in Hz (3D, undistorted space, any grid overlapping the runs).
    job : JobOptions or path
        Output folder and writing options.
    settings : UnwarpSettings, optional
    **changes
        Fields of :class:`JobOptions` or :class:`UnwarpSettings` to set on top.

    Returns
    -------
    list of UnwarpSummary
        One per run (also written as ``<tag><stem>_unwarp.json``).

    Raises
    ------
    InputError, MetadataError, GeometryError, OutputError
        Metadata, overlap and shift sizes of every run are checked before anything is
        written. A volume with NaN or infinite voxels stops the job while streaming; the
        unfinished corrected run is removed.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> from fieldfix.io import save_image
    >>> folder = tempfile.mkdtemp()
    >>> run = save_image(os.path.join(folder, "run.nii.gz"), np.ones((4, 16, 2, 3)), np.eye(4))
    >>> b0 = save_image(os.path.join(folder, "b0_hz.nii.gz"), np.full((4, 16, 2), 20.0), np.eye(4))
    >>> summary = run_unwarp([run], b0, os.path.join(folder, "out"), pe_code="j-", readout_time_s=0.03)
    >>> round(summary[0].max_abs_shift_vox, 3)  # 20 Hz x 0.03 s / 15 x 16 lines
    0.64
    """
    job, s = job_and_settings(job, UnwarpSettings, settings, changes)
    s.check()
    run_paths = [Path(run_paths)] if isinstance(run_paths, (str, os.PathLike)) else [Path(p) for p in run_paths]
    if not run_paths:
        raise InputError("no runs given", parameter="run_paths")
    if len({image_stem(p) for p in run_paths}) != len(run_paths):
        raise InputError("two runs have the same file name; their outputs would collide (use separate calls with "
                         "different tags)", parameter="run_paths")
    b0_path = Path(b0_path)
    with output_folder(job.out_dir):
        b0 = load_image(b0_path, ndim=(3,))
        field_hz, b0_units = read_field_hz(b0, s.b0_units, s.field_strength_t)
        mask_path = find_b0_mask(b0_path, s.b0_mask)
        mask_values = _read_mask(mask_path, field_hz.shape)
        magnitude_path = find_b0_magnitude(b0_path, s.b0_magnitude) if s.align_fieldmap else None
        magnitude = read_magnitude_on_map(magnitude_path, b0)
        runs = [load_image(p, ndim=(3, 4)) for p in run_paths]
        inputs = [*run_paths, b0_path] + [p for p in (mask_path, magnitude_path) if p is not None]
        files = [UnwarpFiles.named(image_stem(p), job.tag, s.output_suffix(p), motion=s.motion and img.ndim == 4)
                 for p, img in zip(run_paths, runs)]
        guarded = [p for f in files for p in f.guarded(job.out_dir)]
        if s.combine_polarities:
            guarded += CombinedFiles.named(image_stem(run_paths[0]), job.tag).guarded(job.out_dir)
        output_paths_guard(guarded, inputs, job.overwrite)
        # Metadata, shift maps and their size check for every run before any output is written.
        plans = [_plan_run(image, f, s, b0, field_hz, mask_values, (magnitude, magnitude_path))
                 for image, f in zip(runs, files)]
        if s.combine_polarities:
            check_combinable(plans)
        field_map = _FieldMapInput(b0, mask_path, b0_units)
        summaries = [_unwarp_one(plan, field_map, job, s, inputs) for plan in plans]
        if s.combine_polarities:
            parameters = {"runs": [str(p.image.path) for p in plans], "pe_codes": [p.pe_code for p in plans]}
            write_combined_run(plans, job, inputs, Provenance(job.command, parameters, inputs))
        return summaries


def _read_mask(mask_path, shape) -> np.ndarray | None:
    if mask_path is None:
        return None
    values = load_image(mask_path, ndim=(3,), sidecar=False).get_fdata(np.float64)
    if values.shape != shape:
        raise GeometryError(f"the mask's shape {values.shape} differs from the B0 map's {shape}", mask_path)
    return (np.nan_to_num(values) > 0.5).astype(float)


def _plan_run(image: Image, files: UnwarpFiles, s: UnwarpSettings, b0: Image, field_hz, mask_values,
              magnitude) -> _RunPlan:
    code, code_source = resolve_pe_code(s.pe_code, image, s.timing_win)
    axis, _ = parse_pe_code(code)
    n_lines = image.shape[axis]
    check_recon_matrix(image, n_lines)
    try:
        timing = resolve_timing(n_lines, readout_time_s=s.readout_time_s, echo_spacing_s=s.echo_spacing_s,
                                sidecar=image.sidecar, timing_win=s.timing_win)
    except MetadataError as err:
        raise MetadataError(err.message, image.path) from None
    reference = finite_volume(image, image.volume(0), 0)
    readout = Readout(code, timing.echo_spacing_s, timing.n_pe_lines, s.te_s)
    placement = place_field(image, reference, readout, b0, field_hz, *magnitude, s.align_fieldmap)
    mask = mask_on_run(mask_values, b0, image, placement)
    maps = shift_maps(placement.field_hz, code, timing.echo_spacing_s, n_pe_lines=timing.n_pe_lines,
                      inside=placement.covered, jacobian_floor=s.jacobian_floor)
    checked = check_shift_size(maps, signal_mask(reference, mask), image.path, b0.path, s.force)
    return _RunPlan(image, code, code_source, timing, maps, mask, files, placement.field_hz, checked, placement,
                    reference)


def _parameters(plan: _RunPlan, s: UnwarpSettings) -> dict:
    return {"pe_code": plan.pe_code, "pe_code_source": plan.pe_code_source,
            "effective_echo_spacing_s": plan.timing.echo_spacing_s,
            "total_readout_time_s": plan.timing.readout_time_s, "n_pe_lines": plan.timing.n_pe_lines,
            "timing_source": plan.timing.source, "interp": s.interp, "jacobian": bool(s.jacobian),
            "jacobian_floor": float(s.jacobian_floor), "force": bool(s.force)}


def _unwarp_one(plan: _RunPlan, field_map: _FieldMapInput, job: JobOptions, s: UnwarpSettings,
                inputs) -> UnwarpSummary:
    image, maps = plan.image, plan.maps
    affine = image.affine
    # NIfTI volumes come Fortran-ordered from nibabel and are written the same way.
    tables = build_tables(maps.shift_vox, maps.pe_axis, interp=s.interp, jacobian=s.jacobian,
                          jacobian_floor=s.jacobian_floor, layout="F")
    provenance = Provenance(job.command, _parameters(plan, s), inputs)
    # A streamed 4D run keeps a reader and a writer thread busy beside the kernel, and one volume
    # takes the kernel about a tenth of the time of its decompression and compression: the
    # kernel runs on this thread alone (numba's threads would only compete for the cores).
    parallel = s.parallel and image.ndim == 3
    follower = MotionFollower(plan, s.jacobian_floor) if plan.files.motion is not None else None
    correct = follower.correct if follower is not None else (lambda v: apply_tables(tables, v, parallel=parallel))
    n_volumes = write_corrected_run(image, correct, job.path(plan.files.corrected), inputs=inputs,
                                    overwrite=job.overwrite, provenance=provenance, progress=job.progress,
                                    gzip_effort=s.gzip_effort)
    motion = follower.write_table(job.path(plan.files.motion), inputs, job.overwrite) if follower else None
    common = dict(template=image, inputs=inputs, overwrite=job.overwrite, provenance=provenance,
                  gzip_effort=s.gzip_effort)
    save_image(job.path(plan.files.shift_vox), maps.shift_vox, affine, **common)
    save_image(job.path(plan.files.jacobian), maps.jacobian, affine, **common)
    save_image(job.path(plan.files.fold_mask), maps.fold, affine, dtype=np.uint8, **common)
    displacement = displacement_field_mm(maps.shift_vox, maps.pe_axis, affine, s.displacement_frame)
    save_image(job.path(plan.files.displacement_mm), displacement[:, :, :, None, :], affine,
               intent=NIFTI_INTENT_DISPVECT, **common,
               sidecar_extra={"Units": "mm", "DisplacementConvention": _DISPLACEMENT_WORDS[s.displacement_frame]})
    summary = _summary(plan, field_map, s, n_volumes, motion)
    write_json(job.path(plan.files.summary), summary.to_json(), inputs=inputs, overwrite=job.overwrite)
    return summary


def _summary(plan: _RunPlan, field_map: _FieldMapInput, s: UnwarpSettings, n_volumes: int,
             motion: MotionRecord | None) -> UnwarpSummary:
    maps, affine, mask_path = plan.maps, plan.image.affine, field_map.mask_path
    stats = shift_summary(maps.shift_vox, maps.jacobian, maps.pe_axis, affine, plan.mask, s.jacobian_floor)
    coverage_percent = float(100.0 * maps.inside.mean())
    warnings = ([plan.shift_check.warning] if plan.shift_check.warning else []) + plan.placement.warnings
    if coverage_percent < PARTIAL_COVERAGE_PERCENT:
        warnings.append(f"partial coverage: the B0 map covers {coverage_percent:.1f}% of this run's voxels; "
                        "outside it the field is continued from the map's nearest edge, so the correction "
                        "there is a guess (see the run's B0 coverage in the report)")
    floor = s.jacobian_floor
    return UnwarpSummary(
        run=str(plan.image.path), b0_map=str(field_map.image.path), b0_units=field_map.units,
        b0_mask=str(mask_path) if mask_path is not None else None,
        statistics_region="field-map mask" if mask_path is not None else "run voxels covered by the B0 map",
        n_volumes=int(n_volumes), pe_code=plan.pe_code, pe_axis=int(maps.pe_axis),
        pe_direction_world=pe_world_direction(plan.pe_code, affine),
        timing=TimingRecord(**plan.timing.as_dict()), interp=s.interp, jacobian=bool(s.jacobian),
        **dataclasses.asdict(stats),
        folded_voxels_total=int(np.count_nonzero(maps.fold)), coverage_percent=coverage_percent,
        partial_coverage=coverage_percent < PARTIAL_COVERAGE_PERCENT, warnings=warnings,
        signal_max_abs_shift_vox=plan.shift_check.max_abs_shift_vox,
        signal_p99_abs_shift_vox=plan.shift_check.robust_abs_shift_vox, large_shifts=plan.shift_check.large,
        voxel_size_mm=[float(v) for v in voxel_sizes_mm(affine)],
        displacement_convention=_DISPLACEMENT_WORDS[s.displacement_frame],
        folded_voxel_rule=f"voxels with Jacobian <= {floor:g} are flagged in the fold mask and weighted by {floor:g} "
                          "instead of the Jacobian; their intensity is not reliable",
        field_placement=plan.placement.how, alignment=plan.placement.alignment, motion=motion, outputs=plan.files)
