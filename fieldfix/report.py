"""Quality reports: numbers, warnings, figures and one self-contained HTML page.

A report reads an output folder written by the fieldfix workflows (field map, unwarp,
dropout, plan; file names may carry a prefix) and writes three files beside each other:

``report.html``
    One page with everything inline (images as base64 ``data:`` URIs, CSS and a few lines
    of JavaScript for the before/after switch). It makes no network request: a
    Content-Security-Policy in the page forbids every source except inline ones.
``report_summary.png``
    A multi-panel figure for papers.
``report.json``
    Every number shown on the page, the warnings, and the workflow summaries read.

The page shows the numbers first, then the warnings, then the figures.

Edge agreement
--------------
"Does the corrected EPI line up with the anatomy?" is answered with a number:
the normalised gradient field (NGF) measure of Haber and Modersitzki (2006, "Intensity
gradient based registration and fusion of multi-modal images", MICCAI 2006, LNCS 4191,
and Methods Inf Med 2007;46:292-299). Each image's gradient is normalised,
``n = grad I / sqrt(|grad I|^2 + eps^2)``, and the agreement is the mean of
``(n_I . n_R)^2`` over the mask. Squaring makes the measure blind to contrast
inversion (EPI and field-map magnitude need not share contrast). Two choices are ours:
``eps`` is the median gradient magnitude of each image inside the mask (so the measure is
unchanged when either image is scaled), and the mean is divided by the geometric mean of
the two self-agreements, so that 1 means "every edge parallel" and 0 "every edge
perpendicular or absent". It is computed for the distorted run (before) and the corrected
run (after) against the field-map magnitude resampled onto the EPI grid.

This is research software, not a medical device.

Examples
--------
>>> import numpy as np
>>> i, j, k = np.meshgrid(*(np.arange(8.0),) * 3, indexing="ij")
>>> round(edge_agreement(i + j, 2 * (i + j), np.eye(4)), 6)
1.0
"""

from __future__ import annotations

import base64
import csv
import datetime as _dt
import html
import io as _stdio
import json
import math
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy import ndimage

from .errors import InputError, OutputError

__all__ = [
    "CAUTION",
    "edge_agreement",
    "edge_agreement_by_slice",
    "field_statistics",
    "shift_statistics",
    "retention_statistics",
    "collect_warnings",
    "symmetric_limit",
    "display_slices",
    "field_map_figure",
    "shift_figure",
    "jacobian_figure",
    "epi_outline_figure",
    "retention_figure",
    "summary_figure",
    "figure_png",
    "find_outputs",
    "build_report",
]

from .outputs import CAUTION  # noqa: E402  (one caution text everywhere)

# Thresholds behind the warnings (ours, documented on the page).
LOW_COVERAGE_FRACTION = 0.7  # mask / (magnitude above Otsu threshold)
EDGE_WORSE_TOLERANCE = 0.01  # absolute drop of the edge agreement that counts as worse
RETENTION_THRESHOLD = 0.5  # default "lost signal" threshold when dropout.json names none

# Colours of our own choosing.
_OUTLINE_COLOUR = "#ffb000"  # amber contour of the reference anatomy
_FOLD_COLOUR = "#19d27a"  # green overlay for folded voxels
_BACKGROUND = "#16161d"  # outside the mask in field/shift/Jacobian figures
_DIVERGING = "coolwarm"  # Moreland 2009 (ISVC): diverging, lightness symmetric about the centre
_SEQUENTIAL = "cividis"  # Nunez et al. 2018 (PLoS ONE): perceptually uniform, CVD friendly


# --------------------------------------------------------------------------------------
# Pure numbers
# --------------------------------------------------------------------------------------


def _normalised_gradients(image: np.ndarray, affine: np.ndarray, mask: np.ndarray) -> np.ndarray:
    from .geometry import world_gradient

    gradient = world_gradient(np.asarray(image, float), affine)
    magnitude = np.sqrt(np.sum(gradient**2, axis=-1))
    inside = magnitude[mask]
    inside = inside[inside > 0]
    if inside.size == 0:
        return np.zeros_like(gradient)
    eps = float(np.median(inside))
    return gradient / np.sqrt(magnitude**2 + eps**2)[..., None]


def _ngf_terms(image, reference, affine, mask):
    image = np.asarray(image, float)
    reference = np.asarray(reference, float)
    if image.shape != reference.shape or image.ndim != 3:
        raise InputError(f"edge agreement needs two 3D images of one shape, got {image.shape} and {reference.shape}")
    if mask is None:
        mask = np.ones(image.shape, bool)
    mask = np.asarray(mask, bool)
    if mask.shape != image.shape:
        raise InputError(f"mask shape {mask.shape} differs from image shape {image.shape}")
    # Work in the mask's bounding box padded by one voxel: central differences inside the
    # mask then see the same neighbours as on the whole grid, so the result is unchanged.
    box = tuple(slice(0, n) for n in image.shape)
    if mask.any() and not mask.all():
        hits = np.nonzero(mask)
        box = tuple(slice(max(int(h.min()) - 1, 0), min(int(h.max()) + 2, n)) for h, n in zip(hits, image.shape))
    image, reference, mask = image[box], reference[box], mask[box]
    n_i = _normalised_gradients(image, affine, mask)
    n_r = _normalised_gradients(reference, affine, mask)
    cross = np.sum(n_i * n_r, axis=-1) ** 2
    self_i = np.sum(n_i * n_i, axis=-1) ** 2
    self_r = np.sum(n_r * n_r, axis=-1) ** 2
    return cross, self_i, self_r, mask, box


def edge_agreement(image: np.ndarray, reference: np.ndarray, affine: np.ndarray, mask: np.ndarray | None = None) -> float:
    """Agreement of edge directions between two images on one grid (0 to 1).

    Normalised gradient fields (Haber and Modersitzki 2006, MICCAI, LNCS 4191), with the
    edge parameter set to each image's median gradient magnitude in the mask and the
    result divided by the geometric mean of the self-agreements (both choices ours):

    ``A = sum (n_I . n_R)^2 / sqrt(sum |n_I|^4 * sum |n_R|^4)`` over the mask.

    By the Cauchy-Schwarz inequality ``0 <= A <= 1``; ``A = 1`` when every gradient of
    one image is parallel to the other's with proportional strength. The measure is
    unchanged by scaling either image and by inverting its contrast.

    Parameters
    ----------
    image, reference : (X, Y, Z) arrays
        For example an EPI volume and the field-map magnitude resampled onto the EPI grid.
    affine : (4, 4) array
        Voxel-to-world affine of the shared grid (gradients are taken in millimetres).
    mask : (X, Y, Z) bool array, optional
        Where to measure; everywhere by default.

    Returns
    -------
    float
        NaN when neither image has any gradient in the mask.

    Examples
    --------
    >>> import numpy as np
    >>> i, j, k = np.meshgrid(*(np.arange(6.0),) * 3, indexing="ij")
    >>> round(edge_agreement(i, j, np.eye(4)), 6)  # perpendicular ramps
    0.0
    """
    cross, self_i, self_r, mask, _ = _ngf_terms(image, reference, affine, mask)
    denominator = math.sqrt(float(self_i[mask].sum()) * float(self_r[mask].sum()))
    if denominator == 0.0:
        return float("nan")
    return float(cross[mask].sum()) / denominator


def edge_agreement_by_slice(
    image: np.ndarray, reference: np.ndarray, affine: np.ndarray, mask: np.ndarray | None = None, *, axis: int = 2
) -> np.ndarray:
    """The :func:`edge_agreement` of each slice along voxel axis `axis` (NaN where empty).

    Gradients are taken in 3D once; only the sums are split by slice.

    Examples
    --------
    >>> import numpy as np
    >>> i, j, k = np.meshgrid(*(np.arange(5.0),) * 3, indexing="ij")
    >>> edge_agreement_by_slice(i + j, i + j, np.eye(4)).round(6).tolist()
    [1.0, 1.0, 1.0, 1.0, 1.0]
    """
    n_slices = np.shape(image)[axis]
    cross, self_i, self_r, mask, box = _ngf_terms(image, reference, affine, mask)
    other = tuple(a for a in range(3) if a != axis)
    c, si, sr = np.zeros(n_slices), np.zeros(n_slices), np.zeros(n_slices)
    c[box[axis]] = np.where(mask, cross, 0.0).sum(axis=other)
    si[box[axis]] = np.where(mask, self_i, 0.0).sum(axis=other)
    sr[box[axis]] = np.where(mask, self_r, 0.0).sum(axis=other)
    denominator = np.sqrt(si * sr)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(denominator > 0, c / np.where(denominator > 0, denominator, 1.0), np.nan)


def _finite_float(value) -> float | None:
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def field_statistics(
    field_hz: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    voxel_volume_mm3: float = 1.0,
    unaliased_hz: float | None = None,
) -> dict:
    """Range and percentiles of a B0 map in Hz inside a mask.

    Parameters
    ----------
    field_hz : (X, Y, Z) array
    mask : (X, Y, Z) bool array, optional
    voxel_volume_mm3 : float
        Used for the mask volume in millilitres (1 ml = 1000 mm^3).
    unaliased_hz : float, optional
        Half-width of the unaliased range, ``1 / (2 dTE)``; adds the count and
        percentage of mask voxels whose |field| exceeds it.

    Returns
    -------
    dict
        ``min_hz``, ``max_hz``, ``percentiles_hz`` (keys ``p1``, ``p5``, ``p25``,
        ``p50``, ``p75``, ``p95``, ``p99``), ``max_abs_hz``, ``mask_voxels``,
        ``mask_volume_ml`` and, with `unaliased_hz`, ``voxels_beyond_unaliased`` and
        ``percent_beyond_unaliased``.

    Examples
    --------
    >>> import numpy as np
    >>> s = field_statistics(np.linspace(-50, 50, 101).reshape(101, 1, 1))
    >>> s["min_hz"], s["max_hz"], s["percentiles_hz"]["p50"]
    (-50.0, 50.0, 0.0)
    """
    field_hz = np.asarray(field_hz, float)
    mask = np.isfinite(field_hz) if mask is None else (np.asarray(mask, bool) & np.isfinite(field_hz))
    values = field_hz[mask]
    out: dict[str, Any] = {
        "mask_voxels": int(values.size),
        "mask_volume_ml": float(values.size * voxel_volume_mm3 / 1000.0),
    }
    if values.size == 0:
        out.update(min_hz=None, max_hz=None, max_abs_hz=None, percentiles_hz={})
        return out
    levels = (1, 5, 25, 50, 75, 95, 99)
    pct = np.percentile(values, levels)
    out.update(
        min_hz=float(values.min()),
        max_hz=float(values.max()),
        max_abs_hz=float(np.abs(values).max()),
        percentiles_hz={f"p{p}": float(v) for p, v in zip(levels, pct)},
    )
    if unaliased_hz is not None:
        beyond = int(np.count_nonzero(np.abs(values) > unaliased_hz))
        out["voxels_beyond_unaliased"] = beyond
        out["percent_beyond_unaliased"] = 100.0 * beyond / values.size
    return out


