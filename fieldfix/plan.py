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

import dataclasses
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
from .outputs.plan import PlanRow
from .plan_merit import DEFAULT_MAX_TR_S, DEFAULT_OVERHEAD_S, Physiology, bold_merit, readout_s, slice_time_s

__all__ = [
    "Protocol",
    "SweepSpec",
    "protocol_grid",
    "mask_extent_mm",
    "slices_to_cover",
    "shortest_tr_s",
    "sweep",
    "rank",
    "recommend",
    "plot_tradeoffs",
    "CSV_COLUMNS",
    "SWEEP_AXES",
]

#: The SweepSpec fields that hold one value per protocol axis (every other field is held fixed).
SWEEP_AXES = ("thickness_mm", "te_s", "tilt_deg", "pe_signs", "zshim_mtms_per_m")
_WORLD_WORDS = {"x": ("left", "right"), "y": ("posterior", "anterior"), "z": ("inferior", "superior")}

#: Columns of the ranked table, in order.
CSV_COLUMNS = ("rank", "thickness_mm", "te_s", "tilt_deg", "pe_polarity", "pe_direction", "zshim_mtms_per_m",
               "metric", "roi_median", "roi_percent_below", "brain_median", "brain_percent_below", "merit", "tsnr",
               "n_slices", "slice_time_s", "tr_s", "fits_tr")

#: The columns in words, with units (the figure's table and the README).
COLUMN_WORDS = {
    "rank": "rank (1 = recommended order)", "thickness_mm": "slice thickness (mm)", "te_s": "echo time (s)",
    "tilt_deg": "slice tilt (degrees)", "pe_polarity": "phase-encode polarity (+/-)",
    "pe_direction": "phase-encode direction (world words)", "zshim_mtms_per_m": "z-shim moment (mT*ms/m)",
    "metric": "signal metric used", "roi_median": "ROI median of the metric (0-1)",
    "roi_percent_below": "ROI voxels under the threshold (%)", "brain_median": "brain median of the metric (0-1)",
    "brain_percent_below": "brain voxels under the threshold (%)",
    "merit": "BOLD contrast-to-noise per unit time (relative, best = 1)", "tsnr": "modelled temporal SNR (relative)",
    "n_slices": "slices to cover (count)", "slice_time_s": "time per slice (s)", "tr_s": "TR (s)",
    "fits_tr": "TR within the limit (true/false)",
}


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

