"""Each summary's numbers and display arrays, computed once per report.

The jobs' own numbers are taken from their summaries (the statistics of a dropout map are
those the job computed inside the mask it used, and the page says which mask). What the
report adds is measured here from the images the summaries name: the field map's colour
limit and mask coverage, and for each run the edge agreements with the field-map anatomy
(over the mask and where voxels moved, :mod:`.agreement`) and the line profile through
its largest shift. The figures are drawn later from the arrays kept here, as often as the
page-size limit asks, without measuring again.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import ndimage

from ..outputs import (DropoutNumbers, FieldMapNumbers, PlanNumbers, PlanRow, ReportDropout, ReportFieldMap,
                       ReportPlan)
from ..records import fields_of
from .figures.panels import pick_slices, worst_slices
from .orientation import DisplayGrid
from .stats import mask_coverage, symmetric_limit
from .view import PLAN_FIXED

__all__ = ["FieldView", "DropoutView", "PlanView", "measure_field_map", "measure_dropout", "measure_plan",
           "read_volume", "mask_name"]

PLAN_TABLE_ROWS = 8



def read_volume(path: Path | None, shape=None, *, ndim=(3,)):
    """(Image, first volume as float64) of a NIfTI file, or None when `path` is None or the
    grid differs from `shape`. A damaged file is an InputError naming it."""
    from ..io import load_image

    if path is None:
        return None
    image = load_image(path, ndim=ndim, sidecar=False)
    data = np.asarray(image.volume(0, np.float64), np.float64)
    if shape is not None and data.shape != tuple(shape):
        return None
    return image, data


def mask_name(text: str) -> str:
    """The name of a mask as a summary states it (a file's name, or the job's own words)."""
    return Path(str(text)).name


@dataclass
class FieldView:
    """A field map ready for display (display order)."""

    grid: DisplayGrid
    field_hz: np.ndarray
    mask: np.ndarray | None
    slices: list
    limit_hz: float
    inside_hz: np.ndarray
    unaliased_hz: float | None


@dataclass
class DropoutView:
    """Predicted maps ready for display (display order), with the job's threshold."""

    grid: DisplayGrid
    maps: list  # (label, display array)
    mask: np.ndarray | None
    slices: list
    threshold: float


@dataclass
class PlanView:
    """A plan's sweep rows (for the trade-off figure) and its recommended row."""

    rows: list[PlanRow]
    recommended: PlanRow | None


def measure_field_map(found) -> tuple[ReportFieldMap, FieldView | None]:
    """The report's record of a field-map summary and its display arrays."""
    s = found.record
    notes: list[str] = []
    view, coverage = None, None
    b0 = read_volume(found.output(s.outputs.b0_hz))
    if b0 is None:
        notes.append(f"the B0 map {s.outputs.b0_hz} named by {found.name} is not in its folder; no figures")
    else:
        image, field_hz = b0
        mask_read = read_volume(found.output(s.outputs.mask), field_hz.shape)
        mask = mask_read[1] > 0.5 if mask_read is not None else None
        magnitude = read_volume(found.output(s.outputs.magnitude), field_hz.shape)
        inside = field_hz[mask] if mask is not None and mask.any() else field_hz[np.isfinite(field_hz)]
        if mask is not None and magnitude is not None:
            coverage = mask_coverage(mask, magnitude[1])
        grid = DisplayGrid.of(field_hz.shape, image.affine)
        shown = grid.show(field_hz)
        mask_shown = grid.show(mask) if mask is not None else None
        view = FieldView(grid, shown, mask_shown, pick_slices(mask_shown, 4, focus=shown, n_z=shown.shape[2]),
                         symmetric_limit(inside, 99.0), inside, s.unaliased_range_hz)
    record = ReportFieldMap(
        **fields_of(s, FieldMapNumbers), name=found.name, subject=found.subject,
        b0_hz=s.outputs.b0_hz if b0 is not None else None,
        phase_units=[f"{Path(p.path).name}: {p.units} ({p.how})" for p in s.phase_units],
        mask_coverage=coverage, display_limit_hz=view.limit_hz if view is not None else None, notes=notes)
    return record, view


def _dropout_maps(found, notes):
    s = found.record
    maps, affine = [], None
    for label, name in (("retention", s.outputs.retention), ("BOLD sensitivity", s.outputs.bold_sensitivity)):
        if name is None:
            continue
        read = read_volume(found.output(name), maps[0][1].shape if maps else None)
        if read is None:
            notes.append(f"the {label} map {name} named by {found.name} is not in its folder (or not on its grid)")
            continue
        affine = read[0].affine if affine is None else affine
        maps.append((label, read[1]))
    return maps, affine


def measure_dropout(found) -> tuple[ReportDropout, DropoutView | None]:
    """The report's record of a dropout summary (its own statistics and mask) and its maps."""
    s = found.record
    notes: list[str] = []
    maps, affine = _dropout_maps(found, notes)
    view = None
    if maps:
        grid = DisplayGrid.of(maps[0][1].shape, affine)
        nonzero = maps[0][1] != 0
        # The job writes zeros outside the mask it used: when the non-zero voxels are as many
        # as its statistics counted, they are that mask, and the figures show exactly it.
        mask = nonzero if int(nonzero.sum()) == s.retention.voxels else None
        if mask is None:
            notes.append("the figures show the whole grid: the map's non-zero voxels are not the job's mask")
        shown = [(label, grid.show(values)) for label, values in maps]
        mask_shown = grid.show(mask) if mask is not None else None
        lost = (shown[0][1] < s.parameters.threshold) & (mask_shown if mask_shown is not None else True)
        slices = worst_slices(lost, mask_shown, 4)
        view = DropoutView(grid, shown, mask_shown, slices, s.parameters.threshold)
    record = ReportDropout(**{**fields_of(s, DropoutNumbers), "mask": mask_name(s.mask)}, name=found.name,
                           subject=found.subject, notes=notes)
    return record, view


def measure_plan(found) -> tuple[ReportPlan, PlanView]:
    """The report's record of a plan (masks named, protocol held fixed, best rows) and its rows."""
    s = found.record
    top = [row.choice() for row in s.rows[:PLAN_TABLE_ROWS]] or [s.recommended]
    recommended = next((r for r in s.rows if r.protocol == s.recommended.protocol), None)
    record = ReportPlan(**{**fields_of(s, PlanNumbers), "roi": mask_name(s.roi), "brain_mask": mask_name(s.brain_mask)},
                        name=found.name, subject=found.subject,
                        fixed={k: s.parameters[k] for k in PLAN_FIXED if k in s.parameters}, top=top)
    return record, PlanView(list(s.rows), recommended)


def dilate(mask: np.ndarray, voxels: int) -> np.ndarray:
    """A mask grown by `voxels` (6-connected steps)."""
    return ndimage.binary_dilation(np.asarray(mask, bool), iterations=voxels) if voxels else np.asarray(mask, bool)