def shift_statistics(
    shift_vox: np.ndarray,
    voxel_mm: float,
    mask: np.ndarray | None = None,
    *,
    fold_mask: np.ndarray | None = None,
) -> dict:
    """Size of the phase-encode shifts of one run inside a mask.

    Parameters
    ----------
    shift_vox : (X, Y, Z) array
        Shift along the phase-encode axis in voxels.
    voxel_mm : float
        Voxel size along the phase-encode axis in millimetres.
    mask : bool array, optional
    fold_mask : bool array, optional
        Voxels where the mapping folds; counted inside the mask and in total.

    Returns
    -------
    dict
        ``max_abs_shift_mm``, ``max_abs_shift_vox``, ``median_abs_shift_mm``,
        ``percent_over_one_voxel``, ``mask_voxels`` and, with `fold_mask`,
        ``folded_voxels`` (in the mask) and ``folded_voxels_total``.

    Examples
    --------
    >>> import numpy as np
    >>> s = shift_statistics(np.array([0.5, -2.0, 1.5, 0.0]).reshape(4, 1, 1), 2.5)
    >>> s["max_abs_shift_mm"], s["percent_over_one_voxel"]
    (5.0, 50.0)
    """
    shift_vox = np.asarray(shift_vox, float)
    mask = np.ones(shift_vox.shape, bool) if mask is None else np.asarray(mask, bool)
    mask = mask & np.isfinite(shift_vox)
    values = np.abs(shift_vox[mask])
    out: dict[str, Any] = {"mask_voxels": int(values.size)}
    if values.size:
        out.update(
            max_abs_shift_vox=float(values.max()),
            max_abs_shift_mm=float(values.max() * voxel_mm),
            median_abs_shift_mm=float(np.median(values) * voxel_mm),
            percent_over_one_voxel=float(100.0 * np.count_nonzero(values > 1.0) / values.size),
        )
    else:
        out.update(max_abs_shift_vox=None, max_abs_shift_mm=None, median_abs_shift_mm=None, percent_over_one_voxel=None)
    if fold_mask is not None:
        fold_mask = np.asarray(fold_mask) > 0
        out["folded_voxels"] = int(np.count_nonzero(fold_mask & mask))
        out["folded_voxels_total"] = int(np.count_nonzero(fold_mask))
    return out


def retention_statistics(retention: np.ndarray, mask: np.ndarray | None = None, *, threshold: float = RETENTION_THRESHOLD) -> dict:
    """Median retention and the percentage of mask voxels below `threshold`.

    Examples
    --------
    >>> import numpy as np
    >>> s = retention_statistics(np.array([1.0, 0.9, 0.2, 0.4]).reshape(4, 1, 1))
    >>> s["percent_below_threshold"], s["threshold"]
    (50.0, 0.5)
    """
    retention = np.asarray(retention, float)
    mask = np.isfinite(retention) if mask is None else (np.asarray(mask, bool) & np.isfinite(retention))
    values = retention[mask]
    if values.size == 0:
        return {"threshold": float(threshold), "mask_voxels": 0, "median": None, "p5": None, "percent_below_threshold": None}
    return {
        "threshold": float(threshold),
        "mask_voxels": int(values.size),
        "median": float(np.median(values)),
        "p5": float(np.percentile(values, 5)),
        "percent_below_threshold": float(100.0 * np.count_nonzero(values < threshold) / values.size),
    }


def mask_coverage(mask: np.ndarray, magnitude: np.ndarray) -> float | None:
    """Fraction of the bright part of a magnitude image that a mask covers (0 to 1).

    "Bright" is above Otsu's threshold (Otsu 1979, IEEE Trans Syst Man Cybern,
    via :func:`skimage.filters.threshold_otsu`); the rule is ours. None when the
    magnitude is constant.

    Examples
    --------
    >>> import numpy as np
    >>> magnitude = np.zeros((10, 1, 1)); magnitude[:6] = 100.0
    >>> mask = np.zeros((10, 1, 1), bool); mask[:3] = True
    >>> mask_coverage(mask, magnitude)
    0.5
    """
    from skimage.filters import threshold_otsu

    magnitude = np.asarray(magnitude, float)
    finite = magnitude[np.isfinite(magnitude)]
    if finite.size == 0 or finite.min() == finite.max():
        return None
    bright = magnitude > threshold_otsu(finite)
    n_bright = int(np.count_nonzero(bright))
    if n_bright == 0:
        return None
    return float(np.count_nonzero(bright & np.asarray(mask, bool)) / n_bright)


def collect_warnings(numbers: dict) -> list[dict]:
    """Turn the report numbers into warnings a reader should see before the figures.

    Rules (thresholds are ours): the field exceeds the unaliased range in any mask voxel;
    any run has folded voxels in the mask; the field-map mask covers less than
    ``LOW_COVERAGE_FRACTION`` of the bright magnitude; a run's edge agreement drops by more
    than ``EDGE_WORSE_TOLERANCE`` after correction, or stays no better while shifts exceed a
    voxel, or some slices get worse. The edge rules use the agreement in the shifted region
    (``edge_agreement_shifted_*``, where |shift| > 0.5 voxel) when it is given, since a
    local correction barely changes the whole-mask value.

    Parameters
    ----------
    numbers : dict
        The report dictionary (``field_map``, ``runs``, ``dropout`` sections).

    Returns
    -------
    list of dict
        Each with ``code`` (stable identifier), ``where`` and ``message``.

    Examples
    --------
    >>> collect_warnings({"runs": [{"stem": "bold", "folded_voxels": 3}]})[0]["code"]
    'folds'
    """
    warnings: list[dict] = []
    field_maps = list(numbers.get("field_maps") or [])
    if numbers.get("field_map"):
        field_maps.append(numbers["field_map"])
    for fmap in field_maps:
        warnings.extend(_field_map_warnings(fmap))
    for run in numbers.get("runs") or []:
        warnings.extend(_run_warnings(run))
    return warnings


def _field_map_warnings(fmap: dict) -> list[dict]:
    warnings: list[dict] = []
    where = fmap.get("name", "field map")
    beyond = fmap.get("voxels_beyond_unaliased")
    if beyond:
        warnings.append(
            {
                "code": "field_beyond_unaliased_range",
                "where": where,
                "message": (
                    f"{beyond} mask voxels ({fmap.get('percent_beyond_unaliased', 0.0):.2f}%) have |field| above "
                    f"{fmap.get('unaliased_range_hz'):.1f} Hz, the unaliased range of the echo pair; these values "
                    "depend on spatial unwrapping, so check the field map for 2\u03c0 jumps."
                ),
            }
        )
    coverage = fmap.get("mask_coverage")
    if coverage is not None and coverage < LOW_COVERAGE_FRACTION:
        warnings.append(
            {
                "code": "low_mask_coverage",
                "where": where,
                "message": (
                    f"The field-map mask covers only {100 * coverage:.0f}% of the bright part of the magnitude image "
                    f"(below {100 * LOW_COVERAGE_FRACTION:.0f}%); the field outside it is extrapolated."
                ),
            }
        )
    return warnings


def _run_warnings(run: dict) -> list[dict]:
    warnings: list[dict] = []
    stem = run.get("stem", "run")
    folds = run.get("folded_voxels")
    if folds:
        warnings.append(
            {
                "code": "folds",
                "where": stem,
                "message": (
                    f"{folds} voxels inside the mask fold (the Jacobian is at or below its floor); "
                    "their corrected intensities are unreliable."
                ),
            }
        )
    before, after = run.get("edge_agreement_before"), run.get("edge_agreement_after")
    region = "the mask"
    if run.get("edge_agreement_shifted_before") is not None and run.get("edge_agreement_shifted_after") is not None:
        before, after = run["edge_agreement_shifted_before"], run["edge_agreement_shifted_after"]
        region = "the shifted region"
    if before is not None and after is not None:
        if after < before - EDGE_WORSE_TOLERANCE:
            warnings.append(
                {
                    "code": "edges_worse",
                    "where": stem,
                    "message": (
                        f"Edge agreement with the reference in {region} fell from {before:.3f} to {after:.3f} after "
                        "correction: check the phase-encode direction, polarity and readout time."
                    ),
                }
            )
        elif after <= before + EDGE_WORSE_TOLERANCE and (run.get("percent_over_one_voxel") or 0.0) > 0.0:
            warnings.append(
                {
                    "code": "edges_unchanged",
                    "where": stem,
                    "message": (
                        f"Edge agreement in {region} barely changed ({before:.3f} before, {after:.3f} after) although "
                        f"{run['percent_over_one_voxel']:.1f}% of voxels moved by more than one voxel."
                    ),
                }
            )
    worse = run.get("slices_worse") or []
    if worse:
        shown = ", ".join(str(s) for s in worse[:12]) + (" ..." if len(worse) > 12 else "")
        warnings.append(
            {
                "code": "edges_disagree_slices",
                "where": stem,
                "message": f"Edges agree less after correction in {len(worse)} slice(s): {shown}.",
            }
        )
    return warnings


def symmetric_limit(values: np.ndarray, percentile: float = 99.5) -> float:
    """A colour limit L for a signed map so that the scale is ``[-L, L]``.

    L is the `percentile` of |values| (ignoring NaN) rounded up to 1, 2, 2.5 or 5 times a
    power of ten; never zero.

    Examples
    --------
    >>> symmetric_limit([-37.0, 12.0, 20.0], percentile=100)
    50.0
    """
    values = np.abs(np.asarray(values, float))
    values = values[np.isfinite(values)]
    top = float(np.percentile(values, percentile)) if values.size else 0.0
    if top <= 0:
        return 1.0
    power = 10.0 ** math.floor(math.log10(top))
    for step in (1.0, 2.0, 2.5, 5.0, 10.0):
        if step * power >= top * (1 - 1e-12):
            return float(step * power)
    return float(10 * power)  # pragma: no cover


# --------------------------------------------------------------------------------------
# Figures (matplotlib imported lazily; Figure objects, no pyplot state)
# --------------------------------------------------------------------------------------


def _display_orientation(data: np.ndarray, affine: np.ndarray):
    """Reorder (and flip) voxel axes to the closest RAS orientation for display."""
    import nibabel as nib

    ornt = nib.orientations.io_orientation(np.asarray(affine, float))
    transform = nib.orientations.ornt_transform(ornt, nib.orientations.axcodes2ornt("RAS"))
    data = np.asarray(data)
    out = nib.orientations.apply_orientation(data, transform) if data.ndim >= 3 else data
    zooms = np.sqrt((np.asarray(affine, float)[:3, :3] ** 2).sum(axis=0))
    order = np.argsort(transform[:, 0])  # source axis for each output axis
    return out, zooms[order]