@dataclass(frozen=True)
class SweepSpec:
    """Everything a sweep needs besides the images: the swept values, geometry, timing and model.

    A new protocol knob is a field here and an option in ``cli/plan.py``. Times in s, lengths in mm.

    Attributes
    ----------
    thickness_mm, te_s, tilt_deg, pe_signs, zshim_mtms_per_m : tuples
        Values to sweep (tilt convention of :func:`fieldfix.dropout.tilt_rotation`; polarities are
        swept only with `echo_spacing_s`).
    orientation, pe_world_axis, inplane_mm, pe_lines
        Slice geometry (see :func:`fieldfix.dropout.frame_from_orientation`).
    echo_spacing_s : float, optional
        Effective echo spacing. Gives the BOLD sensitivity metric, the readout and slice times.
    partial_fourier, profile, tbw, threshold
        Partial Fourier fraction, slice profile, RF time-bandwidth product, level counted as lost.
    slice_gap_mm, multiband, coverage
        Slices cover the ``coverage`` mask ('brain' or 'roi') with this gap, ``multiband`` at once.
    time_per_slice_s : float, optional
        A fixed time per slice; default: from the protocol (:func:`fieldfix.plan_merit.slice_time_s`,
        with an assumed 0.5 ms echo spacing when none is given).
    overhead_s : float
        Excitation, rewinder and spoiler time of one slice.
    max_tr_s : float, optional
        Longest acceptable TR (default 3 s; None for no limit).
    fixed_tr_s : float, optional
        Run every protocol at this TR (dead time after the slices) instead of its shortest TR.
    rank_by : {'efficiency', 'retention'}, optional
        'efficiency' (BOLD contrast-to-noise per unit time, :func:`fieldfix.plan_merit.bold_merit`)
        or 'retention' (ROI median of the signal metric); default efficiency with an echo spacing.
    physiology : Physiology
        T2*, field strength and noise model of the figure of merit.
    tolerance : float
        Figures this close to the best count as equal when recommending.

    Example
    -------
    >>> SweepSpec(te_s=(0.03, 0.045), echo_spacing_s=5e-4).ranking
    'efficiency'
    """

    thickness_mm: tuple = (3.0,)
    te_s: tuple = (0.03,)
    tilt_deg: tuple = (0.0,)
    pe_signs: tuple = (1, -1)
    zshim_mtms_per_m: tuple = (0.0,)
    orientation: str = "axial"
    pe_world_axis: str = "y"
    inplane_mm: float = 3.0
    pe_lines: int = 64
    echo_spacing_s: float | None = None
    partial_fourier: float = 1.0
    profile: str = "rect"
    tbw: float = 4.0
    threshold: float = 0.5
    slice_gap_mm: float = 0.0
    time_per_slice_s: float | None = None
    overhead_s: float = DEFAULT_OVERHEAD_S
    multiband: int = 1
    max_tr_s: float | None = DEFAULT_MAX_TR_S
    fixed_tr_s: float | None = None
    coverage: str = "brain"
    rank_by: str | None = None
    physiology: Physiology = Physiology()
    tolerance: float = 0.01

    def __post_init__(self):
        for name in SWEEP_AXES:
            object.__setattr__(self, name, tuple(np.atleast_1d(getattr(self, name)).tolist()))
        if self.coverage not in ("brain", "roi"):
            raise InputError(f"coverage must be 'brain' or 'roi', got {self.coverage!r}")
        if self.rank_by not in (None, "efficiency", "retention"):
            raise InputError(f"rank_by must be 'efficiency' or 'retention', got {self.rank_by!r}")
        if not 0.0 < self.threshold:
            raise InputError("the threshold must be positive")
        if self.pe_lines < 2 or self.multiband < 1:
            raise InputError("pe_lines must be at least 2 and multiband at least 1")

    @property
    def ranking(self) -> str:
        """The ranking in force ('efficiency' or 'retention')."""
        return self.rank_by or ("efficiency" if self.echo_spacing_s is not None else "retention")

    @property
    def timing_echo_spacing_s(self) -> float:
        """Echo spacing used for timing: the given one, else 0.5 ms (common practice, no source)."""
        return self.echo_spacing_s if self.echo_spacing_s is not None else 5e-4

    def slice_times_s(self, te_s) -> np.ndarray:
        """Time of one slice for each echo time (s)."""
        if self.time_per_slice_s is not None:
            return np.full(np.shape(te_s), float(self.time_per_slice_s))
        return slice_time_s(te_s, self.pe_lines, self.timing_echo_spacing_s, self.overhead_s)

    def check_tr_limits(self) -> None:
        """Refuse a TR limit shorter than one slice of the shortest protocol."""
        one = float(np.min(self.slice_times_s(np.array(self.te_s))))
        for name in ("max_tr_s", "fixed_tr_s"):
            value = getattr(self, name)
            if value is not None and value < one - 1e-12:
                raise InputError(f"{name} of {value * 1e3:g} ms is shorter than one slice ({one * 1e3:.1f} ms)")

    def as_dict(self) -> dict:
        """The parameters as JSON-ready values (the physiology flattened)."""
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self) if f.name != "physiology"}
        out.update({k: list(v) for k, v in out.items() if isinstance(v, tuple)})
        out.update(dataclasses.asdict(self.physiology), rank_by=self.ranking)
        return out


def _masks(b0_hz, roi_mask, brain_mask):
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
    return b0_hz, roi, brain


