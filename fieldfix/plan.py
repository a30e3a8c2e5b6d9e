"""Protocol planning: sweep candidate protocols over a B0 map and rank them.

For every protocol (slice thickness x echo time x tilt x phase-encode polarity x z-shim
moment) the signal metric of :mod:`fieldfix.dropout` is evaluated in every voxel of a
brain mask: the through-plane retention at the nominal TE, or, when the phase-encode
timing is given, the BOLD sensitivity (Weiskopf et al. 2006, NeuroImage 33:493-504).
Each protocol is summarised by the median and the percentage of voxels under a threshold
(default 0.5) in the region of interest (ROI) and in the whole brain mask, and by its
scan-time consequence: the number of slices needed to cover the extent of the coverage
mask along the slice normal (with the slice gap) and the shortest TR for a given time
per slice.

Ranking: ROI median (descending), then ROI percentage under the threshold, brain median,
brain percentage under the threshold, TR. The recommendation takes, among protocols
whose TR fits `max_tr_s`, those within `tolerance` of the best ROI median and picks the
one with the fewest brain voxels under the threshold, then the shortest TR.

Research software, not a medical device: predictions are a planning aid.

Examples
--------
>>> slices_to_cover(120.0, 2.5, 0.25)
44
>>> shortest_tr_s(44, 0.05)
2.2
"""

from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np

from . import _dropout_kernels as kernels
from .dropout import (
    SliceFrame,
    acquisition_window_s,
    field_gradient_hz_per_mm,
    frame_from_orientation,
    slice_profile,
    zshim_cyc_per_mm,
)
from .errors import GeometryError, InputError

__all__ = [
    "Protocol",
    "protocol_grid",
    "mask_extent_mm",
    "slices_to_cover",
    "shortest_tr_s",
    "sweep",
    "rank",
    "recommend",
    "plot_tradeoffs",
    "CSV_COLUMNS",
]

_WORLD_WORDS = {"x": ("left", "right"), "y": ("posterior", "anterior"), "z": ("inferior", "superior")}

#: Columns of the ranked table, in order.
CSV_COLUMNS = ("rank", "thickness_mm", "te_ms", "tilt_deg", "pe_polarity", "pe_direction", "zshim_mtms_per_m",
               "metric", "roi_median", "roi_pct_below", "brain_median", "brain_pct_below", "n_slices", "tr_s",
               "fits_tr")


@dataclass(frozen=True)
class Protocol:
    """One candidate protocol.

    Attributes
    ----------
    thickness_mm, te_s, tilt_deg : float
    pe_sign : int
        +1 or -1 (BIDS polarity of the phase-encode axis), 0 when not modelled.
    zshim_mtms_per_m : float
        Z-shim moment along the slice normal (mT*ms/m).
    """

    thickness_mm: float
    te_s: float
    tilt_deg: float
    pe_sign: int = 0
    zshim_mtms_per_m: float = 0.0

    def label(self) -> str:
        """Short description, e.g. ``'2.5 mm, TE 30 ms, tilt -10 deg, PE +'``."""
        text = f"{self.thickness_mm:g} mm, TE {self.te_s * 1e3:g} ms, tilt {self.tilt_deg:g} deg"
        if self.pe_sign:
            text += f", PE {'+' if self.pe_sign > 0 else '-'}"
        if self.zshim_mtms_per_m:
            text += f", z-shim {self.zshim_mtms_per_m:g} mT*ms/m"
        return text


def protocol_grid(thickness_mm, te_s, tilt_deg, pe_signs=(1, -1), zshim_mtms_per_m=(0.0,)) -> list[Protocol]:
    """All combinations of the given values (duplicates removed, order kept).

    Example
    -------
    >>> len(protocol_grid([2.0, 3.0], [0.025, 0.03], [-10.0, 0.0, 10.0]))
    24
    """
    values = [list(dict.fromkeys(float(v) for v in seq)) for seq in (thickness_mm, te_s, tilt_deg)]
    signs = list(dict.fromkeys(int(s) for s in pe_signs))
    shims = list(dict.fromkeys(float(z) for z in zshim_mtms_per_m))
    for name, seq in zip(("thickness", "echo time", "tilt"), values):
        if not seq:
            raise InputError(f"the sweep needs at least one {name}")
    if any(v <= 0 for v in values[0]):
        raise InputError("slice thicknesses must be positive")
    if any(v <= 0 or v > 0.5 for v in values[1]):
        raise InputError("echo times must be positive and at most 0.5 s (longer ones are almost always a unit "
                         "mistake)")
    if any(s not in (-1, 0, 1) for s in signs) or not signs:
        raise InputError("phase-encode polarities must be +1 or -1 (or 0 for none)")
    return [Protocol(d, te, tilt, s, z) for d, te, tilt, s, z in itertools.product(*values, signs, shims)]