def _pick_slices(volume_ras_mask: np.ndarray | None, n_slices: int, n_z: int) -> list[int]:
    if volume_ras_mask is not None and np.any(volume_ras_mask):
        z = np.nonzero(np.any(volume_ras_mask, axis=(0, 1)))[0]
        lo, hi = int(z.min()), int(z.max())
    else:
        lo, hi = 0, n_z - 1
    if hi - lo + 1 <= n_slices:
        return list(range(lo, hi + 1))
    positions = np.linspace(lo + 0.12 * (hi - lo), hi - 0.12 * (hi - lo), n_slices)
    return sorted(set(int(round(p)) for p in positions))


@dataclass
class _Panels:
    """Display-ready axial slices shared by the figures of one grid."""

    zooms: np.ndarray
    slices: list[int]

    @classmethod
    def for_grid(cls, shape, affine, mask=None, n_slices: int = 5, slices=None) -> "_Panels":
        probe = np.zeros(tuple(shape[:3]), bool) if mask is None else np.asarray(mask, bool)
        ras, zooms = _display_orientation(probe, affine)
        if slices is None:
            slices = _pick_slices(ras if mask is not None else None, n_slices, ras.shape[2])
        return cls(zooms=zooms, slices=list(slices))


def display_slices(volume_shape, affine, mask=None, *, n_slices: int = 5, focus=None) -> list[int]:
    """Axial display slices (RAS order) spread over the mask, one of them where |focus| peaks.

    Figures of one run share these so that the panels line up. `focus` (for example the
    shift map) makes sure the slice with the largest |focus| inside the mask is shown.

    Examples
    --------
    >>> import numpy as np
    >>> focus = np.zeros((4, 4, 20)); focus[1, 1, 2] = 9.0
    >>> 2 in display_slices(focus.shape, np.eye(4), focus=focus)
    True
    """
    probe = np.ones(tuple(volume_shape[:3]), bool) if mask is None else np.asarray(mask, bool)
    ras, _ = _display_orientation(probe, affine)
    slices = _pick_slices(ras, n_slices, ras.shape[2])
    if focus is not None:
        strength = np.abs(np.nan_to_num(_display_orientation(np.asarray(focus, float), affine)[0]))
        strength = np.where(ras, strength, 0.0).max(axis=(0, 1))
        if strength.max() > 0:
            peak = int(np.argmax(strength))
            if peak not in slices:
                nearest = min(range(len(slices)), key=lambda n: abs(slices[n] - peak))
                slices[nearest] = peak
        slices = sorted(set(slices))
    return slices


def _new_figure(n_columns: int, aspect: float, *, colourbar: bool = True, width_in: float = 1.9):
    from matplotlib.figure import Figure

    panel_h = width_in * aspect
    fig = Figure(figsize=(n_columns * width_in + (0.9 if colourbar else 0.1), panel_h + 0.45), dpi=100)
    fig.patch.set_facecolor("white")
    right = 1 - (0.9 / (n_columns * width_in + 0.9)) if colourbar else 0.99
    axes = fig.subplots(1, n_columns, squeeze=False)[0]
    fig.subplots_adjust(left=0.01, right=right - 0.01, top=0.88, bottom=0.02, wspace=0.03)
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
        for spine in ax.spines.values():
            spine.set_visible(False)
    return fig, axes


def _slice_row(
    volume: np.ndarray,
    affine: np.ndarray,
    *,
    panels: _Panels,
    cmap: str,
    vmin: float,
    vmax: float,
    label: str | None,
    title: str,
    mask: np.ndarray | None = None,
    overlay: np.ndarray | None = None,
    overlay_colour: str = _FOLD_COLOUR,
    outline: np.ndarray | None = None,
    outline_level: float | None = None,
):
    """One row of axial slices (RAS display, left of the picture = subject's left)."""
    import matplotlib

    ras, zooms = _display_orientation(np.asarray(volume, float), affine)
    mask_ras = _display_orientation(np.asarray(mask, bool), affine)[0] if mask is not None else None
    overlay_ras = _display_orientation(np.asarray(overlay) > 0, affine)[0] if overlay is not None else None
    outline_ras = _display_orientation(np.asarray(outline, float), affine)[0] if outline is not None else None
    aspect = (ras.shape[1] * zooms[1]) / max(ras.shape[0] * zooms[0], 1e-9)
    fig, axes = _new_figure(len(panels.slices), aspect, colourbar=label is not None)
    colour_map = matplotlib.colormaps[cmap].with_extremes(bad=_BACKGROUND)
    image = None
    for ax, k in zip(axes, panels.slices):
        k = min(max(k, 0), ras.shape[2] - 1)
        plane = ras[:, :, k].T.copy()
        if mask_ras is not None:
            plane[~mask_ras[:, :, k].T] = np.nan
        image = ax.imshow(
            plane, cmap=colour_map, vmin=vmin, vmax=vmax, origin="lower", interpolation="nearest",
            aspect=zooms[1] / zooms[0],
        )
        if overlay_ras is not None and overlay_ras[:, :, k].any():
            rgba = np.zeros(plane.shape + (4,))
            rgba[..., :3] = matplotlib.colors.to_rgb(overlay_colour)
            rgba[..., 3] = overlay_ras[:, :, k].T * 0.9
            ax.imshow(rgba, origin="lower", interpolation="nearest", aspect=zooms[1] / zooms[0])
        if outline_ras is not None and outline_level is not None:
            sheet = outline_ras[:, :, k].T
            if np.nanmin(sheet) < outline_level < np.nanmax(sheet):
                ax.contour(sheet, levels=[outline_level], colors=[_OUTLINE_COLOUR], linewidths=0.9)
        ax.text(0.02, 0.97, f"z={k}", color="white", fontsize=7, va="top", ha="left", transform=ax.transAxes,
                bbox={"facecolor": "black", "alpha": 0.45, "pad": 1, "linewidth": 0})
    axes[0].text(0.02, 0.03, "L", color="white", fontsize=7, transform=axes[0].transAxes)
    axes[-1].text(0.95, 0.03, "R", color="white", fontsize=7, transform=axes[-1].transAxes)
    fig.suptitle(title, fontsize=10, x=0.01, ha="left")
    if label is not None and image is not None:
        cax = fig.add_axes([1 - 0.75 / fig.get_figwidth(), 0.08, 0.18 / fig.get_figwidth(), 0.75])
        bar = fig.colorbar(image, cax=cax)
        bar.set_label(label, fontsize=8)
        bar.ax.tick_params(labelsize=7)
    return fig


def field_map_figure(
    field_hz: np.ndarray,
    affine: np.ndarray,
    mask: np.ndarray | None = None,
    *,
    limit_hz: float | None = None,
    n_slices: int = 5,
    slices: list[int] | None = None,
    title: str = "B0 field map",
):
    """Axial slices of a B0 map in Hz on a diverging colour map with symmetric limits.

    The colour map is 'coolwarm' (Moreland 2009, "Diverging color maps for scientific
    visualization", ISVC), whose CIELAB lightness is symmetric about zero; the limits are
    ``[-L, L]`` with ``L = symmetric_limit(field in mask, 99.9)`` unless `limit_hz` is given.
    Voxels outside `mask` are drawn in a dark neutral so that zero field is not confused
    with "no data".

    Returns
    -------
    matplotlib.figure.Figure
        The first image of each panel carries the colour limits (``get_clim()``).

    Examples
    --------
    >>> import numpy as np
    >>> fig = field_map_figure(np.linspace(-80, 40, 64).reshape(4, 4, 4), np.eye(4))
    >>> fig.axes[0].images[0].get_clim()
    (-100.0, 100.0)
    """
    field_hz = np.asarray(field_hz, float)
    inside = field_hz[np.asarray(mask, bool)] if mask is not None else field_hz
    limit = float(limit_hz) if limit_hz is not None else symmetric_limit(inside, 99.9)
    panels = _Panels.for_grid(field_hz.shape, affine, mask, n_slices, slices)
    return _slice_row(field_hz, affine, panels=panels, cmap=_DIVERGING, vmin=-limit, vmax=limit,
                      label="field (Hz)", title=title, mask=mask)


def shift_figure(shift_mm: np.ndarray, affine: np.ndarray, mask: np.ndarray | None = None, *, n_slices: int = 5,
                 slices: list[int] | None = None, title: str = "Shift along the phase-encode axis"):
    """Axial slices of the signed phase-encode shift in millimetres (symmetric limits).

    Examples
    --------
    >>> import numpy as np
    >>> fig = shift_figure(np.linspace(-3, 1, 64).reshape(4, 4, 4), np.eye(4))
    >>> fig.axes[0].images[0].get_clim()
    (-5.0, 5.0)
    """
    shift_mm = np.asarray(shift_mm, float)
    inside = shift_mm[np.asarray(mask, bool)] if mask is not None else shift_mm
    limit = symmetric_limit(inside, 99.9)
    panels = _Panels.for_grid(shift_mm.shape, affine, mask, n_slices, slices)
    return _slice_row(shift_mm, affine, panels=panels, cmap=_DIVERGING, vmin=-limit, vmax=limit,
                      label="shift (mm)", title=title, mask=mask)


def jacobian_figure(jacobian: np.ndarray, affine: np.ndarray, mask: np.ndarray | None = None, *,
                    fold_mask: np.ndarray | None = None, n_slices: int = 5, slices: list[int] | None = None, title: str = "Jacobian (intensity factor)"):
    """Axial slices of the Jacobian, centred on 1, with folded voxels overlaid in green.

    The limits are ``[1 - d, 1 + d]`` with ``d = symmetric_limit(jacobian - 1)``.

    Examples
    --------
    >>> import numpy as np
    >>> fig = jacobian_figure(np.linspace(0.6, 1.3, 64).reshape(4, 4, 4), np.eye(4))
    >>> [round(v, 6) for v in fig.axes[0].images[0].get_clim()]
    [0.5, 1.5]
    """
    jacobian = np.asarray(jacobian, float)
    inside = jacobian[np.asarray(mask, bool)] if mask is not None else jacobian
    half = symmetric_limit(inside - 1.0)
    panels = _Panels.for_grid(jacobian.shape, affine, mask, n_slices, slices)
    return _slice_row(jacobian, affine, panels=panels, cmap=_DIVERGING, vmin=1 - half, vmax=1 + half,
                      label="Jacobian", title=title, mask=mask, overlay=fold_mask)