def _kernel_stats(b0_hz, affine, roi, brain, spec: SweepSpec, protocols, frames, tilts, engine):
    """ROI and brain median and percentage under the threshold per protocol (kernel or reference)."""
    # Brain voxels with the ROI first: the kernel wants the ROI as a leading block (no copy then).
    idx = np.flatnonzero(brain.ravel())
    in_roi = roi.ravel()[idx]
    idx = np.concatenate([idx[in_roi], idx[~in_roi]])
    finite = b0_hz if np.isfinite(b0_hz).all() else np.where(np.isfinite(b0_hz), b0_hz, 0.0)
    if engine == "numba":  # the same values as field_gradient_hz_per_mm(finite, affine, at=idx).T
        inverse_transpose = np.linalg.inv(np.asarray(affine, float)[:3, :3]).T
        grad = kernels.gradient_rows(np.ascontiguousarray(finite), idx, np.ascontiguousarray(inverse_transpose))
    else:
        grad = np.ascontiguousarray(field_gradient_hz_per_mm(finite, affine, at=idx).T)  # (3, n): no copy
    dirs = np.array([[f.normal, f.pe_step_mm, f.ro_step_mm] for f in frames])
    args = (grad, dirs, roi.ravel()[idx], np.array([tilts.index(p.tilt_deg) for p in protocols], np.int64),
            np.array([p.pe_sign for p in protocols], np.int64), np.array([p.te_s for p in protocols]),
            np.array([p.thickness_mm for p in protocols]),
            np.array([zshim_cyc_per_mm(p.zshim_mtms_per_m) for p in protocols]))
    esp = spec.echo_spacing_s
    before = after = t_pe = 0.0
    if esp is not None:
        t_pe = spec.pe_lines * esp
        start, end = acquisition_window_s(1.0, esp, spec.pe_lines, spec.partial_fourier)
        before, after = 1.0 - start, end - 1.0
    prof = slice_profile(spec.profile, tbw=spec.tbw)
    timing = (1 if esp is not None else 0, t_pe, before, after)
    if engine == "numba":
        return kernels.sweep_stats(*args, *timing, prof.table, prof.step, prof.tail == "sinc", spec.threshold,
                                   analytic=prof.kind if prof.kind in kernels.CLOSED_FORMS else None)
    return kernels.sweep_stats_reference(*args, *timing, prof.retention, spec.threshold)


def sweep(b0_hz: np.ndarray, affine: np.ndarray, roi_mask: np.ndarray, brain_mask: np.ndarray | None = None,
          spec: SweepSpec | None = None, *, engine: str = "numba", **changes) -> list[PlanRow]:
    """Evaluate a sweep of protocols over a B0 map and rank them.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array
        B0 map in Hz, smooth and extended a little past the brain (measured or modelled).
    affine : (4, 4) array
    roi_mask, brain_mask : (X, Y, Z) bool arrays
        Region of interest and whole-brain mask on the B0 grid (the ROI is added to the
        brain mask). Without a brain mask, voxels with a finite, non-zero field are used.
    spec : SweepSpec, optional
        The protocols and models; ``**changes`` replaces its fields (e.g. ``te_s=[0.03]``).
    engine : {'numba', 'numpy'}
        Numba kernel or the plain-numpy reference.

    Returns
    -------
    list of :class:`fieldfix.outputs.PlanRow`, one per protocol, ranked (see :func:`rank`);
    :data:`CSV_COLUMNS` are the fields ``plan.csv`` shows.

    Example
    -------
    >>> m = np.zeros((8, 8, 8), bool); m[2:6, 2:6, 2:6] = True
    >>> rows = sweep(np.zeros((8, 8, 8)), np.eye(4) * 3, m, m, te_s=[0.03, 0.045], echo_spacing_s=5e-4)
    >>> rows[0].te_s, rows[0].merit
    (0.045, 1.0)
    """
    spec = dataclasses.replace(spec or SweepSpec(), **changes)
    if engine not in ("numba", "numpy"):
        raise InputError(f"engine must be 'numba' or 'numpy', got {engine!r}")
    b0_hz, roi, brain = _masks(b0_hz, roi_mask, brain_mask)
    use_pe = spec.echo_spacing_s is not None
    protocols = protocol_grid(spec.thickness_mm, spec.te_s, spec.tilt_deg, spec.pe_signs if use_pe else (0,),
                              spec.zshim_mtms_per_m)
    if use_pe and 0 in {p.pe_sign for p in protocols}:
        raise InputError("with an echo spacing, phase-encode polarities must be +1 or -1")
    spec.check_tr_limits()
    tilts = list(dict.fromkeys(p.tilt_deg for p in protocols))
    frames: list[SliceFrame] = [frame_from_orientation(spec.orientation, t, pe_world_axis=spec.pe_world_axis,
                                                       inplane_mm=spec.inplane_mm, pe_lines=spec.pe_lines)
                                for t in tilts]
    stats = _kernel_stats(b0_hz, affine, roi, brain, spec, protocols, frames, tilts, engine)
    extents = mask_extent_mm(brain if spec.coverage == "brain" else roi, affine, np.array([f.normal for f in frames]))
    rows = _rows(protocols, stats, [float(extents[tilts.index(p.tilt_deg)]) for p in protocols], spec)
    return rank(rows, spec.ranking)