def mask_extent_mm(mask: np.ndarray, affine: np.ndarray, normal: np.ndarray) -> float | np.ndarray:
    """Extent of a mask along a world direction (mm), voxel size included.

    The spread of the voxel-centre projections plus the projected size of one voxel.
    `normal` may also be an (N, 3) array of directions; the N extents then come from one
    pass over the first and last mask voxel of each column along the last axis (the
    extremes of a linear projection of a voxel set are reached there).

    Example
    -------
    >>> m = np.zeros((4, 4, 10), bool); m[1:3, 1:3, 2:8] = True
    >>> mask_extent_mm(m, np.diag([2.0, 2.0, 2.0, 1.0]), np.array([0.0, 0.0, 1.0]))
    12.0
    """
    mask = np.asarray(mask, bool)
    normals = np.atleast_2d(np.asarray(normal, float))
    # A projection is linear along each column of the last axis, so its extremes are reached at
    # the first or last mask voxel of some column: only those voxels are needed.
    if mask.ndim != 3:
        raise GeometryError(f"a mask extent needs a 3D mask, got {mask.ndim} dimensions")
    columns = mask.any(axis=2)
    i, j = np.nonzero(columns)
    first = mask[i, j].argmax(axis=1)
    last = mask.shape[2] - 1 - mask[i, j, ::-1].argmax(axis=1)
    idx = np.column_stack([np.r_[i, i], np.r_[j, j], np.r_[first, last]])
    if idx.size == 0:
        extents = np.zeros(len(normals))
    else:
        proj_axes = normals @ np.asarray(affine, float)[:3, :3]  # mm along each normal per index step
        along = idx @ proj_axes.T
        extents = along.max(axis=0) - along.min(axis=0) + np.abs(proj_axes).sum(axis=1)
    return float(extents[0]) if np.ndim(normal) == 1 else extents


def slices_to_cover(extent_mm: float, thickness_mm: float, gap_mm: float = 0.0) -> int:
    """Slices needed so that n slices with gaps span `extent_mm`: ``n*d + (n-1)*gap >= extent``."""
    if thickness_mm <= 0 or gap_mm < 0:
        raise InputError("the slice thickness must be positive and the gap non-negative")
    if extent_mm <= 0:
        return 0
    return max(1, int(math.ceil((extent_mm + gap_mm) / (thickness_mm + gap_mm) - 1e-9)))


def shortest_tr_s(n_slices: int, time_per_slice_s: float, multiband: int = 1) -> float:
    """Shortest TR: slices acquired one excitation group after another."""
    if time_per_slice_s <= 0 or multiband < 1:
        raise InputError("the time per slice must be positive and the multiband factor at least 1")
    return float(f"{math.ceil(n_slices / multiband) * time_per_slice_s:.12g}")


def _pe_direction(axis: str, sign: int) -> str:
    if sign == 0:
        return ""
    low, high = _WORLD_WORDS[axis]
    return f"{low} to {high}" if sign > 0 else f"{high} to {low}"