def retention_figure(retention: np.ndarray, affine: np.ndarray, mask: np.ndarray | None = None, *,
                     label: str = "retention", n_slices: int = 5, slices: list[int] | None = None, title: str = "Predicted signal retention"):
    """Axial slices of a retention or BOLD-sensitivity map on a 0 to 1 sequential scale.

    Examples
    --------
    >>> import numpy as np
    >>> fig = retention_figure(np.full((4, 4, 4), 0.7), np.eye(4))
    >>> fig.axes[0].images[0].get_clim()
    (0.0, 1.0)
    """
    retention = np.asarray(retention, float)
    panels = _Panels.for_grid(retention.shape, affine, mask, n_slices, slices)
    return _slice_row(retention, affine, panels=panels, cmap=_SEQUENTIAL, vmin=0.0, vmax=1.0,
                      label=label, title=title, mask=mask)


def intensity_limits(*volumes: np.ndarray, mask: np.ndarray | None = None) -> tuple[float, float]:
    """Shared grey-scale limits (1st to 99.5th percentile of all volumes in the mask).

    Examples
    --------
    >>> import numpy as np
    >>> intensity_limits(np.arange(1000.0).reshape(10, 10, 10))
    (9.99, 994.005)
    """
    pooled = []
    for v in volumes:
        v = np.asarray(v, float)
        pooled.append(v[np.asarray(mask, bool)] if mask is not None else v.ravel())
    values = np.concatenate(pooled)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return 0.0, 1.0
    lo, hi = np.percentile(values, [1, 99.5])
    if hi <= lo:
        hi = lo + 1.0
    return float(lo), float(hi)


def outline_level(reference: np.ndarray) -> float | None:
    """Iso-level for the reference outline: Otsu's threshold of the reference (Otsu 1979).

    Examples
    --------
    >>> import numpy as np
    >>> r = np.zeros((4, 4, 4)); r[1:3] = 10.0
    >>> 0 < outline_level(r) < 10
    True
    """
    from skimage.filters import threshold_otsu

    reference = np.asarray(reference, float)
    finite = reference[np.isfinite(reference)]
    if finite.size == 0 or finite.min() == finite.max():
        return None
    return float(threshold_otsu(finite))


def epi_outline_figure(epi: np.ndarray, reference: np.ndarray, affine: np.ndarray, *, limits=None, panels_mask=None,
                       n_slices: int = 5, slices: list[int] | None = None, title: str = "EPI"):
    """Axial slices of an EPI volume in grey with the reference anatomy's outline on top.

    The outline is the Otsu iso-contour of `reference` (for example the field-map
    magnitude resampled onto the EPI grid), drawn in amber. Use the same `limits` and
    `panels_mask` for the before and after figures so they line up when switched.

    Examples
    --------
    >>> import numpy as np
    >>> r = np.zeros((6, 6, 6)); r[2:4, 2:4] = 1.0
    >>> fig = epi_outline_figure(r, r, np.eye(4), limits=(0.0, 1.0))
    >>> len(fig.axes[0].collections) > 0  # the outline is drawn
    True
    """
    epi = np.asarray(epi, float)
    lo, hi = limits if limits is not None else intensity_limits(epi)
    panels = _Panels.for_grid(epi.shape, affine, panels_mask, n_slices, slices)
    return _slice_row(epi, affine, panels=panels, cmap="gray", vmin=lo, vmax=hi, label=None, title=title,
                      outline=reference, outline_level=outline_level(reference))


def figure_png(fig, *, dpi: int = 100) -> bytes:
    """Render a matplotlib figure to PNG bytes (Agg, no pyplot)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(fig)
    buffer = _stdio.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, facecolor=fig.get_facecolor())
    return buffer.getvalue()


def summary_figure(panels: list[dict], *, title: str = ""):
    """A compact multi-panel figure for papers: one middle axial slice per map.

    Parameters
    ----------
    panels : list of dict
        Each with ``volume`` (3D array), ``affine``, ``label`` (panel title),
        ``cmap``, ``vmin``, ``vmax``, optional ``mask``, ``units`` (colour-bar label, or
        None for no bar), ``outline`` and ``outline_level``.

    Examples
    --------
    >>> import numpy as np
    >>> fig = summary_figure([{"volume": np.ones((4, 4, 4)), "affine": np.eye(4), "label": "a",
    ...                        "cmap": "gray", "vmin": 0, "vmax": 2, "units": None}])
    >>> len(fig.axes)
    1
    """
    import matplotlib
    from matplotlib.figure import Figure

    n = max(len(panels), 1)
    columns = min(n, 3)
    rows = math.ceil(n / columns)
    fig = Figure(figsize=(2.6 * columns, 2.75 * rows), dpi=100)
    fig.patch.set_facecolor("white")
    axes = fig.subplots(rows, columns, squeeze=False).ravel()
    for ax in axes:
        ax.set_xticks([])
        ax.set_yticks([])
        for spine in ax.spines.values():
            spine.set_visible(False)
    for ax in axes[len(panels):]:
        fig.delaxes(ax)
    for ax, spec in zip(axes, panels):
        ras, zooms = _display_orientation(np.asarray(spec["volume"], float), spec["affine"])
        mask = spec.get("mask")
        mask_ras = _display_orientation(np.asarray(mask, bool), spec["affine"])[0] if mask is not None else None
        k = spec.get("slice")
        if k is None:
            k = _pick_slices(mask_ras, 1, ras.shape[2])[0] if mask_ras is not None else ras.shape[2] // 2
            if mask_ras is not None and mask_ras.any():
                z = np.nonzero(np.any(mask_ras, axis=(0, 1)))[0]
                k = int((z.min() + z.max()) // 2)
        plane = ras[:, :, k].T.copy()
        if mask_ras is not None:
            plane[~mask_ras[:, :, k].T] = np.nan
        cmap = matplotlib.colormaps[spec["cmap"]].with_extremes(bad=_BACKGROUND)
        image = ax.imshow(plane, cmap=cmap, vmin=spec["vmin"], vmax=spec["vmax"], origin="lower",
                          interpolation="nearest", aspect=zooms[1] / zooms[0])
        if spec.get("outline") is not None and spec.get("outline_level") is not None:
            sheet = _display_orientation(np.asarray(spec["outline"], float), spec["affine"])[0][:, :, k].T
            if np.nanmin(sheet) < spec["outline_level"] < np.nanmax(sheet):
                ax.contour(sheet, levels=[spec["outline_level"]], colors=[_OUTLINE_COLOUR], linewidths=0.8)
        ax.set_title(spec["label"], fontsize=9)
        if spec.get("units"):
            bar = fig.colorbar(image, ax=ax, fraction=0.046, pad=0.02)
            bar.set_label(spec["units"], fontsize=7)
            bar.ax.tick_params(labelsize=6)
    if title:
        fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return fig


# --------------------------------------------------------------------------------------
# Finding the outputs of a folder
# --------------------------------------------------------------------------------------

_FIELD_SUFFIX = "b0_hz.nii.gz"
_RUN_SUFFIX = "_corrected.nii.gz"


@dataclass
class FieldMapFiles:
    """The files of one field-map output (``<prefix>b0_*``)."""

    prefix: str
    b0_hz: Path
    mask: Path | None = None
    magnitude: Path | None = None
    summary: Path | None = None

    @classmethod
    def beside(cls, b0_hz: Path) -> "FieldMapFiles":
        b0_hz = Path(b0_hz)
        name = b0_hz.name
        prefix = name[: -len(_FIELD_SUFFIX)] if name.endswith(_FIELD_SUFFIX) else None
        if prefix is None:  # a field map made elsewhere: no companions known
            return cls(prefix="", b0_hz=b0_hz)

        def find(suffix):
            candidate = b0_hz.with_name(prefix + suffix)
            return candidate if candidate.is_file() else None

        return cls(prefix=prefix, b0_hz=b0_hz, mask=find("b0_mask.nii.gz"), magnitude=find("b0_magnitude.nii.gz"),
                   summary=find("b0_summary.json"))


@dataclass
class RunFiles:
    """The files of one unwarped run (``<stem>_*``) and what its provenance names."""

    stem: str
    corrected: Path
    shift_vox: Path | None = None
    jacobian: Path | None = None
    fold_mask: Path | None = None
    displacement_mm: Path | None = None
    summary: Path | None = None
    distorted: Path | None = None
    field_map: FieldMapFiles | None = None


@dataclass
class DropoutFiles:
    prefix: str
    retention: Path | None = None
    bold_sensitivity: Path | None = None
    summary: Path | None = None
    field_map: FieldMapFiles | None = None


@dataclass
class PlanFiles:
    prefix: str
    csv: Path | None = None
    json: Path | None = None
    png: Path | None = None


@dataclass
class ReportSources:
    """Everything :func:`build_report` found in a folder."""

    folder: Path
    field_maps: list[FieldMapFiles] = field(default_factory=list)
    runs: list[RunFiles] = field(default_factory=list)
    dropout: list[DropoutFiles] = field(default_factory=list)
    plans: list[PlanFiles] = field(default_factory=list)

    def input_paths(self) -> list[Path]:
        paths: list[Path] = []
        for item in [*self.field_maps, *self.runs, *self.dropout, *self.plans]:
            for value in vars(item).values():
                if isinstance(value, Path):
                    paths.append(value)
        return paths

    @property
    def empty(self) -> bool:
        return not (self.field_maps or self.runs or self.dropout or self.plans)


def _provenance_inputs(image_path: Path) -> list[Path]:
    """Input paths recorded in the provenance sidecar beside an output image."""
    from .io import sidecar_path

    record_path = sidecar_path(image_path)
    if not record_path.is_file():
        return []
    try:
        record = json.loads(record_path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return []
    inputs = record.get("Inputs") if isinstance(record, dict) else None
    out = []
    for item in inputs or []:
        path = item.get("path") if isinstance(item, dict) else item
        if isinstance(path, str):
            out.append(Path(path))
    return out


def _summary_paths(summary_path: Path | None) -> dict[str, Path]:
    """Existing files the unwarp summary names: the distorted ``run``, ``b0_map``, ``b0_mask``."""
    if summary_path is None:
        return {}
    try:
        summary = json.loads(summary_path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    out = {}
    for key in ("run", "b0_map", "b0_mask"):
        value = summary.get(key) if isinstance(summary, dict) else None
        if isinstance(value, str) and Path(value).is_file():
            out[key] = Path(value)
    return out


def _nifti_stem(path: Path) -> str:
    from .io import image_stem

    return image_stem(path)


def _match_field_map(found: list[FieldMapFiles], provenance: list[Path], prefix: str) -> FieldMapFiles | None:
    for path in provenance:
        if path.name.endswith(_FIELD_SUFFIX) and path.is_file():
            for fmap in found:
                if fmap.b0_hz.resolve() == path.resolve():
                    return fmap
            return FieldMapFiles.beside(path)
    same_prefix = [f for f in found if prefix.startswith(f.prefix) and f.prefix]
    if same_prefix:
        return max(same_prefix, key=lambda f: len(f.prefix))
    return found[0] if len(found) == 1 else None


def find_outputs(folder: str | os.PathLike) -> ReportSources:
    """Find fieldfix outputs in a folder (not its subfolders).

    Recognised: ``<prefix>b0_hz.nii.gz`` with its mask, magnitude and
    ``b0_summary.json``; ``<stem>_corrected.nii.gz`` with ``_shift_vox``, ``_jacobian``,
    ``_fold_mask``, ``_displacement_mm`` and ``_unwarp.json`` (the distorted run and the
    field map are taken from the provenance sidecar of the corrected image);
    ``<prefix>retention.nii.gz``, ``bold_sensitivity.nii.gz``, ``dropout.json``;
    ``<prefix>plan.csv``, ``plan.json``, ``plan.png``.

    Raises
    ------
    InputError
        When the folder does not exist.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError("report folder not found (or not a folder)", folder)
    names = sorted(p.name for p in folder.iterdir() if p.is_file() and not p.name.startswith("."))
    sources = ReportSources(folder=folder)
    for name in names:
        if name.endswith(_FIELD_SUFFIX):
            sources.field_maps.append(FieldMapFiles.beside(folder / name))
    for name in names:
        if name.endswith(_RUN_SUFFIX):
            stem = name[: -len(_RUN_SUFFIX)]

            def find(suffix, stem=stem):
                candidate = folder / (stem + suffix)
                return candidate if candidate.is_file() else None

            corrected = folder / name
            summary_path = find("_unwarp.json")
            named = _summary_paths(summary_path)
            provenance = _provenance_inputs(corrected)
            distorted = named.get("run")
            if distorted is None:
                distorted = next((p for p in provenance if _nifti_stem(p) == stem and p.is_file()), None)
            if distorted is None:  # a run whose file name differs from the stem: an input that is no field map
                distorted = next((p for p in provenance if "b0_" not in p.name and p.is_file()
                                  and p.name.endswith((".nii", ".nii.gz"))), None)
            field_map = _match_field_map(sources.field_maps, [named["b0_map"]] if "b0_map" in named else provenance,
                                         stem)
            if field_map is None and "b0_map" in named:
                field_map = FieldMapFiles.beside(named["b0_map"])
            if field_map is not None and field_map.mask is None and "b0_mask" in named:
                field_map.mask = named["b0_mask"]
            sources.runs.append(RunFiles(
                stem=stem, corrected=corrected, shift_vox=find("_shift_vox.nii.gz"), jacobian=find("_jacobian.nii.gz"),
                fold_mask=find("_fold_mask.nii.gz"), displacement_mm=find("_displacement_mm.nii.gz"),
                summary=summary_path, distorted=distorted, field_map=field_map,
            ))
            if field_map is not None and all(f.b0_hz.resolve() != field_map.b0_hz.resolve()
                                             for f in sources.field_maps):
                sources.field_maps.append(field_map)  # a B0 map kept in another folder
    prefixes = {n[: -len("retention.nii.gz")] for n in names if n.endswith("retention.nii.gz")}
    prefixes |= {n[: -len("dropout.json")] for n in names if n.endswith("dropout.json")}
    for prefix in sorted(prefixes):
        def find(suffix, prefix=prefix):
            candidate = folder / (prefix + suffix)
            return candidate if candidate.is_file() else None

        retention = find("retention.nii.gz")
        provenance = _provenance_inputs(retention) if retention else []
        sources.dropout.append(DropoutFiles(
            prefix=prefix, retention=retention, bold_sensitivity=find("bold_sensitivity.nii.gz"),
            summary=find("dropout.json"), field_map=_match_field_map(sources.field_maps, provenance, prefix),
        ))
    plan_prefixes = {n[: -len(s)] for n in names for s in ("plan.csv", "plan.json", "plan.png") if n.endswith(s)}
    for prefix in sorted(plan_prefixes):
        def find(suffix, prefix=prefix):
            candidate = folder / (prefix + suffix)
            return candidate if candidate.is_file() else None

        sources.plans.append(PlanFiles(prefix=prefix, csv=find("plan.csv"), json=find("plan.json"), png=find("plan.png")))
    return sources