def _rows(protocols: list[Protocol], stats: np.ndarray, extents_mm: list[float], spec: SweepSpec) -> list[PlanRow]:
    """One row per protocol: its statistics, timing, and the relative BOLD figure of merit with the
    modelled tSNR. Values shared by many protocols (slice counts, TRs, words) are worked out once."""
    slice_s = {te: float(spec.slice_times_s(te)) for te in spec.te_s}
    n_slices = {}
    for p, extent in zip(protocols, extents_mm):
        if (extent, p.thickness_mm) not in n_slices:
            n_slices[extent, p.thickness_mm] = slices_to_cover(extent, p.thickness_mm, spec.slice_gap_mm)
    counts = [n_slices[extent, p.thickness_mm] for p, extent in zip(protocols, extents_mm)]
    tr_s = {}
    for p, n in zip(protocols, counts):
        if (n, p.te_s) not in tr_s:  # plan_merit.volume_tr_s, rounded as a row shows it
            tr = float(f"{math.ceil(n / spec.multiband) * slice_s[p.te_s]:.12g}")
            tr_s[n, p.te_s] = tr if spec.fixed_tr_s is None else max(tr, spec.fixed_tr_s)
    trs = [tr_s[n, p.te_s] for p, n in zip(protocols, counts)]
    readout = readout_s(spec.pe_lines, spec.timing_echo_spacing_s, spec.partial_fourier)
    merit, tsnr = bold_merit(stats[:, 0], [p.te_s for p in protocols],
                             [p.thickness_mm * spec.inplane_mm ** 2 for p in protocols], readout, trs, spec.physiology)
    merit = merit / (float(merit.max()) or 1.0)
    words = {s: ({1: "+", -1: "-", 0: "none"}[s], _pe_direction(spec.pe_world_axis, s)) for s in (1, -1, 0)}
    metric = "bold_sensitivity" if spec.echo_spacing_s is not None else "retention"
    limit = math.inf if spec.max_tr_s is None else spec.max_tr_s + 1e-12
    return [PlanRow(
        protocol=p.label(), thickness_mm=p.thickness_mm, te_s=p.te_s, tilt_deg=p.tilt_deg, pe_sign=p.pe_sign,
        pe_polarity=words[p.pe_sign][0], pe_direction=words[p.pe_sign][1], zshim_mtms_per_m=p.zshim_mtms_per_m,
        metric=metric, roi_median=st[0], roi_percent_below=st[1], brain_median=st[2], brain_percent_below=st[3],
        coverage_mm=extent, n_slices=n, slice_time_s=slice_s[p.te_s], tr_s=tr, fits_tr=tr <= limit,
        merit=float(f"{m:.9g}"), tsnr=float(f"{ts:.6g}"), readout_s=readout, rank=0,
    ) for p, st, extent, n, tr, m, ts in zip(protocols, stats.tolist(), extents_mm, counts, trs, merit.tolist(),
                                              tsnr.tolist())]


