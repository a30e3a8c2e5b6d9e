"""An unwarped run as the report sees it: the job's numbers, the edge agreements, the views.

Edge agreement (:func:`.agreement.edge_agreement` with ``along`` = the run's phase-encode
axis, from its summary) compares the EPI volume before and after correction with the
field-map magnitude resampled onto the EPI grid:

* over the statistics mask (the field map's mask on the EPI grid, else the corrected EPI
  above Otsu's threshold) dilated by two voxels, so that the head's outline counts;
* where voxels moved (:func:`.agreement.moved_region`: displaced by more than one voxel,
  with their paths), the region where a correction can show; this is the page's headline;
* per axial slice, to find slices that got worse.

The line profile runs along the phase-encode axis through the largest shift (|shift|
smoothed over one voxel), where a physicist looks first.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..geometry import resample_to_grid
from ..io import image_stem
from ..outputs import ReportRun, ShiftNumbers
from ..records import fields_of
from .agreement import edge_agreement, edge_agreement_by_slice, moved_region
from .figures.charts import Profile
from .figures.panels import pick_slices, reference_edges
from .measure import dilate, read_volume
from .orientation import DisplayGrid, direction_letters
from .sources import distorted_run
from .stats import finite_or_none, intensity_limits, jacobian_limit, otsu_mask, symmetric_limit

__all__ = ["RunView", "measure_run", "MOVED_THRESHOLD_VOX", "EDGE_DILATION_VOX", "MIN_REGION_VOXELS"]

MOVED_THRESHOLD_VOX = 1.0  # a voxel moved by more than this counts as moved (ours)
EDGE_DILATION_VOX = 2  # the statistics mask grown by this for the whole-mask agreement (ours)
MIN_REGION_VOXELS = 50  # fewer voxels than this: no regional agreement (ours)
SLICE_WORSE_TOLERANCE = 0.02  # per-slice drop that counts as worse (ours; slices are noisier)
SLICE_MIN_VOXELS = 20


@dataclass
class RunView:
    """A run ready for display (display order); None fields were not available."""

    grid: DisplayGrid
    after: np.ndarray
    before: np.ndarray | None
    edges: dict | None
    mask: np.ndarray
    shift_mm: np.ndarray | None
    jacobian: np.ndarray | None
    fold: np.ndarray | None
    slices: list
    line: tuple | None
    grey: tuple
    difference_limit: float | None
    shift_limit_mm: float | None
    jacobian_k: float | None
    profile: Profile | None
    towards: str


@dataclass
class _Arrays:
    affine: np.ndarray
    after: np.ndarray
    before: np.ndarray | None
    reference: np.ndarray | None
    mask: np.ndarray
    shift: np.ndarray | None
    jacobian: np.ndarray | None
    fold: np.ndarray | None


def _on_grid(found, name, shape, affine, order):
    read = read_volume(found.output(name)) if found is not None and name is not None else None
    if read is None:
        return None
    values, _ = resample_to_grid(read[1], read[0].affine, shape, affine, order=order, outside=0.0)
    return values


def _arrays(found, field_map, notes) -> tuple[_Arrays | None, str | None]:
    s = found.record
    read = read_volume(found.output(s.outputs.corrected), ndim=(3, 4))
    if read is None:
        notes.append(f"the corrected run {s.outputs.corrected} named by {found.name} is not in its folder")
        return None, None
    image, after = read
    shape, affine = after.shape, image.affine
    before = None
    distorted, note = distorted_run(found)
    if note:
        notes.append(note)
    elif distorted.shape[:3] != shape:
        notes.append("the input before correction is not shown: it is not on the corrected run's grid")
    else:
        before = np.asarray(distorted.volume(0, np.float64), np.float64)
    fm = field_map.record.outputs if field_map is not None else None
    reference = _on_grid(field_map, fm.magnitude if fm else None, shape, affine, 1)
    mask_values = _on_grid(field_map, fm.mask if fm else None, shape, affine, 0)
    region = "field-map mask resampled onto the EPI grid"
    mask = mask_values > 0.5 if mask_values is not None else None
    if mask is None or not mask.any():
        mask, region = otsu_mask(after), "corrected EPI above Otsu's threshold"
    pieces = {k: read_volume(found.output(getattr(s.outputs, k)), shape)
              for k in ("shift_vox", "jacobian", "fold_mask")}
    values = {k: (v[1] if v is not None else None) for k, v in pieces.items()}
    fold = values["fold_mask"] > 0.5 if values["fold_mask"] is not None else None
    return _Arrays(affine, after, before, reference, mask, values["shift_vox"], values["jacobian"], fold), region


@dataclass
class _Edges:
    """Edge agreements of a run (NGF, 0 to 1; None: not measured) and the slices that got worse."""

    before: float | None = None
    after: float | None = None
    moved_before: float | None = None
    moved_after: float | None = None
    moved_voxels: int | None = None
    slices_worse: tuple = ()


def _edges(a: _Arrays, pe_axis: int, slice_axis: int) -> _Edges:
    out = _Edges()
    if a.reference is None or np.ptp(a.reference) == 0:
        return out
    region = dilate(a.mask, EDGE_DILATION_VOX)

    def score(image, where):
        return finite_or_none(edge_agreement(image, a.reference, a.affine, where, along=pe_axis))

    out.after = score(a.after, region)
    if a.before is not None:
        out.before = score(a.before, region)
        by_slice = [edge_agreement_by_slice(v, a.reference, a.affine, region, axis=slice_axis, along=pe_axis)
                    for v in (a.before, a.after)]
        counts = region.sum(axis=tuple(x for x in range(3) if x != slice_axis))
        worse = (counts >= SLICE_MIN_VOXELS) & (by_slice[1] < by_slice[0] - SLICE_WORSE_TOLERANCE)
        out.slices_worse = tuple(int(k) for k in np.nonzero(worse)[0])
    if a.shift is not None:
        moved = moved_region(a.shift, pe_axis, a.mask, MOVED_THRESHOLD_VOX)
        out.moved_voxels = int(moved.sum())
        if moved.sum() >= MIN_REGION_VOXELS:
            out.moved_after = score(a.after, moved)
            if a.before is not None:
                out.moved_before = score(a.before, moved)
    return out


def _scaled(values: np.ndarray | None, mask: np.ndarray, line) -> np.ndarray | None:
    if values is None:
        return None
    top = float(np.percentile(values[mask], 99)) if mask.any() else 0.0
    return values[line] / top if top > 0 else values[line]


def _profile(a: _Arrays, pe_axis: int) -> tuple[Profile, tuple] | None:
    if a.shift is None or not a.mask.any():
        return None
    strength = np.where(a.mask, ndimage.gaussian_filter(np.abs(np.nan_to_num(a.shift)), 1.0), 0.0)
    point = np.unravel_index(int(np.argmax(strength)), strength.shape)
    line = tuple(slice(None) if axis == pe_axis else int(point[axis]) for axis in range(3))
    along = np.nonzero(dilate(a.mask, 3)[line])[0]
    low, high = (int(along.min()), int(along.max())) if along.size else (0, a.after.shape[pe_axis] - 1)
    line = tuple(slice(low, high + 1) if axis == pe_axis else int(point[axis]) for axis in range(3))
    column = a.affine[:3, pe_axis]
    step_mm = float(np.linalg.norm(column))
    positions = (np.arange(low, high + 1) - point[pe_axis]) * step_mm
    shift = float(a.shift[point])
    world = tuple(float(v) for v in (a.affine @ np.array([*point, 1.0]))[:3])
    profile = Profile(positions_mm=positions, after=_scaled(a.after, a.mask, line),
                      before=_scaled(a.before, a.mask, line), reference=_scaled(a.reference, a.mask, line),
                      shift_vox=shift, shift_mm=shift * step_mm, towards=direction_letters(column), point_mm=world)
    return profile, tuple(int(p) for p in point)


def _view(a: _Arrays, s, profile, point) -> RunView:
    grid = DisplayGrid.of(a.after.shape, a.affine)
    show = lambda v: grid.show(v) if v is not None else None  # noqa: E731
    mask = grid.show(a.mask)
    shift_mm = a.shift * s.pe_voxel_size_mm if a.shift is not None else None
    slices = pick_slices(mask, 3, focus=show(np.abs(a.shift)) if a.shift is not None else None,
                         n_z=mask.shape[2])
    line = None
    if point is not None:
        shown_point = grid.to_display_index(point)
        line = (grid.display_axis(s.pe_axis), shown_point)
        if shown_point[2] not in slices:
            slices[min(range(len(slices)), key=lambda n: abs(slices[n] - shown_point[2]))] = shown_point[2]
            slices = sorted(set(slices))
    edges = None
    if a.reference is not None:
        reference = grid.show(a.reference)
        edges = {k: reference_edges(reference, k) for k in slices}
    difference = a.after - a.before if a.before is not None else None
    return RunView(
        grid=grid, after=grid.show(a.after), before=show(a.before), edges=edges, mask=mask, shift_mm=show(shift_mm),
        jacobian=show(a.jacobian), fold=show(a.fold), slices=slices, line=line,
        grey=intensity_limits(*(v for v in (a.before, a.after) if v is not None), mask=a.mask),
        difference_limit=symmetric_limit(difference[a.mask], 99.0) if difference is not None else None,
        shift_limit_mm=symmetric_limit(shift_mm[a.mask], 99.5) if shift_mm is not None else None,
        jacobian_k=jacobian_limit(a.jacobian[a.mask]) if a.jacobian is not None else None,
        profile=profile, towards=direction_letters(a.affine[:3, s.pe_axis]))


def _record(found, field_map, s, edges: _Edges, region: str | None, slices_mm, point_mm, notes, before_view):
    stem = image_stem(s.run)  # the run's own name: the same in a job folder and in batch derivatives
    return ReportRun(
        **fields_of(s, ShiftNumbers), stem=stem, name=found.name, subject=found.subject,
        field_map=field_map.name if field_map is not None else None, before_view=before_view,
        edge_region=f"{region}, dilated by {EDGE_DILATION_VOX} voxels" if region and edges.after is not None
        else None,
        edge_agreement_before=edges.before, edge_agreement_after=edges.after,
        edge_agreement_shifted_before=edges.moved_before, edge_agreement_shifted_after=edges.moved_after,
        shifted_region_voxels=edges.moved_voxels, slices_worse_mm=slices_mm,
        profile_point_mm=list(point_mm) if point_mm is not None else None, job_warnings=list(s.warnings),
        notes=notes)


def measure_run(found, field_map=None) -> tuple[ReportRun, RunView | None]:
    """The report's record of an unwarping summary and its display arrays.

    `field_map` is the field-map summary the run was corrected with (:meth:`Sources.field_map_of`).
    """
    s = found.record
    notes: list[str] = []
    if field_map is None:
        notes.append("the B0 map this run was corrected with is not among the summaries read: no anatomy "
                     "reference, so no edge agreement")
    arrays, region = _arrays(found, field_map, notes)
    if arrays is None:
        return _record(found, field_map, s, _Edges(), None, [], None, notes, False), None
    grid = DisplayGrid.of(arrays.after.shape, arrays.affine)
    axial = next(axis for axis in range(3) if grid.display_axis(axis) == 2)
    edges = _edges(arrays, s.pe_axis, axial)
    slices_mm = []
    for index in edges.slices_worse:
        probe = [0, 0, 0]
        probe[axial] = index
        slices_mm.append(round(float(grid.slice_centre_mm(grid.to_display_index(probe)[2])[2]), 1))
    found_profile = _profile(arrays, s.pe_axis)
    profile, point = found_profile if found_profile is not None else (None, None)
    record = _record(found, field_map, s, edges, region, slices_mm, profile.point_mm if profile else None, notes,
                     arrays.before is not None)
    return record, _view(arrays, s, profile, point)