def sweep(
    b0_hz: np.ndarray,
    affine: np.ndarray,
    roi_mask: np.ndarray,
    brain_mask: np.ndarray | None = None,
    *,
    thickness_mm,
    te_s,
    tilt_deg,
    pe_signs=(1, -1),
    zshim_mtms_per_m=(0.0,),
    orientation: str = "axial",
    pe_world_axis: str = "y",
    inplane_mm: float = 3.0,
    pe_lines: int = 64,
    echo_spacing_s: float | None = None,
    partial_fourier: float = 1.0,
    profile: str = "rect",
    tbw: float = 4.0,
    threshold: float = 0.5,
    slice_gap_mm: float = 0.0,
    time_per_slice_s: float = 0.06,
    multiband: int = 1,
    max_tr_s: float | None = None,
    coverage: str = "brain",
    engine: str = "numba",
) -> list[dict]:
    """Evaluate a sweep of protocols over a B0 map.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array
        B0 map in Hz, smooth and extended a little past the brain.
    affine : (4, 4) array
    roi_mask, brain_mask : (X, Y, Z) bool arrays
        Region of interest and whole-brain mask on the B0 grid (the ROI is added to the
        brain mask). Without a brain mask, voxels with a finite, non-zero field are used.
    thickness_mm, te_s, tilt_deg : sequences of float
        Values to sweep (mm, s, degrees; tilt convention of :func:`fieldfix.dropout.tilt_rotation`).
    pe_signs : sequence of {+1, -1}
        Phase-encode polarities (used only with `echo_spacing_s`).
    zshim_mtms_per_m : sequence of float
        Z-shim moments along the slice normal (mT*ms/m).
    orientation, pe_world_axis, inplane_mm, pe_lines
        Slice geometry of the candidate protocols (see :func:`fieldfix.dropout.frame_from_orientation`).
    echo_spacing_s : float, optional
        Effective echo spacing. When given, the metric is the BOLD sensitivity, else the
        through-plane retention at the nominal TE (and the polarity is not swept).
    partial_fourier : float
    profile, tbw : slice profile ('rect', 'gaussian', 'rf') and RF time-bandwidth product.
    threshold : float
        Voxels with a metric below it count as lost.
    slice_gap_mm, time_per_slice_s, multiband
        Scan-time arithmetic.
    max_tr_s : float, optional
        Marks protocols whose TR exceeds it (``fits_tr`` False).
    coverage : {'brain', 'roi'}
        Which mask the slices must cover.
    engine : {'numba', 'numpy'}
        Numba kernel or the plain-numpy reference.

    Returns
    -------
    list of dict, one per protocol, ranked (see :func:`rank`).
    """
    b0_hz = np.asarray(b0_hz, float)
    roi = np.asarray(roi_mask, bool)
    if roi.shape != b0_hz.shape:
        raise GeometryError(f"the ROI mask has shape {roi.shape}, the B0 map {b0_hz.shape}")
    if not roi.any():
        raise InputError("the ROI mask is empty")
    if brain_mask is None:
        brain = np.isfinite(b0_hz) & (b0_hz != 0)
    else:
        brain = np.asarray(brain_mask, bool)
        if brain.shape != b0_hz.shape:
            raise GeometryError(f"the brain mask has shape {brain.shape}, the B0 map {b0_hz.shape}")
    brain = brain | roi
    if not np.isfinite(b0_hz[brain]).all():
        raise InputError("the B0 map has non-finite values inside the masks")
    if coverage not in ("brain", "roi"):
        raise InputError(f"coverage must be 'brain' or 'roi', got {coverage!r}")
    if engine not in ("numba", "numpy"):
        raise InputError(f"engine must be 'numba' or 'numpy', got {engine!r}")
    if not 0.0 < threshold:
        raise InputError("the threshold must be positive")
    use_pe = echo_spacing_s is not None
    protocols = protocol_grid(thickness_mm, te_s, tilt_deg, pe_signs if use_pe else (0,), zshim_mtms_per_m)
    if use_pe and 0 in {p.pe_sign for p in protocols}:
        raise InputError("with an echo spacing, phase-encode polarities must be +1 or -1")
    prof = slice_profile(profile, tbw=tbw)

    tilts = list(dict.fromkeys(p.tilt_deg for p in protocols))
    frames: list[SliceFrame] = [frame_from_orientation(orientation, t, pe_world_axis=pe_world_axis,
                                                       inplane_mm=inplane_mm, pe_lines=pe_lines) for t in tilts]
    # Brain voxels with the ROI first: the kernel wants the ROI as a leading block (no copy then).
    idx = np.flatnonzero(brain.ravel())
    in_roi = roi.ravel()[idx]
    idx = np.concatenate([idx[in_roi], idx[~in_roi]])
    finite = b0_hz if np.isfinite(b0_hz).all() else np.where(np.isfinite(b0_hz), b0_hz, 0.0)
    grad = np.ascontiguousarray(field_gradient_hz_per_mm(finite, affine, at=idx).T)
    dirs = np.array([[f.normal, f.pe_step_mm, f.ro_step_mm] for f in frames])
    roi_in_brain = roi.ravel()[idx]

    tilt_index = np.array([tilts.index(p.tilt_deg) for p in protocols], np.int64)
    signs = np.array([p.pe_sign for p in protocols], np.int64)
    tes = np.array([p.te_s for p in protocols])
    thick = np.array([p.thickness_mm for p in protocols])
    zs = np.array([zshim_cyc_per_mm(p.zshim_mtms_per_m) for p in protocols])
    mode = 1 if use_pe else 0
    t_pe = pe_lines * echo_spacing_s if use_pe else 0.0
    if use_pe:
        start, end = acquisition_window_s(1.0, echo_spacing_s, pe_lines, partial_fourier)
        before, after = 1.0 - start, end - 1.0
    else:
        before = after = 0.0
    if engine == "numba":
        stats = kernels.sweep_stats(grad, dirs, roi_in_brain, tilt_index, signs, tes, thick, zs, mode, t_pe,
                                    before, after, prof.table, prof.step, prof.tail == "sinc", threshold,
                                    analytic=prof.kind if prof.kind in kernels.CLOSED_FORMS else None)
    else:
        stats = kernels.sweep_stats_reference(grad, dirs, roi_in_brain, tilt_index, signs, tes, thick, zs, mode,
                                              t_pe, before, after, prof.retention, threshold)

    cover = brain if coverage == "brain" else roi
    extents = mask_extent_mm(cover, affine, np.array([f.normal for f in frames]))
    metric = "bold_sensitivity" if use_pe else "retention"
    rows = []
    for p, ti, st in zip(protocols, tilt_index, stats):
        n_slices = slices_to_cover(extents[ti], p.thickness_mm, slice_gap_mm)
        tr = shortest_tr_s(n_slices, time_per_slice_s, multiband)
        rows.append({
            "protocol": p.label(),
            "thickness_mm": p.thickness_mm,
            "te_s": p.te_s,
            "te_ms": float(f"{p.te_s * 1e3:.9g}"),
            "tilt_deg": p.tilt_deg,
            "pe_sign": p.pe_sign,
            "pe_polarity": {1: "+", -1: "-", 0: "none"}[p.pe_sign],
            "pe_direction": _pe_direction(pe_world_axis, p.pe_sign),
            "zshim_mtms_per_m": p.zshim_mtms_per_m,
            "metric": metric,
            "roi_median": float(st[0]),
            "roi_pct_below": float(st[1]),
            "brain_median": float(st[2]),
            "brain_pct_below": float(st[3]),
            "coverage_mm": extents[ti],
            "n_slices": n_slices,
            "tr_s": tr,
            "fits_tr": bool(max_tr_s is None or tr <= max_tr_s + 1e-12),
        })
    return rank(rows)