# --------------------------------------------------------------------------------------
# Reading the outputs into numbers and figures
# --------------------------------------------------------------------------------------

_SLICE_WORSE_TOLERANCE = 0.02  # per-slice drop that counts as worse (ours; slices are noisier)
_SLICE_MIN_VOXELS = 20
SHIFTED_REGION_VOX = 0.5  # |shift| above which a voxel counts as moved by the correction (ours)
_SHIFTED_REGION_MIN_VOXELS = 50
_MAX_RUN_FIGURES = 8  # runs beyond this get numbers only, keeping the page small


def _read_json_quiet(path: Path | None) -> dict:
    if path is None:
        return {}
    from .io import read_json

    return read_json(path)


def _walk(obj, prefix=""):
    if isinstance(obj, dict):
        for key, value in obj.items():
            name = f"{prefix}.{key}" if prefix else str(key)
            yield name, key, value
            yield from _walk(value, name)


def _find_value(obj: dict, pattern: str):
    """First value whose key matches `pattern` (regex, case-insensitive), depth first."""
    regex = re.compile(pattern, re.IGNORECASE)
    for _, key, value in _walk(obj):
        if regex.search(str(key)):
            return value
    return None


def _as_half_width(value) -> float | None:
    """A half-width from a number or a [low, high] pair."""
    if isinstance(value, dict):
        numbers = [v for v in value.values() if isinstance(v, (int, float))]
        value = numbers if numbers else None
    if isinstance(value, (list, tuple)) and value and all(isinstance(v, (int, float)) for v in value):
        return float(max(abs(v) for v in value))
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return abs(float(value))
    return None


def _volume(path: Path, *, which: int = 0):
    from .io import load_image

    image = load_image(path)
    data = image.volume(which) if image.ndim >= 4 else image.get_fdata()
    return image, np.asarray(data, np.float64)


def _on_grid(path: Path | None, shape, affine, *, order: int) -> np.ndarray | None:
    """An image resampled onto a grid through the affines (zero outside its field of view)."""
    if path is None:
        return None
    from .geometry import resample_to_grid

    image, data = _volume(path)
    if data.ndim != 3:
        return None
    values, _ = resample_to_grid(data, image.affine, shape, affine, order=order, outside=0.0)
    return values


def _otsu_mask(volume: np.ndarray) -> np.ndarray:
    level = outline_level(volume)
    if level is None:
        return np.ones(volume.shape, bool)
    mask = ndimage.binary_fill_holes(ndimage.binary_closing(volume > level, iterations=2))
    return mask


def _timing_entries(summary: dict) -> dict:
    regex = re.compile(r"readout|echo_spacing|phase_enc|pe_code|pe_direction|n_pe|interp|jacobian_floor", re.I)
    out = {}
    for name, key, value in _walk(summary):
        if regex.search(str(key)) and not isinstance(value, (dict, list)) and str(key) not in out:
            out[str(key).replace(".", "_")] = value
    return out


def _pe_voxel_mm(summary: dict, shift_vox: np.ndarray, displacement: np.ndarray | None, affine) -> float:
    from .geometry import parse_pe_code, voxel_sizes_mm

    size = _find_value(summary, r"pe_voxel_size_mm")
    if isinstance(size, (int, float)) and size > 0:
        return float(size)
    if displacement is not None:
        norm = np.sqrt(np.sum(displacement**2, axis=-1))
        moving = np.abs(shift_vox) > 1e-6
        if moving.any():
            return float(np.median(norm[moving] / np.abs(shift_vox[moving])))
    code = _find_value(summary, r"phase_encoding|pe_code")
    try:
        axis, _ = parse_pe_code(str(code))
    except Exception:
        axis = 1  # common practice for axial EPI (anterior-posterior phase encoding), no source
    return float(voxel_sizes_mm(affine)[axis])


@dataclass
class _Section:
    """Figures of one part of the report."""

    title: str
    figures: list = field(default_factory=list)  # dicts: id, caption, png or before/after


def _phase_units_text(value) -> str | None:
    """A short text for the detected phase units, whatever shape the summary gives them."""
    if value is None or value == [] or value == {}:
        return None
    if isinstance(value, str):
        return value
    if isinstance(value, dict):
        found = _find_value(value, r"detected|^units?$|name")
        return str(found) if found is not None else json.dumps(value, sort_keys=True)
    if isinstance(value, list):
        return ", ".join(filter(None, (_phase_units_text(v) for v in value))) or None
    return str(value)


def _field_map_part(fmap: FieldMapFiles, index: int, dpi: int):
    image, field_hz = _volume(fmap.b0_hz)
    mask = (_volume(fmap.mask)[1] > 0) if fmap.mask else None
    if mask is not None and mask.shape != field_hz.shape:
        mask = None
    magnitude = _volume(fmap.magnitude)[1] if fmap.magnitude else None
    summary = _read_json_quiet(fmap.summary)
    unaliased = _as_half_width(_find_value(summary, r"^unaliased_range(_hz)?$"))
    if unaliased is None:
        unaliased = _as_half_width(_find_value(summary, r"^unaliased"))
    echo_times = _find_value(summary, r"echo_times?(_s)?$")
    voxel_volume = float(np.prod(np.sqrt((image.affine[:3, :3] ** 2).sum(axis=0))))
    numbers = {
        "name": fmap.prefix + "b0_hz",
        "file": str(fmap.b0_hz),
        "mask_source": "b0_mask" if mask is not None else "none (whole grid)",
        **field_statistics(field_hz, mask, voxel_volume_mm3=voxel_volume, unaliased_hz=unaliased),
        "unaliased_range_hz": unaliased,
        "echo_times_s": echo_times,
        "phase_units": _phase_units_text(_find_value(summary, r"phase_units?")),
        "voxels_offset_changed": _find_value(summary, r"offset_changed"),
        "mask_coverage": (mask_coverage(mask, magnitude) if mask is not None and magnitude is not None
                          and magnitude.shape == mask.shape else None),
    }
    section = _Section(title=f"Field map {fmap.prefix + 'b0_hz'}")
    fig = field_map_figure(field_hz, image.affine, mask,
                           slices=display_slices(field_hz.shape, image.affine, mask, focus=field_hz))
    limit = fig.axes[0].images[0].get_clim()[1]
    numbers["figure_limit_hz"] = float(limit)
    section.figures.append({"id": f"field{index}", "png": figure_png(fig, dpi=dpi),
                            "caption": f"B0 field map in Hz inside the mask, colour scale \u00b1{limit:g} Hz "
                                       "(dark: outside the mask)."})
    arrays = {"field_hz": field_hz, "mask": mask, "affine": image.affine, "limit": limit, "magnitude": magnitude}
    return numbers, section, arrays