def _rank_key(row: PlanRow, ranking: str = "retention"):
    first = (-row.merit,) if ranking == "efficiency" else ()
    return first + (-row.roi_median, row.roi_percent_below, -row.brain_median, row.brain_percent_below,
                    row.tr_s, row.thickness_mm, row.te_s, abs(row.tilt_deg))


def rank(rows: list[PlanRow], ranking: str = "retention") -> list[PlanRow]:
    """Rows sorted best first, each with its 1-based ``rank``.

    ``ranking='retention'``: ROI median (descending), ROI percentage under the threshold, brain
    median, brain percentage, TR. ``'efficiency'``: the figure of merit first, then the same.
    """
    ordered = sorted(rows, key=lambda r: _rank_key(r, ranking))
    return [dataclasses.replace(row, rank=i) for i, row in enumerate(ordered, 1)]


def recommend(rows: list[PlanRow], *, tolerance: float = 0.01, threshold: float = 0.5,
              ranking: str = "retention") -> tuple[PlanRow, str]:
    """Pick one protocol and give the reason in one sentence.

    Among rows that fit the TR limit (all rows if none does), those whose ranked figure (ROI
    median, or the relative merit with ``ranking='efficiency'``) is within `tolerance` of the
    best are candidates; the one with the fewest brain voxels under the threshold wins, then the
    shortest TR, then the better figure.

    Returns
    -------
    (row, reason)
    """
    if not rows:
        raise InputError("no protocols to choose from")
    pool = [r for r in rows if r.fits_tr]
    limited = bool(pool) and len(pool) < len(rows)
    pool = pool or list(rows)
    figure = (lambda r: r.merit) if ranking == "efficiency" else (lambda r: r.roi_median)
    best = max(figure(r) for r in pool)
    candidates = [r for r in pool if figure(r) >= best - tolerance]
    choice = min(candidates, key=lambda r: (r.brain_percent_below, r.tr_s, -figure(r), _rank_key(r, ranking)))
    what = "BOLD sensitivity" if choice.metric == "bold_sensitivity" else "signal retention"
    lead = (f"{choice.protocol} has {choice.merit:.2f} of the best BOLD contrast-to-noise per unit time "
            f"(modelled tSNR {choice.tsnr:.0f}) with" if ranking == "efficiency" else f"{choice.protocol} keeps")
    reason = (f"{lead} a median {what} of {choice.roi_median:.2f} in the region of interest "
              f"({choice.roi_percent_below:.1f}% of its voxels under {threshold:g}), within {tolerance:g} of the "
              f"best of {len(pool)} {'protocols fitting the TR limit' if limited else 'protocols'}, with the fewest "
              f"whole-brain voxels under {threshold:g} ({choice.brain_percent_below:.1f}%) among those and "
              f"{choice.n_slices} slices at TR {choice.tr_s:.2f} s.")
    if not any(r.fits_tr for r in rows):
        reason += " No protocol fits the TR limit: fewer slices, multiband or a longer limit would."
    return choice, reason

# --------------------------------------------------------------------------- figure


def plot_tradeoffs(rows: list[PlanRow], path=None, *, recommended: PlanRow | None = None, title: str | None = None,
                   ranking: str = "retention", modelled: bool = False):
    """Trade-off figure of a sweep (:func:`fieldfix.report.figures.tradeoff_figure`), written
    as a PNG to `path` when given.

    Parameters
    ----------
    rows : list of PlanRow
        Output of :func:`sweep`.
    path : str or Path, optional
        Where to write a PNG.
    recommended : PlanRow, optional
        Row to highlight (default: the first row).
    ranking : {'retention', 'efficiency'}
        The figure plotted: ROI median of the metric, or the relative BOLD figure of merit.
    modelled : bool
        Say in the title that the field was modelled.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from .report.figures import tradeoff_figure

    fig = tradeoff_figure(rows, recommended=recommended, title=title, ranking=ranking, modelled=modelled)
    if path is not None:
        fig.savefig(str(path), dpi=100)
    return fig
