"""Putting the field map where the head is in a run (an unwarping step, on by default).

The field map's magnitude (the ``b0_magnitude`` written beside the map by the field-map job,
or one given), times the fraction of signal the run's own echo time and slices keep under the
field (:func:`fieldfix.dropout.epi_signal_fraction`; without the run's ``EchoTime`` the
magnitude alone), is aligned rigidly to the run's first volume with the distortion in the loop
(:func:`fieldfix.align.align_fieldmap`); the field and its mask are then resampled onto the run
through that transform (:func:`fieldfix.align.align_field_to_run`). Without a magnitude, with the
step turned off, or when the alignment does not raise the match of the forward-distorted
magnitude and the run (normalised mutual information) by more than :data:`MIN_MATCH_GAIN`, the
map is placed through the two images' affines alone, and the summary says which and why.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.ndimage import distance_transform_edt

from ..align import AlignOptions, align_field_to_run, align_fieldmap
from ..dropout import epi_signal_fraction, frame_from_affine
from ..shift import Readout
from ..errors import FieldfixError, GeometryError
from ..geometry import parse_pe_code, resample_to_grid, same_grid, slice_axis_of, voxel_sizes_mm
from ..io import Image, load_image
from ..units import PLAUSIBLE
from ..outputs import AlignmentRecord
from ._run_checks import find_beside_b0

__all__ = ["Placement", "place_field", "alignment", "read_magnitude_on_map", "find_b0_magnitude", "ALIGN_METHOD",
           "MIN_MATCH_GAIN"]

ALIGN_METHOD = ("rigid alignment of the field-map magnitude to the run's first volume, the magnitude distorted "
                "by the field at each pose before the comparison; cost: normalised gradient fields (Haber and "
                "Modersitzki 2006); the magnitude weighted by the signal the run keeps under the field "
                "(through-plane dephasing at the local echo time, Deichmann et al. 2002), so that its dropout "
                "does not pull the alignment; match measured by normalised mutual information (Studholme et al. 1999)")


#: The least rise of the normalised mutual information for which an alignment is kept. On heads that
#: did not move between the scans (12 invented subjects, scenarios orbitofrontal-3t and temporal-7t,
#: seeds 3 and 4) the alignment's pose was off by 0.5-1.5 mm and the measure rose by at most 0.0006;
#: after a move of 1 degree and 1.3 mm it rose by more than 0.001 in 10 of 12 cases.
MIN_MATCH_GAIN = 1e-3


@dataclass
class Placement:
    """The field on a run's grid and how it got there."""

    field_hz: np.ndarray
    covered: np.ndarray
    matrix: np.ndarray
    how: str
    alignment: AlignmentRecord | None = None
    warnings: list[str] = field(default_factory=list)


def find_b0_magnitude(b0_path: Path, given) -> Path | None:
    """The given magnitude, else ``<tag>b0_magnitude.nii.gz`` beside a ``<tag>b0_hz.nii.gz``, else None."""
    return find_beside_b0(b0_path, given, "magnitude")


def read_magnitude_on_map(path: Path | None, b0: Image) -> np.ndarray | None:
    """The field map's magnitude on the map's grid (resampled when it is on another grid)."""
    if path is None:
        return None
    image = load_image(path, ndim=(3,), sidecar=False)
    values = np.nan_to_num(image.get_fdata(np.float64))
    if same_grid(image.shape, image.affine, b0.shape, b0.affine):
        return values
    resampled, _ = resample_to_grid(values, image.affine, b0.shape, b0.affine, order=1, outside=0.0)
    return resampled


def expected_epi_signal(image: Image, readout: Readout, b0: Image, field_hz: np.ndarray,
                        magnitude: np.ndarray) -> tuple[np.ndarray, str]:
    """The magnitude times the signal fraction the run keeps, and words saying how it was modelled.

    The echo time is the readout's ``te_s``, else the run's sidecar ``EchoTime``; its
    ``SliceEncodingDirection`` (default k), ``SliceThickness`` (default its
    voxel size across slices) and ``PartialFourier`` (default 1) come from its sidecar. The
    fraction is computed on the field map's grid for the run's slice orientation and moves with
    the head (first order: the change of the slices' orientation relative to the head at the small
    angles of an alignment is left out).
    """
    sidecar = image.sidecar or {}
    te_s = readout.te_s if readout.te_s is not None else sidecar.get("EchoTime")
    te_s = float(te_s) if PLAUSIBLE["te_s"].contains(te_s) else None
    if te_s is None:
        return magnitude, "magnitude alone (no echo time given and no usable EchoTime in the run's sidecar)"
    pe_axis, pe_sign = parse_pe_code(readout.pe_code)
    slice_axis = slice_axis_of(sidecar)
    if slice_axis == pe_axis:
        return magnitude, "magnitude alone (the run's slice axis is its phase-encode axis)"
    thickness_mm = _sidecar_number(sidecar, "SliceThickness", 0.0, 20.0)
    thickness_mm = float(voxel_sizes_mm(image.affine)[slice_axis]) if thickness_mm is None else thickness_mm
    partial_fourier = _sidecar_number(sidecar, "PartialFourier", 0.5, 1.0) or 1.0
    shape = list(image.shape[:3])
    shape[pe_axis] = readout.n_pe_lines or shape[pe_axis]
    frame = frame_from_affine(image.affine, slice_axis, pe_axis, shape=tuple(shape))
    kept = epi_signal_fraction(_filled(field_hz), b0.affine, frame, te_s=te_s, thickness_mm=thickness_mm,
                               pe_sign=pe_sign, echo_spacing_s=readout.echo_spacing_s, partial_fourier=partial_fourier)
    return magnitude * kept, (f"magnitude times the signal kept at TE {te_s * 1e3:.3g} ms with "
                              f"{thickness_mm:.3g} mm slices along {'ijk'[slice_axis]}")