def _rank_key(row: dict):
    return (-row["roi_median"], row["roi_pct_below"], -row["brain_median"], row["brain_pct_below"], row["tr_s"],
            row["thickness_mm"], row["te_s"], abs(row["tilt_deg"]))


def rank(rows: list[dict]) -> list[dict]:
    """Rows sorted best first, each with its 1-based ``rank``."""
    ordered = sorted((dict(r) for r in rows), key=_rank_key)
    for i, row in enumerate(ordered, 1):
        row["rank"] = i
    return ordered


def recommend(rows: list[dict], *, tolerance: float = 0.01, threshold: float = 0.5) -> tuple[dict, str]:
    """Pick one protocol and give the reason in one sentence.

    Among rows that fit the TR limit (all rows if none does), those whose ROI median is
    within `tolerance` of the best are candidates; the one with the fewest brain voxels
    under the threshold wins, then the shortest TR, then the higher ROI median.

    Returns
    -------
    (row, reason)
    """
    if not rows:
        raise InputError("no protocols to choose from")
    pool = [r for r in rows if r.get("fits_tr", True)]
    limited = bool(pool) and len(pool) < len(rows)
    if not pool:
        pool = list(rows)
    best = max(r["roi_median"] for r in pool)
    candidates = [r for r in pool if r["roi_median"] >= best - tolerance]
    choice = min(candidates, key=lambda r: (r["brain_pct_below"], r["tr_s"], -r["roi_median"], _rank_key(r)))
    what = "BOLD sensitivity" if choice["metric"] == "bold_sensitivity" else "signal retention"
    reason = (f"{choice['protocol']} keeps a median {what} of {choice['roi_median']:.2f} in the region of interest "
              f"({choice['roi_pct_below']:.1f}% of its voxels under {threshold:g}), within {tolerance:g} of the best "
              f"of {len(pool)} {'protocols fitting the TR limit' if limited else 'protocols'}, with the fewest "
              f"whole-brain voxels under {threshold:g} ({choice['brain_pct_below']:.1f}%) among those and "
              f"{choice['n_slices']} slices at TR {choice['tr_s']:.2f} s.")
    return choice, reason


# --------------------------------------------------------------------------- figure


def plot_tradeoffs(rows: list[dict], path=None, *, recommended: dict | None = None, title: str | None = None):
    """Trade-off figure of a sweep (:func:`fieldfix.report.figures.tradeoff_figure`), written
    as a PNG to `path` when given.

    Parameters
    ----------
    rows : list of dict
        Output of :func:`sweep`.
    path : str or Path, optional
        Where to write a PNG.
    recommended : dict, optional
        Row to highlight (default: the first row).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .report.figures import tradeoff_figure

    fig = tradeoff_figure(rows, recommended=recommended, title=title)
    if path is not None:
        fig.savefig(str(path), dpi=100)
    return fig