def _run_part(run: RunFiles, index: int, dpi: int, with_figures: bool):
    image, after = _volume(run.corrected)
    shape, affine = after.shape, image.affine
    summary = _read_json_quiet(run.summary)
    fmap = run.field_map
    mask = None
    mask_source = "none"
    if fmap is not None and fmap.mask is not None:
        resampled = _on_grid(fmap.mask, shape, affine, order=0)  # nearest, as the unwarp workflow does
        mask = resampled > 0.5
        mask_source = "b0_mask resampled onto the EPI grid"
    if mask is None or not mask.any():
        mask = _otsu_mask(after)
        mask_source = "corrected EPI above Otsu's threshold"
    reference = _on_grid(fmap.magnitude, shape, affine, order=1) if fmap is not None else None
    before = _volume(run.distorted)[1] if run.distorted is not None else None
    if before is not None and before.shape != shape:
        before = None
    shift_vox = _volume(run.shift_vox)[1] if run.shift_vox else None
    displacement = None
    if run.displacement_mm is not None:
        from .io import load_image

        raw = np.asarray(load_image(run.displacement_mm).get_fdata(), float)
        displacement = raw.reshape(shape + (-1,)) if raw.size == np.prod(shape) * 3 else None
    fold = (_volume(run.fold_mask)[1] > 0) if run.fold_mask else None
    jacobian = _volume(run.jacobian)[1] if run.jacobian else None

    numbers: dict[str, Any] = {"stem": run.stem, "corrected": str(run.corrected),
                               "distorted": str(run.distorted) if run.distorted else None,
                               "field_map": fmap.prefix + "b0_hz" if fmap else None, "mask_source": mask_source,
                               "timing": _timing_entries(summary)}
    if shift_vox is not None and shift_vox.shape == shape:
        voxel_mm = _pe_voxel_mm(summary, shift_vox, displacement, affine)
        numbers["pe_voxel_size_mm"] = voxel_mm
        numbers.update(shift_statistics(shift_vox, voxel_mm, mask, fold_mask=fold))
    elif fold is not None:
        numbers["folded_voxels"] = int(np.count_nonzero(fold & mask))
    numbers["edge_agreement_before"] = None
    numbers["edge_agreement_after"] = None
    numbers["edge_agreement_shifted_before"] = None
    numbers["edge_agreement_shifted_after"] = None
    numbers["slices_worse"] = []
    region = ndimage.binary_dilation(mask, iterations=2)
    if reference is not None and np.ptp(reference) > 0:
        numbers["edge_agreement_after"] = _finite_float(edge_agreement(after, reference, affine, region))
        if before is not None:
            numbers["edge_agreement_before"] = _finite_float(edge_agreement(before, reference, affine, region))
            per_before = edge_agreement_by_slice(before, reference, affine, region)
            per_after = edge_agreement_by_slice(after, reference, affine, region)
            counts = region.sum(axis=(0, 1))
            worse = (counts >= _SLICE_MIN_VOXELS) & (per_after < per_before - _SLICE_WORSE_TOLERANCE)
            numbers["slices_worse"] = [int(k) for k in np.nonzero(worse)[0]]
            numbers["edge_agreement_before_by_slice"] = [_finite_float(v) for v in per_before]
            numbers["edge_agreement_after_by_slice"] = [_finite_float(v) for v in per_after]
        # Where the correction moved something: the measure over the whole mask dilutes a
        # local fix (most voxels barely move), so it is also given where |shift| > 0.5 voxel.
        if shift_vox is not None and shift_vox.shape == shape:
            moved = ndimage.binary_dilation(mask & (np.abs(shift_vox) > SHIFTED_REGION_VOX), iterations=2) & region
            numbers["shifted_region_voxels"] = int(moved.sum())
            if moved.sum() >= _SHIFTED_REGION_MIN_VOXELS:
                numbers["edge_agreement_shifted_after"] = _finite_float(edge_agreement(after, reference, affine, moved))
                if before is not None:
                    numbers["edge_agreement_shifted_before"] = _finite_float(
                        edge_agreement(before, reference, affine, moved))

    section = _Section(title=f"Run {run.stem}")
    arrays = {"after": after, "before": before, "reference": reference, "affine": affine, "mask": mask,
              "shift_mm": None}
    if shift_vox is not None and shift_vox.shape == shape:
        sign = np.sign(shift_vox)
        arrays["shift_mm"] = shift_vox * numbers["pe_voxel_size_mm"] if displacement is None else \
            sign * np.sqrt(np.sum(displacement**2, axis=-1))
    if not with_figures:
        return numbers, section, arrays
    limits = intensity_limits(*(v for v in (before, after) if v is not None), mask=mask)
    arrays["limits"] = limits
    slices = display_slices(shape, affine, mask, focus=shift_vox if shift_vox is not None and
                            shift_vox.shape == shape else None)
    outline_note = ("amber outline: field-map magnitude (Otsu level)" if reference is not None
                    else "no reference anatomy found")
    after_png = figure_png(epi_outline_figure(after, reference, affine, limits=limits, slices=slices,
                                              title=f"{run.stem}: after correction"), dpi=dpi)
    if before is not None:
        before_png = figure_png(epi_outline_figure(before, reference, affine, limits=limits, slices=slices,
                                                   title=f"{run.stem}: before correction"), dpi=dpi)
        section.figures.append({"id": f"run{index}-compare", "before": before_png, "after": after_png,
                                "caption": f"EPI volume 0 before and after correction, same grey scale; {outline_note}. "
                                           "Switch with the buttons or by clicking the image."})
    else:
        section.figures.append({"id": f"run{index}-after", "png": after_png,
                                "caption": f"Corrected EPI volume 0; {outline_note} (the distorted input was not found)."})
    if arrays["shift_mm"] is not None:
        section.figures.append({"id": f"run{index}-shift", "png": figure_png(shift_figure(arrays["shift_mm"], affine, mask, slices=slices),
                                                                             dpi=dpi),
                                "caption": "Signed shift along the phase-encode axis in mm, inside the mask."})
    if jacobian is not None and jacobian.shape == shape:
        section.figures.append({"id": f"run{index}-jacobian",
                                "png": figure_png(jacobian_figure(jacobian, affine, mask, fold_mask=fold, slices=slices),
                                                  dpi=dpi),
                                "caption": "Jacobian intensity factor (1 = no change); green: folded voxels."})
    return numbers, section, arrays


def _dropout_part(drop: DropoutFiles, index: int, dpi: int):
    summary = _read_json_quiet(drop.summary)
    threshold = _find_value(summary, r"threshold")
    threshold = float(threshold) if isinstance(threshold, (int, float)) else RETENTION_THRESHOLD
    label_name = drop.prefix.rstrip("_-") or "dropout"
    numbers: dict[str, Any] = {"name": label_name, "threshold": threshold}
    section = _Section(title=f"Predicted dropout {drop.prefix.rstrip('_-')}".strip())
    arrays: dict[str, Any] = {}
    for key, path, label in (("retention", drop.retention, "retention"),
                             ("bold_sensitivity", drop.bold_sensitivity, "BOLD sensitivity")):
        if path is None:
            numbers[key] = None
            continue
        image, values = _volume(path)
        # The statistics use the mask the prediction was made for (the dropout job's own mask,
        # outside which its maps are zero), else the field map's mask.
        mask, mask_source = None, "whole grid"
        own_mask = summary.get("mask") if isinstance(summary.get("mask"), str) else None
        if own_mask and Path(own_mask).is_file():
            mask, mask_source = _on_grid(Path(own_mask), values.shape, image.affine, order=1) > 0.5, "dropout mask"
        elif drop.field_map is not None and drop.field_map.mask is not None:
            mask, mask_source = _on_grid(drop.field_map.mask, values.shape, image.affine, order=1) > 0.5, "b0_mask"
        numbers[key] = retention_statistics(values, mask, threshold=threshold)
        numbers[key]["mask_source"] = mask_source
        arrays[key] = (values, image.affine, mask)
        section.figures.append({"id": f"dropout{index}-{key}",
                                "png": figure_png(retention_figure(values, image.affine, mask, label=label,
                                                                   slices=display_slices(values.shape, image.affine, mask,
                                                                                         focus=1.0 - values),
                                                                   title=f"Predicted {label}"), dpi=dpi),
                                "caption": f"Predicted {label} (1 = no loss) inside the mask."})
    return numbers, section, arrays


def _plan_part(plan: PlanFiles, index: int):
    summary = _read_json_quiet(plan.json)
    recommended = _find_value(summary, r"^recommend")
    reason = _find_value(summary, r"reason")
    rows: list[list[str]] = []
    header: list[str] = []
    if plan.csv is not None:
        with open(plan.csv, newline="", encoding="utf-8") as handle:
            table = list(csv.reader(handle))
        if table:
            header, rows = table[0][:10], [r[:10] for r in table[1:9]]
    numbers = {"name": plan.prefix.rstrip("_-") or "plan", "recommended": recommended, "reason": reason,
               "protocols": (len(_find_value(summary, r"^(rows|protocols|ranking|table)$") or [])
                             if isinstance(_find_value(summary, r"^(rows|protocols|ranking|table)$"), list) else None)}
    section = _Section(title=f"Protocol plan {plan.prefix}".strip())
    if plan.png is not None:
        section.figures.append({"id": f"plan{index}", "png": plan.png.read_bytes(),
                                "caption": "Trade-offs of the candidate protocols (from the planner)."})
    return numbers, section, {"header": header, "rows": rows}


# --------------------------------------------------------------------------------------
# The page
# --------------------------------------------------------------------------------------

