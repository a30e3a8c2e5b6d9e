"""Putting the field map where the head is in a run (an unwarping step, on by default).

The field map's magnitude (the ``b0_magnitude`` written beside the map by the field-map job,
or one given) is aligned rigidly to the run's first volume with the distortion in the loop
(:func:`fieldfix.align.align_fieldmap`); the field and its mask are then resampled onto the run
through that transform (:func:`fieldfix.align.align_field_to_run`). Without a magnitude, with the
step turned off, or when the alignment does not improve the match of the forward-distorted
magnitude and the run (normalised mutual information), the map is placed through the two
images' affines alone, and the summary says which and why.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..align import AlignOptions, align_field_to_run, align_fieldmap
from ..shift import Readout
from ..errors import FieldfixError, GeometryError
from ..geometry import resample_to_grid, same_grid
from ..io import Image, load_image
from ..outputs import AlignmentRecord
from ._run_checks import find_beside_b0

__all__ = ["Placement", "place_field", "alignment", "read_magnitude_on_map", "find_b0_magnitude", "ALIGN_METHOD"]

ALIGN_METHOD = ("rigid alignment of the field-map magnitude to the run's first volume, the magnitude distorted "
                "by the field at each pose before the comparison; cost: normalised gradient fields (Haber and "
                "Modersitzki 2006); match measured by normalised mutual information (Studholme et al. 1999)")


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


def _record(result) -> AlignmentRecord:
    return AlignmentRecord(
        translation_mm=[float(v) for v in result.translation_mm], rotation_deg=[float(v) for v in result.rotation_deg],
        centre_mm=[float(v) for v in result.centre_mm], matrix=[[float(v) for v in row] for row in result.matrix],
        measure_before=float(result.measure_before), measure_after=float(result.measure_after),
        iterations=int(result.iterations), converged=bool(result.converged), coverage=float(result.coverage),
        warnings=list(result.warnings), method=ALIGN_METHOD)


def alignment(image: Image, reference: np.ndarray, readout: Readout, b0: Image, field_hz: np.ndarray,
              magnitude: np.ndarray | None, magnitude_path: Path | None, align: bool):
    """(matrix field-map world -> run world, how, AlignmentRecord or None, warnings) for one run."""
    if align and magnitude is None:
        return np.eye(4), "affines only: no field-map magnitude beside the B0 map (give one to align the map to " \
            "the run)", None, ["the field map was placed through the scanner coordinates only (no magnitude to align "
                               "it with); if the head moved between the scans the correction is off by that move"]
    if not align:
        return np.eye(4), "affines only (alignment turned off)", None, []
    try:
        result = align_fieldmap(magnitude, field_hz, b0.affine, reference, image.affine, readout, AlignOptions())
    except GeometryError as err:
        raise GeometryError(err.message, image.path) from None
    except FieldfixError as err:
        raise type(err)(err.message, magnitude_path) from None
    warnings = [f"alignment: {w}" for w in result.warnings]
    if result.measure_after > result.measure_before:
        return np.asarray(result.matrix, float), f"aligned to the run ({magnitude_path.name})", _record(result), warnings
    # the match did not improve: the scanner coordinates were already as good as it gets
    return np.eye(4), (f"affines only: aligning {magnitude_path.name} did not improve the match (normalised mutual "
                       f"information {result.measure_before:.3f} -> {result.measure_after:.3f})"), _record(result), \
        warnings


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
