"""File-level dropout job: B0 map -> retention and BOLD-sensitivity maps for one protocol.

The maps are computed on the B0 map's grid (undistorted space). The slice geometry comes
from an EPI image (``like``: its affine, slice axis and phase-encode axis, and its
sidecar's ``PhaseEncodingDirection``, ``SliceEncodingDirection`` and
``EffectiveEchoSpacing`` when not given) or from the B0 grid itself (``slice_axis``), plus
an optional extra tilt about the left-right axis (:func:`fieldfix.dropout.tilt_rotation`).

Outputs (:class:`fieldfix.outputs.DropoutFiles`, ``<t>`` = the job's tag):
``<t>retention.nii.gz`` (through-plane retention at the nominal TE),
``<t>bold_sensitivity.nii.gz`` (when the phase-encode code and echo spacing are known),
``<t>dropout.json`` (:class:`fieldfix.outputs.DropoutSummary`), and a provenance JSON beside
each image. With an EPI image on another grid, the maps are also written resampled (linear
interpolation, 0 outside the B0 map) onto the EPI grid: ``<t>retention_on_epi.nii.gz`` and
``<t>bold_sensitivity_on_epi.nii.gz``, for overlays on the (corrected) EPI.

Without a B0 map the field is modelled (:mod:`fieldfix.plan_field`, as the planner does: the
built-in head or a label image, a field strength and a head pitch), the maps are computed on the
model's grid, its brain is the default mask, the field used is written as
``<t>modelled_b0_hz.nii.gz`` and the summary says ``field_source: "modelled"`` and how.

Research software, not a medical device: predicted maps are a planning aid.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..dropout import PROFILES, acquisition_window_s, dropout_maps, frame_from_affine, slice_profile, zshim_cyc_per_mm
from ..errors import GeometryError, InputError, MetadataError
from ..geometry import overlap_fraction, parse_pe_code, pe_world_direction, resample_to_grid, same_grid, slice_axis_of
from ..io import Image, Provenance, load_image, output_paths_guard, save_image, sidecar_path
from ..jsonfile import write_json
from ..outdir import output_folder
from ..shift import resolve_timing
from ._b0 import measured_field
from ._modelled import MODEL_BRAIN, model_inputs, read_modelled_field, save_modelled_field
from ..plan_field import FieldModel, ModelledField
from ..shift import Readout
from ._placement import alignment, find_b0_magnitude, read_magnitude_on_map
from ._run_checks import find_b0_mask
from ..records import fields_of
from ..units import PLAUSIBLE, check_plausible
from ..outputs import (
    CAUTION,
    DropoutFiles,
    DropoutNumbers,
    DropoutParameters,
    DropoutSummary,
    FrameRecord,
    JobOptions,
    MapStatistics,
    job_and_settings,
)

__all__ = ["run_dropout", "DropoutSettings", "load_mask_on_grid", "CAUTION", "MAX_TE_S"]

#: Longest echo time accepted (s); longer values are almost always a unit mistake.
MAX_TE_S = PLAUSIBLE["te_s"].high

_DESCRIPTIONS = {"retention": "through-plane signal retention at the nominal TE",
                 "bold_sensitivity": "BOLD sensitivity: retention at the local echo time x TE'/TE"}


@dataclass(frozen=True)
class DropoutSettings:
    """The protocol to predict for, and where its geometry and statistics come from.

    Attributes
    ----------
    te_s, thickness_mm : float
        Echo time (s) and nominal slice thickness (mm); both required.
    like : path, optional
        EPI image giving the slice geometry (and sidecar timing).
    slice_axis : int, optional
        Voxel axis across slices (of the EPI image, or of the B0 grid without one).
        Default: the sidecar's ``SliceEncodingDirection`` or axis 2.
    tilt_deg : float
        Extra tilt about the world left-right axis (positive: anterior edge up).
    pe_code : str, optional
        BIDS phase-encode code on the EPI grid (or the B0 grid); default: the sidecar.
    echo_spacing_s : float, optional
        Effective echo spacing (s); default: the sidecar's ``EffectiveEchoSpacing``.
    profile : {'rect', 'gaussian', 'rf'}
    tbw : float
        Time-bandwidth product of the windowed-sinc pulse for ``profile='rf'``.
    zshim_mtms_per_m : float
        Z-shim moment along the slice normal (mT*ms/m).
    partial_fourier : float, optional
        Fraction of k-space acquired along the phase-encode axis; default: the EPI sidecar's
        ``PartialFourier``, else 1.
    mask : path, optional
        Mask of the statistics (maps set to 0 outside); default: the field map's mask
        (``<tag>b0_mask.nii.gz`` beside a ``<tag>b0_hz.nii.gz``), else the non-zero B0 voxels;
        for a modelled field the model's brain.
    threshold : float
        Level under which a voxel counts as lost in the statistics.
    b0_units : str, optional
        Units of the B0 map (Hz, rad/s, ppm, T); default: its sidecar's ``Units``, else Hz.
    field_strength_t : float, optional
        For a map in ppm; default: the sidecar's ``MagneticFieldStrength``.
    align_fieldmap : bool
        With ``like`` on another grid, place the maps written on the EPI grid where the head is
        in that image: the field map's magnitude (``b0_magnitude``, default: beside the map) is
        aligned to it as for unwarping (:mod:`fieldfix.workflows._placement`).
    b0_magnitude : path, optional

    ``b0_units``, ``field_strength_t`` and ``b0_magnitude`` read a B0 map and are refused
    without one (a modelled field's strength is that of its :class:`fieldfix.plan_field.ModelledField`).
    The plausible ranges of the quantities are those of :data:`fieldfix.units.PLAUSIBLE`.
    """

    te_s: float | None = None
    thickness_mm: float | None = None
    like: object = None
    slice_axis: int | None = None
    tilt_deg: float = 0.0
    pe_code: str | None = None
    echo_spacing_s: float | None = None
    profile: str = "rect"
    tbw: float = 4.0
    zshim_mtms_per_m: float = 0.0
    partial_fourier: float | None = None
    mask: object = None
    threshold: float = 0.5
    b0_units: str | None = None
    field_strength_t: float | None = None
    align_fieldmap: bool = True
    b0_magnitude: object = None

    def check(self) -> None:
        check_plausible("te_s", self.te_s)
        check_plausible("thickness_mm", self.thickness_mm)
        check_plausible("tilt_deg", self.tilt_deg)
        check_plausible("zshim_mtms_per_m", self.zshim_mtms_per_m)
        if self.echo_spacing_s is not None:
            check_plausible("echo_spacing_s", self.echo_spacing_s)
        if self.profile not in PROFILES:
            raise InputError(f"unknown slice profile {self.profile!r}; use one of {', '.join(PROFILES)}",
                             parameter="profile")


def load_mask_on_grid(path, shape, affine, *, what: str = "mask") -> np.ndarray:
    """Read a mask image and bring it onto a grid (nearest neighbour through the affines)."""
    image = load_image(path, ndim=(3,))
    data = image.get_fdata(np.float32)
    if not np.isfinite(data).all():
        raise InputError(f"the {what} contains non-finite values", path)
    values = np.unique(data)
    if values.size > 2 or not np.all(np.isin(values, (0.0, 1.0))):
        shown = ", ".join(f"{v:g}" for v in values[:6]) + (", ..." if values.size > 6 else "")
        raise InputError(f"the {what} is not a binary mask (values {shown}; a mask holds 0 and 1 only: a label "
                         "image needs its label chosen, a probability map a threshold)", path)
    if not (data > 0.5).any():
        raise InputError(f"the {what} is empty (no voxel above 0.5)", path)
    if same_grid(image.shape, image.affine, shape, affine):
        return data > 0.5
    values, inside = resample_to_grid(data, image.affine, shape, affine, order=0, outside=0.0)
    if not inside.any():
        raise GeometryError(f"the {what} does not overlap the B0 map", path)
    mask = (values > 0.5) & inside
    if not mask.any():
        raise InputError(f"the {what} is empty on the B0 grid", path)
    return mask


def _stats(values: np.ndarray, mask: np.ndarray, threshold: float) -> MapStatistics:
    v = values[mask]
    if v.size == 0:
        return MapStatistics(median=None, percent_below_threshold=None, voxels=0)
    return MapStatistics(median=float(np.median(v)),
                         percent_below_threshold=float(100.0 * np.count_nonzero(v < threshold) / v.size),
                         voxels=int(v.size))


@dataclass
class _Geometry:
    """Slice frame and readout of the prediction, resolved from the settings and the EPI sidecar."""

    frame: object
    source_affine: np.ndarray
    pe_code: str | None
    pe_sign: int | None
    echo_spacing_s: float | None
    slice_axis: int
    partial_fourier: float


def _geometry(s: DropoutSettings, field: FieldModel, like: Image | None) -> _Geometry:
    sidecar = like.sidecar if like is not None else {}
    affine, shape = (like.affine, like.shape[:3]) if like is not None else (field.affine, field.b0_hz.shape)
    slice_axis, pe_code, echo_spacing_s = s.slice_axis, s.pe_code, s.echo_spacing_s
    if slice_axis is None:
        slice_axis = slice_axis_of(sidecar)
    if pe_code is None and isinstance(sidecar.get("PhaseEncodingDirection"), str):
        pe_code = sidecar["PhaseEncodingDirection"]
    pe_axis = pe_sign = None
    if pe_code is not None:
        pe_axis, pe_sign = parse_pe_code(pe_code)
        if echo_spacing_s is None and like is not None and (
                "EffectiveEchoSpacing" in sidecar or "TotalReadoutTime" in sidecar):
            try:  # the sidecar's timing, by the same rules as unwarping (BIDS definitions)
                echo_spacing_s = resolve_timing(like.shape[pe_axis], sidecar=sidecar).echo_spacing_s
            except MetadataError as err:
                raise MetadataError(err.message, sidecar_path(like.path)) from None
        if pe_axis == slice_axis:
            raise GeometryError(f"phase encoding {pe_code!r} runs along the slice axis {'ijk'[slice_axis]}",
                                parameter="pe_code")
        if echo_spacing_s is None:
            raise MetadataError("BOLD sensitivity needs the effective echo spacing (echo_spacing_s, or "
                                "EffectiveEchoSpacing in the EPI sidecar)")
        if not 1e-6 < echo_spacing_s < 0.01:
            raise MetadataError(f"effective echo spacing {echo_spacing_s * 1e3:g} ms is implausible "
                                "(expected 0.001-10 ms); check the unit", parameter="echo_spacing_s")
    partial_fourier = _partial_fourier(s.partial_fourier, sidecar, like)
    frame = frame_from_affine(affine, slice_axis, pe_axis, tilt_deg=s.tilt_deg, shape=shape)
    if pe_code is not None:
        start, _ = acquisition_window_s(s.te_s, echo_spacing_s, frame.pe_lines, partial_fourier)
        if start < 0:
            raise MetadataError(f"echo time {s.te_s * 1e3:g} ms is shorter than the time to reach the k-space centre "
                                f"({(s.te_s - start) * 1e3:g} ms) with {frame.pe_lines} lines and this echo spacing",
                                parameter="te_s")
    return _Geometry(frame, affine, pe_code, pe_sign, echo_spacing_s, slice_axis, partial_fourier)


def _partial_fourier(given: float | None, sidecar: dict, like: Image | None) -> float:
    """The partial Fourier fraction: given, else the EPI sidecar's ``PartialFourier``, else 1."""
    if given is not None:
        return float(given)
    value = sidecar.get("PartialFourier")
    if value is None:
        return 1.0
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0.5 < value <= 1.0:
        raise MetadataError(f"PartialFourier {value!r} in the sidecar is not a fraction in (0.5, 1]",
                            sidecar_path(like.path))
    return float(value)


def run_dropout(b0_path, job: JobOptions | str, settings: DropoutSettings | None = None, *,
                model: ModelledField | None = None, **changes) -> DropoutSummary:
    """Predict retention (and BOLD sensitivity) maps for one protocol and write them.

    Parameters
    ----------
    b0_path : path or None
        B0 map in Hz (3D NIfTI); None: the field `model` describes, on the model's grid, written
        as ``<tag>modelled_b0_hz.nii.gz``, with the model's brain as the default mask.
    job : JobOptions or path
        Output folder and writing options.
    settings : DropoutSettings, optional
    model : ModelledField, optional
        How to model the field when there is no B0 map (:mod:`fieldfix.plan_field`; default the
        built-in head at 3 T, pitch 0 deg).
    **changes
        Fields of :class:`JobOptions` or :class:`DropoutSettings` to set on top.

    Returns
    -------
    DropoutSummary
        Also written as ``<tag>dropout.json``.
    """
    job, s = job_and_settings(job, DropoutSettings, settings, changes)
    s.check()
    _check_field_source(b0_path, model, s)
    b0_path = Path(b0_path) if b0_path is not None else None
    mask_path = find_b0_mask(b0_path, s.mask) if b0_path is not None else \
        Path(s.mask) if s.mask is not None else None
    inputs = [Path(p) for p in (b0_path, s.like, mask_path) if p is not None]
    inputs += model_inputs(model) if b0_path is None else []
    with output_folder(job.out_dir):
        field, b0_img, b0_units = _read_field(b0_path, model, s)
        like = load_image(s.like, ndim=(3, 4)) if s.like is not None else None
        b0 = field.b0_hz
        if like is not None and overlap_fraction(like.shape[:3], like.affine, b0.shape, field.affine) == 0.0:
            raise GeometryError("the EPI image does not overlap the B0 map; check that both are in the same "
                                "scanner space", s.like)
        geometry = _geometry(s, field, like)
        on_epi = like is not None and not same_grid(like.shape[:3], like.affine, b0.shape, field.affine)
        files = DropoutFiles.named(job.tag, bold=geometry.pe_code is not None, on_epi=on_epi, modelled=b0_img is None)
        output_paths_guard(files.guarded(job.out_dir), inputs, job.overwrite)
        mask = _stats_mask(mask_path, s.mask, field, modelled=b0_img is None)
        if not np.isfinite(b0[mask.voxels]).all():
            raise InputError("the B0 map has non-finite values inside the mask", b0_path)
        field = dataclasses.replace(field, b0_hz=np.where(np.isfinite(b0), b0, 0.0))
        matrix, placement = _epi_placement(s, b0_path, b0_img, field.b0_hz, like, geometry) if on_epi \
            else (np.eye(4), None)
        numbers = _predict_and_write(field, b0_img, like, mask, geometry, files, s, job, inputs, matrix)
        summary = DropoutSummary(
            **fields_of(numbers, DropoutNumbers), b0=str(b0_img.path) if b0_img is not None else field.source,
            b0_units=b0_units, geometry_from=str(s.like) if s.like is not None else "B0 grid",
            frame=FrameRecord.from_json(geometry.frame.as_dict()), outputs=files, epi_placement=placement)
        write_json(job.path(files.summary), summary.to_json(), inputs=inputs, overwrite=job.overwrite)
    return summary


def _check_field_source(b0_path, model: ModelledField | None, s: DropoutSettings) -> None:
    """A B0 map and a field model exclude each other; the settings that read a map need one."""
    if b0_path is not None and model is not None:
        raise InputError("a field model is for a job without a B0 map; give the map or the model, not both",
                         parameter="model")
    for name in ("b0_units", "field_strength_t", "b0_magnitude"):
        if b0_path is None and getattr(s, name) is not None:
            raise InputError("reads a B0 map, and none is given (the field is modelled: its field strength is "
                             "the model's)", parameter=name)


def _read_field(b0_path: Path | None, model: ModelledField | None,
                s: DropoutSettings) -> tuple[FieldModel, Image | None, str]:
    """(the field in Hz on its grid, the B0 map's image (None: modelled), how its units were known)."""
    if b0_path is None:
        return read_modelled_field(model), None, "Hz (modelled)"
    b0_img = load_image(b0_path, ndim=(3,))
    field, b0_units = measured_field(b0_img, s.b0_units, s.field_strength_t)
    return field, b0_img, b0_units


@dataclass(frozen=True)
class _StatsMask:
    """The statistics mask on the field's grid, and the words naming it in the summary."""

    voxels: np.ndarray
    words: str


def _stats_mask(mask_path: Path | None, given, field: FieldModel, *, modelled: bool) -> _StatsMask:
    """The statistics mask: given or found, else the model's brain, else non-zero B0."""
    words = _mask_words(mask_path, given, modelled)
    if mask_path is not None:
        return _StatsMask(load_mask_on_grid(mask_path, field.b0_hz.shape, field.affine, what="mask"), words)
    if field.brain_mask is not None:
        return _StatsMask(field.brain_mask, words)
    return _StatsMask(np.isfinite(field.b0_hz) & (field.b0_hz != 0), words)


def _epi_placement(s: DropoutSettings, b0_path: Path | None, b0_img: Image | None, b0, like: Image,
                   geometry: _Geometry):
    """(field-map world -> EPI world matrix, how) for the maps written on the EPI grid."""
    if b0_img is None:
        return np.eye(4), "affines only: a modelled field has no magnitude to align with the EPI image"
    magnitude_path = find_b0_magnitude(b0_path, s.b0_magnitude) if s.align_fieldmap else None
    if s.align_fieldmap and magnitude_path is not None and geometry.pe_code is None:
        return np.eye(4), "affines only: the EPI image's phase encoding is unknown, so its distortion cannot be modelled"
    readout = Readout(geometry.pe_code, geometry.echo_spacing_s, None) if geometry.pe_code is not None else None
    reference = like.volume(0) if magnitude_path is not None else None
    matrix, how, _, _ = alignment(like, reference, readout, b0_img, np.nan_to_num(b0),
                                  read_magnitude_on_map(magnitude_path, b0_img), magnitude_path, s.align_fieldmap)
    return matrix, how


def _predict_and_write(field: FieldModel, b0_img: Image | None, like, stats_mask: _StatsMask, geometry: _Geometry,
                       files: DropoutFiles, s: DropoutSettings, job: JobOptions, inputs, matrix) -> DropoutNumbers:
    """Predict the maps, write them (and a modelled field) and return their numbers."""
    mask = stats_mask.voxels
    profile = slice_profile(s.profile, tbw=s.tbw)
    maps = dropout_maps(field.b0_hz, field.affine, geometry.frame, te_s=s.te_s, thickness_mm=s.thickness_mm,
                        profile=profile, zshim_cyc_per_mm=zshim_cyc_per_mm(s.zshim_mtms_per_m),
                        pe_sign=geometry.pe_sign,
                        echo_spacing_s=geometry.echo_spacing_s if geometry.pe_code is not None else None,
                        partial_fourier=geometry.partial_fourier)
    parameters = DropoutParameters(
        te_s=s.te_s, thickness_mm=s.thickness_mm, tilt_deg=s.tilt_deg, slice_axis="ijk"[geometry.slice_axis],
        pe_code=geometry.pe_code, echo_spacing_s=geometry.echo_spacing_s, partial_fourier=geometry.partial_fourier,
        zshim_mtms_per_m=s.zshim_mtms_per_m, threshold=s.threshold, profile=profile.kind, tbw=profile.tbw,
        window=profile.window)
    provenance = Provenance(job.command, parameters.to_json(), inputs)
    common = dict(inputs=inputs, overwrite=job.overwrite, provenance=provenance)
    if files.modelled_b0_hz is not None:
        save_modelled_field(job.path(files.modelled_b0_hz), field, **common)
    written = {"retention": np.where(mask, maps["retention"], 0.0)}
    if geometry.pe_code is not None:
        written["bold_sensitivity"] = np.where(mask, maps["bold_sensitivity"], 0.0)
    for kind, values in written.items():
        save_image(job.path(getattr(files, kind)), values, field.affine, template=b0_img, **common,
                   sidecar_extra={"Description": _DESCRIPTIONS[kind]})
        if files.retention_on_epi is not None:  # the same maps on the EPI grid, for overlays
            resampled, _ = resample_to_grid(values, matrix @ field.affine, like.shape[:3], like.affine, order=1,
                                            outside=0.0)
            note = f"{_DESCRIPTIONS[kind]}, resampled (linear) onto the grid of {like.path.name}"
            save_image(job.path(getattr(files, f"{kind}_on_epi")), resampled, like.affine, template=like, **common,
                       sidecar_extra={"Description": note})
    bold = geometry.pe_code is not None
    return DropoutNumbers(
        parameters=parameters, mask=stats_mask.words, field_source="measured" if b0_img is not None else "modelled",
        retention=_stats(maps["retention"], mask, s.threshold),
        bold_sensitivity=_stats(maps["bold_sensitivity"], mask, s.threshold) if bold else None,
        pe_direction_world=pe_world_direction(geometry.pe_code, geometry.source_affine) if bold else None,
        percent_echo_lost=float(100.0 * np.count_nonzero(~maps["echo_inside"][mask]) / max(mask.sum(), 1))
        if bold else None)


def _mask_words(mask_path, given, modelled: bool) -> str:
    """Which mask the statistics are over (every summary names it)."""
    if mask_path is None:
        return MODEL_BRAIN if modelled else "non-zero B0 voxels (no mask given and none beside the B0 map)"
    return str(mask_path) if given is not None else f"{mask_path} (the field map's mask, found beside it)"