_CSS = """
:root{--ink:#1d2430;--muted:#5b6472;--paper:#fbfaf7;--card:#ffffff;--line:#e3dfd6;--accent:#0f6e6e;
--warn:#9a4b00;--warnbg:#fff4e5;--okbg:#eaf6ef;}
*{box-sizing:border-box}
[hidden]{display:none !important}
body{margin:0;background:var(--paper);color:var(--ink);font:15px/1.45 system-ui,-apple-system,"Segoe UI",
Roboto,"Helvetica Neue",Arial,sans-serif}
header.top{background:var(--accent);color:#fff;padding:18px 28px 14px}
header.top h1{margin:0 0 4px;font-size:22px;font-weight:650;letter-spacing:.2px}
header.top p{margin:0;font-size:13px;opacity:.9}
main{max-width:1180px;margin:0 auto;padding:18px 24px 40px}
.caution{border-left:5px solid var(--warn);background:var(--warnbg);padding:10px 14px;margin:0 0 18px;
border-radius:4px;font-weight:550}
h2{font-size:18px;margin:26px 0 10px;border-bottom:2px solid var(--line);padding-bottom:4px}
h3{font-size:15px;margin:16px 0 6px;color:var(--accent)}
.cards{display:grid;grid-template-columns:repeat(auto-fill,minmax(330px,1fr));gap:14px}
.card{background:var(--card);border:1px solid var(--line);border-radius:8px;padding:10px 14px}
table.numbers{border-collapse:collapse;width:100%;font-size:14px}
table.numbers td{padding:3px 4px;border-bottom:1px dotted var(--line);vertical-align:top}
table.numbers td.value{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap;font-weight:600}
table.numbers td.value.text{white-space:normal;text-align:left;font-weight:500}
figure#summary img{max-width:780px}
table.numbers td.unit{color:var(--muted);width:3.5em}
ul.warnings{list-style:none;padding:0;margin:0}
ul.warnings li{background:var(--warnbg);border:1px solid #f0d2a8;border-radius:6px;padding:8px 12px;margin:0 0 8px}
ul.warnings li b{color:var(--warn)}
p.allclear{background:var(--okbg);border:1px solid #bfe3cc;border-radius:6px;padding:8px 12px}
figure{margin:10px 0 22px;background:var(--card);border:1px solid var(--line);border-radius:8px;padding:10px}
figure img{display:block;max-width:100%;height:auto;margin:0 auto}
figcaption{font-size:13px;color:var(--muted);margin-top:6px}
.switch{display:inline-flex;border:1px solid var(--accent);border-radius:6px;overflow:hidden;margin-bottom:8px}
.switch button{font:inherit;font-size:13px;border:0;background:#fff;color:var(--accent);padding:5px 14px;cursor:pointer}
.switch button[aria-pressed="true"]{background:var(--accent);color:#fff}
.stage{cursor:pointer}
table.plan{border-collapse:collapse;font-size:12.5px;margin:6px 0 12px;overflow-x:auto;display:block}
table.plan th,table.plan td{border:1px solid var(--line);padding:2px 6px;text-align:right}
table.plan th{background:#f1eee7}
footer{font-size:12.5px;color:var(--muted);border-top:1px solid var(--line);margin-top:30px;padding-top:10px}
"""

_SCRIPT = """
(function () {
  var boxes = document.querySelectorAll('.compare');
  Array.prototype.forEach.call(boxes, function (box) {
    var images = box.querySelectorAll('img[data-state]');
    var buttons = box.querySelectorAll('button[data-show]');
    function show(state) {
      box.setAttribute('data-shown', state);
      Array.prototype.forEach.call(images, function (img) { img.hidden = img.getAttribute('data-state') !== state; });
      Array.prototype.forEach.call(buttons, function (b) {
        b.setAttribute('aria-pressed', b.getAttribute('data-show') === state ? 'true' : 'false');
      });
    }
    Array.prototype.forEach.call(buttons, function (b) {
      b.addEventListener('click', function () { show(b.getAttribute('data-show')); });
    });
    box.querySelector('.stage').addEventListener('click', function () {
      show(box.getAttribute('data-shown') === 'before' ? 'after' : 'before');
    });
    show('before');
  });
})();
"""

_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'unsafe-inline'; "
        "base-uri 'none'; form-action 'none'")

EDGE_METHOD = ("Edge agreement: normalised gradient fields (Haber and Modersitzki 2006, MICCAI) between the EPI "
               "volume and the field-map magnitude resampled onto the EPI grid, inside the mask dilated by two voxels; "
               "0 = edges perpendicular or absent, 1 = all edges parallel (normalisation ours). Higher after than "
               "before means the correction moved EPI edges towards the anatomy. 'Where shifted' restricts the "
               "measure to voxels moved by more than half a voxel (dilated by two voxels), where a local "
               "correction shows.")


def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _lookup(report: dict, path: str):
    value: Any = report
    for part in path.split("."):
        if isinstance(value, list):
            value = value[int(part)]
        elif isinstance(value, dict):
            value = value.get(part)
        else:
            return None
        if value is None:
            return None
    return value


def format_number(value, fmt: str) -> str:
    """The text the page shows for a number (``'n/a'`` for missing values).

    Examples
    --------
    >>> format_number(3.14159, "{:.2f}"), format_number(None, "{:.2f}")
    ('3.14', 'n/a')
    """
    if value is None:
        return "n/a"
    if isinstance(value, (list, tuple)):
        return ", ".join(format_number(v, fmt) for v in value)
    try:
        return fmt.format(value)
    except (TypeError, ValueError):
        return str(value)


def _ordinal(n: int) -> str:
    """1 -> '1st', 2 -> '2nd', 50 -> '50th'."""
    suffix = "th" if 10 <= n % 100 <= 20 else {1: "st", 2: "nd", 3: "rd"}.get(n % 10, "th")
    return f"{n}{suffix}"


def _number_rows(report: dict) -> list[tuple[str, list[tuple[str, str, str, str]]]]:
    """(card title, [(label, key path, format, unit), ...]) in page order."""
    cards = []
    for i, fmap in enumerate(report.get("field_maps", [])):
        p = f"field_maps.{i}"
        rows = [("Field minimum", f"{p}.min_hz", "{:.1f}", "Hz"), ("Field maximum", f"{p}.max_hz", "{:.1f}", "Hz")]
        for level in ("p1", "p5", "p50", "p95", "p99"):
            rows.append((f"Field {_ordinal(int(level[1:]))} percentile", f"{p}.percentiles_hz.{level}", "{:.1f}", "Hz"))
        rows += [("Unaliased range \u00b1", f"{p}.unaliased_range_hz", "{:.1f}", "Hz"),
                 ("Mask voxels beyond it", f"{p}.voxels_beyond_unaliased", "{:d}", ""),
                 ("Echo times", f"{p}.echo_times_s", "{:.5g}", "s"),
                 ("Phase units detected", f"{p}.phase_units", "{}", ""),
                 ("Voxels whose 2\u03c0 offset was changed", f"{p}.voxels_offset_changed", "{:d}", ""),
                 ("Mask volume", f"{p}.mask_volume_ml", "{:.1f}", "ml"),
                 ("Mask coverage of bright magnitude", f"{p}.mask_coverage", "{:.1%}", "")]
        cards.append((f"Field map {fmap.get('name', '')}", rows))
    for i, run in enumerate(report.get("runs", [])):
        p = f"runs.{i}"
        rows = [_timing_row(p, key, value) for key, value in (run.get("timing") or {}).items()]
        rows += [("Maximum |shift| in mask", f"{p}.max_abs_shift_mm", "{:.2f}", "mm"),
                 ("Maximum |shift| in mask", f"{p}.max_abs_shift_vox", "{:.2f}", "vox"),
                 ("Voxels shifted > 1 voxel", f"{p}.percent_over_one_voxel", "{:.1f}", "%"),
                 ("Folded voxels in mask", f"{p}.folded_voxels", "{:d}", ""),
                 ("Edge agreement before", f"{p}.edge_agreement_before", "{:.3f}", ""),
                 ("Edge agreement after", f"{p}.edge_agreement_after", "{:.3f}", ""),
                 ("Edge agreement where shifted, before", f"{p}.edge_agreement_shifted_before", "{:.3f}", ""),
                 ("Edge agreement where shifted, after", f"{p}.edge_agreement_shifted_after", "{:.3f}", "")]
        cards.append((f"Run {run.get('stem', '')}", rows))
    for i, drop in enumerate(report.get("dropout", [])):
        p = f"dropout.{i}"
        rows = [("Median retention in mask", f"{p}.retention.median", "{:.3f}", ""),
                ("Retention below threshold", f"{p}.retention.percent_below_threshold", "{:.1f}", "%"),
                ("Threshold", f"{p}.threshold", "{:.2f}", "")]
        if drop.get("bold_sensitivity"):
            rows += [("Median BOLD sensitivity", f"{p}.bold_sensitivity.median", "{:.3f}", ""),
                     ("BOLD sensitivity below threshold", f"{p}.bold_sensitivity.percent_below_threshold", "{:.1f}", "%")]
        name = drop.get("name", "")
        cards.append((f"Predicted dropout {'' if name == 'dropout' else name}".strip(), rows))
    for i, plan in enumerate(report.get("plans", [])):
        p = f"plans.{i}"
        name = plan.get("name", "")
        rows = [("Recommended", f"{p}.recommended.protocol", "{}", "")]
        if isinstance(plan.get("recommended"), dict) and "protocol" not in plan["recommended"]:
            rows = [("Recommended", f"{p}.recommended", "{}", "")]
        cards.append((f"Protocol plan {'' if name == 'plan' else name}".strip(), rows + [("Reason", f"{p}.reason", "{}", "")]))
    return cards


_TIMING_WORDS = {"pe": "phase-encode", "n": "number of", "interp": "interpolation", "ro": "readout",
                 "world": "(world)"}
_UNIT_SUFFIXES = {"_s": "s", "_ms": "ms", "_mm": "mm", "_hz": "Hz", "_vox": "voxels"}


def _timing_row(prefix: str, key: str, value) -> tuple[str, str, str, str]:
    """A readable number-card row for one timing entry (``readout_time_s`` -> "Readout time", "s")."""
    base, unit = key, ""
    for suffix, name in _UNIT_SUFFIXES.items():
        if key.endswith(suffix):
            base, unit = key[: -len(suffix)], name
            break
    words = [_TIMING_WORDS.get(w, w) for w in base.split("_") if w]
    label = " ".join(words)
    label = label[:1].upper() + label[1:] if label else key
    fmt = "{:.6g}" if isinstance(value, (int, float)) and not isinstance(value, bool) else "{}"
    return (f"Timing: {label}", f"{prefix}.timing.{key}", fmt, unit)


def _value_attribute(value) -> str:
    return json.dumps(value, sort_keys=True)


def _render_numbers(report: dict) -> str:
    out = ['<div class="cards">']
    for title, rows in _number_rows(report):
        out.append(f'<section class="card"><h3>{html.escape(title)}</h3><table class="numbers">')
        for label, path, fmt, unit in rows:
            value = _lookup(report, path)
            if isinstance(value, dict):
                value = json.dumps(value)
            text = format_number(value, fmt)
            kind = "value text" if fmt == "{}" else "value"
            out.append(
                f'<tr><td>{html.escape(label)}</td><td class="{kind}" data-key="{html.escape(path)}" '
                f'data-format="{html.escape(fmt)}" data-value="{html.escape(_value_attribute(value))}">'
                f'{html.escape(text)}</td><td class="unit">{html.escape(unit)}</td></tr>'
            )
        out.append("</table></section>")
    out.append("</div>")
    return "\n".join(out)


def _render_warnings(warnings: list[dict]) -> str:
    if not warnings:
        return '<p class="allclear" id="no-warnings">No warnings were raised by the checks below.</p>'
    items = "\n".join(
        f'<li data-code="{html.escape(w["code"])}"><b>{html.escape(w["where"])}</b>: {html.escape(w["message"])}</li>'
        for w in warnings
    )
    return f'<ul class="warnings" id="warnings">\n{items}\n</ul>'


