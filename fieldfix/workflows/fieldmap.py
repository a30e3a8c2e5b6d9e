"""File-level field-map job: gradient-echo images -> B0 map in Hz.

Takes exactly one kind of input (see :class:`FieldMapSettings`):

* ``phase`` + ``magnitude``: two or more phase images (radians, degrees or scanner integer
  counts; detected per image, or given with ``phase_units``) and their magnitudes (one per
  echo, or a single one used for every echo);
* ``real`` + ``imag``: two or more pairs of real and imaginary images;
* ``phase_diff`` (+ ``magnitude``, one or two): a phase-difference image and two echo times;
* ``b0``: a ready field map with ``b0_units`` (``hz``, ``rad/s``, ``ppm`` or ``T``);
* ``epi``: EPI images (3D or 4D) acquired with reversed phase encoding ("blip up / blip
  down"), each image's code and readout timing from its sidecar (``PhaseEncodingDirection``,
  ``TotalReadoutTime`` / ``EffectiveEchoSpacing``) or given per image or per volume
  (``epi_pe_codes``, ``epi_readout_times_s``); the field is the smooth one under which the
  images, each unwarped with its own shift and Jacobian, agree (:mod:`fieldfix.pairs`).

Echo times come from the BIDS sidecars (``EchoTime`` per echo, or ``EchoTime1`` /
``EchoTime2`` beside a phase difference) or from ``echo_times_s``; when both exist and
disagree a :class:`~fieldfix.errors.MetadataError` is raised unless ``echo_times_win`` says
which wins (``"arguments"`` or ``"sidecar"``).

Outputs (:class:`fieldfix.outputs.FieldMapFiles`, ``<t>`` = the job's tag):
``<t>b0_hz.nii.gz`` (field in Hz on the field-map grid, extended beyond the mask),
``<t>b0_mask.nii.gz``, ``<t>b0_magnitude.nii.gz`` (reference magnitude),
``<t>b0_summary.json`` (:class:`fieldfix.outputs.FieldMapSummary`), optionally
``<t>b0_rads.nii.gz`` / ``<t>b0_ppm.nii.gz``, and a provenance JSON beside each image. From
reversed phase-encode images also ``<t>b0_confidence.nii.gz`` (how strongly the images pin
the field, 0 where it is only extended) and ``<t>b0_epi_corrected.nii.gz`` (every input
volume unwarped with the field, 4D, in input order), and the reference magnitude is the
mean corrected image.

Research software, not a medical device: inspect the B0 map, and any image corrected with
it, before it is used for any decision about a person.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .._progress import progress_bar
from ..errors import FieldfixError, InputError, MetadataError, check_choice
from ..fieldmap import FieldMapResult, b0_from_echoes, b0_from_map, b0_from_phase_difference, hz_to_units
from ..geometry import voxel_sizes_mm
from ..io import Provenance, output_paths_guard, save_image, sidecar_path
from ..jsonfile import write_json
from ..outdir import output_folder
from ..outputs import CAUTION, FieldMapFiles, FieldMapSummary, JobOptions, PairRecord, job_and_settings
from ..phase import phase_units as lookup_phase_units
from ..units import check_plausible
from ..unwrap import METHODS
from ._b0 import field_strength_from
from ._fieldmap_inputs import READERS, FieldMapData, as_list, input_paths, read_magnitude, read_mask

__all__ = ["run_fieldmap", "FieldMapSettings", "CAUTION"]

PERCENTILES = (1, 5, 25, 50, 75, 95, 99)
_EXTRA_UNITS = {"rad/s": "rad/s", "rads": "rad/s", "ppm": "ppm"}


@dataclass(frozen=True)
class FieldMapSettings:
    """Inputs and processing choices of the field-map job.

    Attributes
    ----------
    phase, magnitude, real, imag : sequences of paths
        Echo images (see the module docstring for the accepted combinations).
    phase_diff : path, optional
        Phase-difference image.
    b0 : path, optional
        Ready field map; ``b0_units`` is ``"hz"``, ``"rad/s"``, ``"ppm"`` (needs
        ``field_strength_t``) or ``"T"`` (default: the sidecar's ``Units``).
    mask : path, optional
        Mask on the field-map grid (non-zero = inside); default: from the magnitude.
    echo_times_s : sequence of float, optional
        Echo times in seconds (one per echo; two for a phase difference).
    echo_times_win : {None, "arguments", "sidecar"}
        Which source wins when the argument and the sidecars disagree.
    phase_units : str, optional
        ``rad``, ``deg``, ``counts4096`` or ``counts8192``; default: detected per image.
    smooth_mm : float
        FWHM in mm of the masked normalised smoothing (0: none).
    unwrap_method : {"quality", "laplacian"}
    field_strength_t : float, optional
        Needed for ppm input or output; reported in the summary.
    also_units : sequence of {"rad/s", "ppm"}
        Extra copies of the map in these units.
    reject_outliers : bool
    epi : sequence of paths
        EPI images with reversed phase encoding (3D or 4D).
    epi_pe_codes : sequence of str, optional
        BIDS phase-encode code per image, or per volume (default: each sidecar).
    epi_readout_times_s : sequence of float, optional
        Total readout time per image, or per volume, in s (default: each sidecar).
    epi_win : {None, "arguments", "sidecar"}
        Which source wins when given codes or timing contradict a sidecar.
    pair_motion : bool
        Also estimate a rigid head motion between the polarities.
    """

    phase: Sequence = ()
    magnitude: Sequence = ()
    real: Sequence = ()
    imag: Sequence = ()
    phase_diff: object = None
    b0: object = None
    b0_units: str | None = None
    mask: object = None
    echo_times_s: Sequence[float] | None = None
    echo_times_win: str | None = None
    phase_units: str | None = None
    smooth_mm: float = 4.0
    unwrap_method: str = "quality"
    field_strength_t: float | None = None
    also_units: Sequence[str] = ()
    reject_outliers: bool = True
    epi: Sequence = ()
    epi_pe_codes: Sequence[str] | None = None
    epi_readout_times_s: Sequence[float] | None = None
    epi_win: str | None = None
    pair_motion: bool = False

    def __post_init__(self):
        for name in ("phase", "magnitude", "real", "imag", "epi"):
            object.__setattr__(self, name, tuple(as_list(getattr(self, name))))
        object.__setattr__(self, "also_units", tuple(_extra_unit(u) for u in self.also_units))

    def input_kind(self) -> str:
        kinds = [k for k, present in (("phase", bool(self.phase)), ("real-imag", bool(self.real or self.imag)),
                                      ("phase-difference", self.phase_diff is not None),
                                      ("ready map", self.b0 is not None), ("epi-pair", bool(self.epi)))
                 if present]
        if len(kinds) != 1:
            raise InputError("give exactly one kind of field-map input: phase images, real+imaginary images, a "
                             "phase difference, a ready B0 map, or EPI images with reversed phase encoding"
                             + (f" (got {', '.join(kinds)})" if kinds else ""))
        return kinds[0]

    def check(self) -> None:
        """Refuse settings that cannot work, before anything is read."""
        check_choice("unwrap_method", self.unwrap_method, METHODS)
        check_plausible("smooth_mm", self.smooth_mm)
        if self.field_strength_t is not None:
            check_plausible("field_strength_t", self.field_strength_t)
        for name in ("echo_times_win", "epi_win"):
            if getattr(self, name) not in (None, "arguments", "sidecar"):
                raise InputError("must be 'arguments' or 'sidecar'", parameter=name)
        if self.phase_units is not None:
            lookup_phase_units(self.phase_units)


def _extra_unit(unit: str) -> str:
    try:
        return _EXTRA_UNITS[str(unit).strip().lower()]
    except KeyError:
        raise InputError(f"extra output unit {unit!r} is not offered; use rad/s or ppm", parameter="also_units") \
            from None


def run_fieldmap(job: JobOptions | str, settings: FieldMapSettings | None = None, **changes) -> FieldMapSummary:
    """Make a B0 map in Hz from field-map images and write it with its mask, magnitude and summary.

    Parameters
    ----------
    job : JobOptions or path
        Output folder and writing options (a path: that folder, defaults otherwise).
    settings : FieldMapSettings, optional
        Inputs and processing choices.
    **changes
        Fields of :class:`JobOptions` or :class:`FieldMapSettings` to set on top.

    Returns
    -------
    FieldMapSummary
        Also written to ``<tag>b0_summary.json``.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> from fieldfix.io import save_image
    >>> folder = tempfile.mkdtemp()
    >>> b0 = save_image(os.path.join(folder, "map.nii.gz"), np.full((8, 8, 8), 25.0), np.eye(4))
    >>> summary = run_fieldmap(os.path.join(folder, "out"), b0=b0, b0_units="hz", mask=b0, smooth_mm=0.0)
    >>> summary.field_mean_hz
    25.0
    """
    job, s = job_and_settings(job, FieldMapSettings, settings, changes)
    kind = s.input_kind()
    s.check()
    files = FieldMapFiles.named(job.tag, s.also_units, epi_pair=kind == "epi-pair")
    inputs = input_paths(s)
    with output_folder(job.out_dir):
        output_paths_guard(files.guarded(job.out_dir), inputs, job.overwrite)
        steps = progress_bar(total=4, desc="fieldmap", enabled=job.progress, unit="step")
        try:
            data = READERS[kind](s)
            s = _with_field_strength(s, data)
            mask = read_mask(s.mask, data.reference)
            steps.update(1)
            result = _compute(kind, data, s, mask)
            steps.update(1)
            _write_maps(job, files, result, data, s, kind, inputs)
            steps.update(1)
            summary = _summary(kind, data, s, result, files)
            write_json(job.path(files.summary), summary.to_json(), inputs=inputs, overwrite=job.overwrite)
            steps.update(1)
        finally:
            steps.close()
    return summary


def _with_field_strength(s: FieldMapSettings, data: FieldMapData) -> FieldMapSettings:
    """The field strength given, else from the images' sidecars (MagneticFieldStrength); ppm needs it."""
    field_t = s.field_strength_t
    for image in [data.reference, *data.magnitudes]:
        if field_t is None:
            field_t = field_strength_from(image, None)
    needs = "ppm" in s.also_units or str(data.b0_units or "").strip().lower() == "ppm"
    if needs and field_t is None:
        raise InputError("a map in ppm needs the field strength: give it (for example 3T) or add "
                         "MagneticFieldStrength to the sidecar", parameter="field_strength_t")
    return dataclasses.replace(s, field_strength_t=field_t)


def _compute(kind: str, data: FieldMapData, s: FieldMapSettings, mask) -> FieldMapResult:
    """The B0 map from what the reader provided; errors in the data name the magnitude image."""
    voxel_mm = tuple(float(v) for v in voxel_sizes_mm(data.reference.affine))
    common = dict(mask=mask, voxel_size_mm=voxel_mm, smooth_fwhm_mm=float(s.smooth_mm),
                  reject_outliers=s.reject_outliers)
    blame = data.magnitudes[0].path if data.magnitudes else data.reference.path
    if data.echo_times_s is not None and len(set(data.echo_times_s)) != len(data.echo_times_s):
        where = data.reference.path if data.echo_times_source.startswith("arguments") \
            else sidecar_path(data.reference.path)
        raise MetadataError("echo times must differ from each other "
                            f"({', '.join(f'{t * 1e3:g}ms' for t in data.echo_times_s)})", where)
    if data.epi_volumes is not None:
        return _field_from_epi(data, s, mask)
    try:
        if data.echoes is not None:
            result = b0_from_echoes(data.echoes, data.echo_times_s, unwrap_method=s.unwrap_method, **common)
        elif data.phase_diff_rad is not None:
            t1, t2 = data.echo_times_s
            first = 0 if t1 <= t2 else 1
            mag = read_magnitude(data.magnitudes[first if len(data.magnitudes) == 2 else 0]) \
                if data.magnitudes else None
            result = b0_from_phase_difference(data.phase_diff_rad, t2 - t1, magnitude=mag,
                                              unwrap_method=s.unwrap_method, **common)
        else:
            mag = read_magnitude(data.magnitudes[0]) if data.magnitudes else None
            result = b0_from_map(data.b0_values, data.b0_units, magnitude=mag, field_strength_t=s.field_strength_t,
                                 **common)
    except FieldfixError as err:
        if err.path is not None:
            raise
        raise type(err)(err.message, blame) from None
    if not result.mask.any():
        raise InputError("the mask is empty: no voxel is bright enough in the magnitude image; give a mask", blame)
    return result


def _field_from_epi(data: FieldMapData, s: FieldMapSettings, mask) -> FieldMapResult:
    """The field from reversed phase-encode images; the pair result rides along for the outputs."""
    from ..pairs import PairOptions, field_from_pairs

    try:
        pair = field_from_pairs(data.epi_volumes, data.epi_encodings, data.reference.affine,
                                options=PairOptions(motion=s.pair_motion))
    except FieldfixError as err:
        if err.path is not None:
            raise
        raise type(err)(err.message, data.reference.path) from None
    magnitude = pair.corrected.mean(axis=3)
    mask = pair.mask if mask is None else mask
    result = FieldMapResult(b0_hz=pair.b0_hz.astype(np.float64), mask=mask, magnitude=magnitude,
                            raw_b0_hz=np.where(mask, pair.b0_hz, 0.0), outliers=np.zeros(mask.shape, bool),
                            n_regions=1, method=PAIR_METHOD)
    data.pair = pair
    return result


#: How a field from reversed phase-encode images is made (see :mod:`fieldfix.pairs`).
PAIR_METHOD = ("reversed phase-encode images: smooth (cubic B-spline) field fitted by robust least squares so that "
               "the images, each unwarped with its own shift and Jacobian, agree (after Andersson, Skare and "
               "Ashburner 2003, NeuroImage), coarse to fine")


def _parameters(kind: str, s: FieldMapSettings, data: FieldMapData) -> dict:
    parameters = {"input_kind": kind, "smooth_fwhm_mm": float(s.smooth_mm), "unwrap_method": s.unwrap_method,
                  "phase_units": s.phase_units, "field_strength_t": s.field_strength_t,
                  "reject_outliers": s.reject_outliers}
    if data.b0_units is not None:
        parameters["b0_units"] = data.b0_units
    if kind == "epi-pair":
        parameters.update(smooth_fwhm_mm=0.0, unwrap_method=None, pair_motion=s.pair_motion,
                          pe_codes=[e.pe_code for e in data.epi_encodings],
                          echo_spacing_s=[e.echo_spacing_s for e in data.epi_encodings])
    return parameters


def _write_maps(job: JobOptions, files: FieldMapFiles, result: FieldMapResult, data: FieldMapData,
                s: FieldMapSettings, kind: str, inputs) -> None:
    reference = data.reference
    provenance = Provenance(job.command, _parameters(kind, s, data), inputs)
    common = dict(template=reference, inputs=inputs, overwrite=job.overwrite, provenance=provenance)
    save_image(job.path(files.b0_hz), result.b0_hz, reference.affine, **common,
               sidecar_extra={"Units": "Hz", "Description": "B0 field map in Hz, extended beyond the mask"})
    save_image(job.path(files.mask), result.mask, reference.affine, dtype=np.uint8, **common,
               sidecar_extra={"Description": "voxels where the field was measured"})
    save_image(job.path(files.magnitude), result.magnitude, reference.affine, **common,
               sidecar_extra={"Description": "reference magnitude (shortest echo)"})
    for unit, name in (("rad/s", files.b0_rads), ("ppm", files.b0_ppm)):
        if name is not None:
            save_image(job.path(name), hz_to_units(result.b0_hz, unit, field_strength_t=s.field_strength_t),
                       reference.affine, **common, sidecar_extra={"Units": unit})
    if data.pair is not None:
        save_image(job.path(files.confidence), data.pair.confidence, reference.affine, **common,
                   sidecar_extra={"Description": "how strongly the images pin the field (0 to 1; 0 where the field "
                                                 "is only the smooth extension)"})
        sources = [f"{path.name}[{t}]" for path, t in data.epi_sources]
        save_image(job.path(files.epi_corrected), data.pair.corrected, reference.affine, **common,
                   sidecar_extra={"Description": "input volumes unwarped with the field, in input order",
                                  "PhaseEncodingDirection": [e.pe_code for e in data.epi_encodings],
                                  "SourceVolumes": sources})


def _summary(kind: str, data: FieldMapData, s: FieldMapSettings, result: FieldMapResult,
             files: FieldMapFiles) -> FieldMapSummary:
    inside = result.b0_hz[result.mask]
    voxel_mm = [float(v) for v in voxel_sizes_mm(data.reference.affine)]
    voxel_ml = float(np.prod(voxel_mm)) / 1000.0
    tes = data.echo_times_s
    percentiles = {f"p{q}": float(v) for q, v in zip(PERCENTILES, np.percentile(inside, PERCENTILES))}
    ppm = None
    if s.field_strength_t:
        ppm = {k: float(hz_to_units(v, "ppm", field_strength_t=s.field_strength_t)) for k, v in percentiles.items()}
    beyond = None
    if tes is not None and result.unaliased_range_hz is not None:
        beyond = float(100.0 * (np.abs(inside) > result.unaliased_range_hz).mean())
    return FieldMapSummary(
        input_kind=kind, method=result.method,
        echo_times_s=list(tes) if tes is not None else None, echo_times_source=data.echo_times_source,
        delta_te_s=(max(tes) - min(tes)) if tes is not None and len(tes) == 2 else None,
        unaliased_range_hz=result.unaliased_range_hz, phase_units=list(data.phase_units),
        mask_source="given" if s.mask is not None else (
            "mean corrected image (Otsu rule, see fieldfix.phase)" if kind == "epi-pair"
            else "magnitude (Otsu rule, see fieldfix.phase)"),
        mask_voxels=int(result.mask.sum()), mask_volume_ml=float(result.mask.sum()) * voxel_ml,
        mask_fraction_of_grid=float(result.mask.mean()), field_percentiles_hz=percentiles,
        field_mean_hz=float(inside.mean()), voxels_offset_changed=int(result.n_offset_changed),
        mask_regions=int(result.n_regions), outlier_voxels=int(result.outliers.sum()),
        smooth_fwhm_mm=0.0 if kind == "epi-pair" else float(s.smooth_mm),
        unwrap_method=s.unwrap_method if kind not in ("ready map", "epi-pair") else None,
        voxel_size_mm=voxel_mm, field_strength_t=s.field_strength_t, outputs=files,
        field_percentiles_ppm=ppm, percent_mask_beyond_unaliased_range=beyond,
        pair=_pair_record(data) if data.pair is not None else None)


def _pair_record(data: FieldMapData) -> PairRecord:
    pair = data.pair
    spacing = {}
    for enc in data.epi_encodings:
        spacing.setdefault(enc.pe_code, enc.echo_spacing_s)
    return PairRecord(
        pe_codes=list(pair.group_codes), volumes=len(data.epi_volumes),
        echo_spacing_s=[float(spacing[c]) for c in pair.group_codes],
        nrmsd_before=float(pair.nrmsd_before), nrmsd_after=float(pair.nrmsd_after),
        correlation_before=float(pair.correlation_before), correlation_after=float(pair.correlation_after),
        iterations=[int(i) for i in pair.iterations], converged=bool(pair.converged),
        motion_mm_deg=[[float(v) for v in row] for row in pair.motion_mm_deg],
        extended_percent=float(100.0 * pair.extended.mean()), method=PAIR_METHOD)