def _sidecar_number(sidecar: dict, key: str, low: float, high: float) -> float | None:
    """The sidecar's number under `key` when it lies in (low, high], else None (absent or implausible)."""
    value = sidecar.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not low < value <= high:
        return None
    return float(value)


def _filled(field_hz: np.ndarray) -> np.ndarray:
    """The field with its unknown voxels (zero or not finite: outside a scanner map's mask) set to the
    nearest known value, so that the edge of the map does not read as a steep gradient."""
    unknown = ~np.isfinite(field_hz) | (field_hz == 0)
    if not unknown.any() or unknown.all():
        return np.nan_to_num(field_hz)
    nearest = distance_transform_edt(unknown, return_distances=False, return_indices=True)
    return field_hz[tuple(nearest)]


def _record(result, signal_model: str) -> AlignmentRecord:
    return AlignmentRecord(
        translation_mm=[float(v) for v in result.translation_mm], rotation_deg=[float(v) for v in result.rotation_deg],
        centre_mm=[float(v) for v in result.centre_mm], matrix=[[float(v) for v in row] for row in result.matrix],
        measure_before=float(result.measure_before), measure_after=float(result.measure_after),
        iterations=int(result.iterations), converged=bool(result.converged), coverage=float(result.coverage),
        warnings=list(result.warnings), method=ALIGN_METHOD, signal_model=signal_model)


def alignment(image: Image, reference: np.ndarray, readout: Readout, b0: Image, field_hz: np.ndarray,
              magnitude: np.ndarray | None, magnitude_path: Path | None, align: bool):
    """(matrix field-map world -> run world, how, AlignmentRecord or None, warnings) for one run."""
    if align and magnitude is None:
        return np.eye(4), "affines only: no field-map magnitude beside the B0 map (give one to align the map to " \
            "the run)", None, ["the field map was placed through the scanner coordinates only (no magnitude to align "
                               "it with); if the head moved between the scans the correction is off by that move"]
    if not align:
        return np.eye(4), "affines only (alignment turned off)", None, []
    expected, signal_model = expected_epi_signal(image, readout, b0, field_hz, magnitude)
    try:
        result = align_fieldmap(expected, field_hz, b0.affine, reference, image.affine, readout, AlignOptions())
    except GeometryError as err:
        raise GeometryError(err.message, image.path) from None
    except FieldfixError as err:
        raise type(err)(err.message, magnitude_path) from None
    warnings = [f"alignment: {w}" for w in result.warnings]
    record = _record(result, signal_model)
    if result.measure_after - result.measure_before > MIN_MATCH_GAIN:
        return np.asarray(result.matrix, float), f"aligned to the run ({magnitude_path.name})", record, warnings
    # no gain beyond what a head that did not move gives: the scanner coordinates are as good as it gets
    return np.eye(4), (f"affines only: aligning {magnitude_path.name} did not improve the match by more than "
                       f"{MIN_MATCH_GAIN:g} (normalised mutual information {result.measure_before:.4f} -> "
                       f"{result.measure_after:.4f})"), record, warnings


def place_field(image: Image, reference: np.ndarray, readout: Readout, b0: Image, field_hz: np.ndarray,
                magnitude: np.ndarray | None, magnitude_path: Path | None, align: bool) -> Placement:
    """The field on the run's grid: through the alignment when it is on and possible, else the affines."""
    matrix, how, record, warnings = alignment(image, reference, readout, b0, field_hz, magnitude, magnitude_path,
                                              align)
    field_on_run, covered = align_field_to_run(field_hz, b0.affine, image.shape[:3], image.affine, matrix, order=1)
    if not covered.any():
        raise GeometryError(f"the B0 map {b0.path.name} does not overlap this run's field of view", image.path)
    return Placement(field_on_run, covered, matrix, how, record, warnings)


def mask_on_run(mask_values: np.ndarray | None, b0: Image, image: Image, placement: Placement) -> np.ndarray:
    """The statistics mask on the run's grid, moved like the field (the run's covered voxels without one)."""
    if mask_values is None:
        return placement.covered
    moved, _ = resample_to_grid(mask_values, placement.matrix @ b0.affine, image.shape[:3], image.affine, order=0,
                                outside=0.0)
    return (moved > 0.5) & placement.covered