def _render_figure(fig: dict, alt: str) -> str:
    caption = f"<figcaption>{html.escape(fig['caption'])}</figcaption>"
    if "before" in fig:
        return (
            f'<figure class="compare" id="{fig["id"]}" data-shown="before">'
            '<div class="switch" role="group" aria-label="before or after correction">'
            '<button type="button" data-show="before" aria-pressed="true">Before correction</button>'
            '<button type="button" data-show="after" aria-pressed="false">After correction</button></div>'
            '<div class="stage">'
            f'<img data-state="before" alt="{html.escape(alt)} before correction" src="{_data_uri(fig["before"])}">'
            f'<img data-state="after" alt="{html.escape(alt)} after correction" hidden src="{_data_uri(fig["after"])}">'
            f"</div>{caption}</figure>"
        )
    return f'<figure id="{fig["id"]}"><img alt="{html.escape(alt)}" src="{_data_uri(fig["png"])}">{caption}</figure>'


def _render_plan_table(table: dict) -> str:
    if not table.get("header"):
        return ""
    head = "".join(f"<th>{html.escape(h)}</th>" for h in table["header"])
    body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>" for row in table["rows"])
    return f'<table class="plan"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'


def render_html(report: dict, sections: list, summary_png: bytes | None, plan_tables: list[dict]) -> str:
    """The report page as one string (all images inline)."""
    title = html.escape(report["report"]["title"])
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        '<link rel="icon" href="data:,">',
        f"<title>{title}</title><style>{_CSS}</style></head><body>",
        f'<header class="top"><h1>{title}</h1><p>folder {html.escape(report["report"]["folder"])} \u00b7 '
        f'{html.escape(report["report"]["created"])} \u00b7 fieldfix {html.escape(report["report"]["fieldfix_version"])}'
        "</p></header><main>",
        f'<p class="caution" id="caution">{html.escape(CAUTION)}</p>',
        '<h2 id="numbers">Numbers</h2>',
        _render_numbers(report),
        '<h2 id="warnings-heading">Warnings</h2>',
        _render_warnings(report["warnings"]),
        '<h2 id="figures">Figures</h2>',
    ]
    plan_index = 0
    for section in sections:
        parts.append(f"<h3>{html.escape(section.title)}</h3>")
        if section.title.startswith("Protocol plan") and plan_index < len(plan_tables):
            parts.append(_render_plan_table(plan_tables[plan_index]))
            plan_index += 1
        for fig in section.figures:
            parts.append(_render_figure(fig, section.title))
    if summary_png is not None:
        parts.append("<h3>Summary figure</h3>")
        parts.append(_render_figure({"id": "summary", "png": summary_png,
                                     "caption": "The same figure is saved as a PNG beside this page for papers."},
                                    "summary"))
    parts.append(f"<footer><p>{html.escape(EDGE_METHOD)}</p><p>Warning thresholds (ours): mask coverage below "
                 f"{LOW_COVERAGE_FRACTION:.0%} of the magnitude above Otsu's threshold; edge agreement falling by "
                 f"more than {EDGE_WORSE_TOLERANCE} overall or {_SLICE_WORSE_TOLERANCE} in a slice.</p>"
                 f"<p>{html.escape(CAUTION)}</p></footer>")
    parts.append(f"</main><script>{_SCRIPT}</script></body></html>")
    return "\n".join(parts)


def _summary_panels(field_arrays: list[dict], run_arrays: list[dict], dropout_arrays: list[dict]) -> list[dict]:
    panels = []
    if field_arrays:
        a = field_arrays[0]
        k = display_slices(a["field_hz"].shape, a["affine"], a["mask"], n_slices=1, focus=a["field_hz"])[0]
        panels.append({"volume": a["field_hz"], "affine": a["affine"], "mask": a["mask"], "label": "B0 field",
                       "cmap": _DIVERGING, "vmin": -a["limit"], "vmax": a["limit"], "units": "Hz", "slice": k})
    if run_arrays:
        a = run_arrays[0]
        lo, hi = a.get("limits") or intensity_limits(a["after"], mask=a["mask"])
        level = outline_level(a["reference"]) if a["reference"] is not None else None
        k = display_slices(a["after"].shape, a["affine"], a["mask"], n_slices=1, focus=a["shift_mm"])[0]
        if a["before"] is not None:
            panels.append({"volume": a["before"], "affine": a["affine"], "label": "EPI before", "cmap": "gray",
                           "vmin": lo, "vmax": hi, "units": None, "outline": a["reference"], "outline_level": level,
                           "slice": k})
        panels.append({"volume": a["after"], "affine": a["affine"], "label": "EPI after", "cmap": "gray",
                       "vmin": lo, "vmax": hi, "units": None, "outline": a["reference"], "outline_level": level,
                       "slice": k})
        if a["shift_mm"] is not None:
            limit = symmetric_limit(a["shift_mm"][a["mask"]], 99.9)
            panels.append({"volume": a["shift_mm"], "affine": a["affine"], "mask": a["mask"], "label": "Shift",
                           "cmap": _DIVERGING, "vmin": -limit, "vmax": limit, "units": "mm", "slice": k})
    if dropout_arrays:
        for key, label in (("retention", "Retention"), ("bold_sensitivity", "BOLD sensitivity")):
            if key in dropout_arrays[0]:
                values, affine, mask = dropout_arrays[0][key]
                panels.append({"volume": values, "affine": affine, "mask": mask, "label": label,
                               "cmap": _SEQUENTIAL, "vmin": 0.0, "vmax": 1.0, "units": "fraction"})
                break
    return panels[:6]


def _atomic_write_bytes(path: Path, data: bytes) -> None:
    from .io import atomic_output

    with atomic_output(path, overwrite=True) as temporary:
        temporary.write_bytes(data)


MAX_PAGE_BYTES = 5 * 1024 * 1024


def report_paths(folder: str | os.PathLike, out_path: str | os.PathLike | None = None) -> dict[str, Path]:
    """Where :func:`build_report` writes: ``html``, ``png`` and ``json`` paths.

    `out_path` may be a folder (``report.html`` inside it) or a file name ending in
    ``.html`` (the PNG and JSON take its stem: ``x.html``, ``x_summary.png``, ``x.json``).

    Examples
    --------
    >>> sorted(p.name for p in report_paths("out").values())
    ['report.html', 'report.json', 'report_summary.png']
    """
    target = Path(folder) if out_path is None else Path(out_path)
    if target.suffix.lower() in (".html", ".htm"):
        html_path = target
    else:
        html_path = target / "report.html"
    stem = html_path.stem
    return {"html": html_path, "png": html_path.with_name(stem + "_summary.png"),
            "json": html_path.with_name(stem + ".json")}


def build_report(
    folder: str | os.PathLike,
    *,
    out_path: str | os.PathLike | None = None,
    title: str | None = None,
    overwrite: bool = False,
) -> Path:
    """Build the quality report of a fieldfix output folder.

    Parameters
    ----------
    folder : str or PathLike
        A folder holding outputs of the fieldmap, unwarp, dropout and/or plan workflows.
    out_path : str or PathLike, optional
        Folder for ``report.html`` (default: `folder`), or the HTML file name itself.
    title : str, optional
        Page title (default: "fieldfix report: <folder name>").
    overwrite : bool
        Replace an existing report.

    Returns
    -------
    Path
        The HTML page. ``report_summary.png`` and ``report.json`` are written beside it.

    Raises
    ------
    InputError
        When the folder is missing or holds no fieldfix outputs.
    OutputError
        When a report exists and `overwrite` is False.

    Examples
    --------
    >>> import tempfile
    >>> build_report(tempfile.mkdtemp())  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    fieldfix.errors.InputError: no fieldfix outputs found
    """
    from . import __version__
    from .io import output_paths_guard, write_json

    folder = Path(folder)
    sources = find_outputs(folder)
    if sources.empty:
        raise InputError("no fieldfix outputs found (expected b0_hz.nii.gz, <run>_corrected.nii.gz, "
                         "retention.nii.gz, dropout.json or plan.json)", folder)
    paths = report_paths(folder, out_path)
    output_paths_guard(paths.values(), sources.input_paths(), overwrite)
    try:
        paths["html"].parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise OutputError(f"cannot create the report folder ({err.strerror or err})", paths["html"].parent) from None

    for dpi in (100, 72, 50):
        report: dict[str, Any] = {
            "report": {
                "title": title or f"fieldfix report: {folder.resolve().name}",
                "folder": str(folder.resolve()),
                "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                "fieldfix_version": __version__,
                "caution": CAUTION,
                "edge_agreement_method": EDGE_METHOD,
                "figure_dpi": dpi,
            },
            "field_maps": [], "runs": [], "dropout": [], "plans": [], "warnings": [], "sources": {},
        }
        sections: list[_Section] = []
        field_arrays, run_arrays, dropout_arrays, plan_tables = [], [], [], []
        for i, fmap in enumerate(sources.field_maps):
            numbers, section, arrays = _field_map_part(fmap, i, dpi)
            report["field_maps"].append(numbers)
            sections.append(section)
            field_arrays.append(arrays)
        for i, run in enumerate(sources.runs):
            numbers, section, arrays = _run_part(run, i, dpi, with_figures=i < _MAX_RUN_FIGURES)
            report["runs"].append(numbers)
            sections.append(section)
            run_arrays.append(arrays)
        for i, drop in enumerate(sources.dropout):
            numbers, section, arrays = _dropout_part(drop, i, dpi)
            report["dropout"].append(numbers)
            sections.append(section)
            dropout_arrays.append(arrays)
        for i, plan in enumerate(sources.plans):
            numbers, section, table = _plan_part(plan, i)
            report["plans"].append(numbers)
            sections.append(section)
            plan_tables.append(table)
        for path in [f.summary for f in sources.field_maps] + [r.summary for r in sources.runs] + \
                [d.summary for d in sources.dropout] + [p.json for p in sources.plans]:
            if path is not None:
                report["sources"][path.name] = _read_json_quiet(path)
        report["warnings"] = collect_warnings(report)
        panels = _summary_panels(field_arrays, run_arrays, dropout_arrays)
        summary_png = figure_png(summary_figure(panels, title=report["report"]["title"]), dpi=max(dpi, 150)) \
            if panels else next((p.png.read_bytes() for p in sources.plans if p.png is not None), None)
        from .jsonfile import to_jsonable

        report = to_jsonable(report)  # the page shows exactly what report.json holds
        page = render_html(report, sections, summary_png, plan_tables).encode("utf-8")
        if len(page) <= MAX_PAGE_BYTES:
            break
    report["report"]["html_bytes"] = len(page)
    _atomic_write_bytes(paths["html"], page)
    if summary_png is not None:
        _atomic_write_bytes(paths["png"], summary_png)
    write_json(paths["json"], report, overwrite=True)
    return paths["html"]
