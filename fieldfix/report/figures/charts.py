"""Charts: the field histogram, the line profile, the plan's trade-offs and the group strips.

:func:`tradeoff_figure` is the planning job's figure (``plan.png``; :func:`fieldfix.plan.plot_tradeoffs`
calls it) and :func:`group_figure` the batch's figure across subjects; both live here so
that every figure of fieldfix shares one look.

Examples
--------
>>> import numpy as np
>>> fig = field_histogram(np.random.default_rng(0).normal(0, 20, 500), limit_hz=60.0, unaliased_hz=203.0)
>>> fig.axes[0].get_xlabel()
'field (Hz)'
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from .style import LINE_COLOURS, literal, new_figure, text_literal

__all__ = ["field_histogram", "Profile", "profile_figure", "tradeoff_figure", "group_figure"]


def _tidy(ax) -> None:
    ax.grid(True, color="#e3e6ea", lw=0.6)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(labelsize=8)


def field_histogram(field_hz: np.ndarray, *, limit_hz: float, unaliased_hz: float | None = None):
    """Histogram of the field inside the mask, the central 98% shaded, the unaliased range marked."""
    values = np.asarray(field_hz, float)
    values = values[np.isfinite(values)]
    span = 1.25 * limit_hz
    fig = new_figure(4.6, 2.5)
    ax = fig.add_axes((0.13, 0.2, 0.83, 0.68))
    ax.hist(np.clip(values, -span, span), bins=81, range=(-span, span), color=LINE_COLOURS[0], alpha=0.85)
    if values.size:
        low, high = np.percentile(values, [1, 99])
        ax.axvspan(low, high, color=LINE_COLOURS[5], alpha=0.12, lw=0)
    if unaliased_hz is not None and unaliased_hz <= span:
        for side in (-1, 1):
            ax.axvline(side * unaliased_hz, color=LINE_COLOURS[1], lw=1.2, ls="--")
    ax.set_xlim(-span, span)
    ax.set_yscale("log")
    ax.set_xlabel("field (Hz)", fontsize=8.5)
    ax.set_ylabel("voxels (log scale)", fontsize=8.5)
    ax.set_title("Field inside the mask (shaded: 1st to 99th percentile)", fontsize=9, loc="left")
    _tidy(ax)
    return fig


@dataclass(frozen=True)
class Profile:
    """Intensities along one phase-encode line through the worst region of a run."""

    positions_mm: np.ndarray
    after: np.ndarray
    before: np.ndarray | None
    reference: np.ndarray | None
    shift_vox: float
    shift_mm: float
    towards: str
    point_mm: tuple


def profile_figure(profile: Profile):
    """Before, after and the reference anatomy along the line (each scaled to its 99th percentile)."""
    fig = new_figure(6.4, 2.7)
    ax = fig.add_axes((0.09, 0.19, 0.66, 0.68))
    x = profile.positions_mm
    if profile.reference is not None:
        ax.plot(x, profile.reference, color="#6b7280", lw=1.4, ls=(0, (4, 2)), label="field-map magnitude")
    if profile.before is not None:
        ax.plot(x, profile.before, color=LINE_COLOURS[1], lw=1.5, label="before correction")
    ax.plot(x, profile.after, color=LINE_COLOURS[0], lw=1.7, label="after correction")
    ax.axvline(0.0, color="#111111", lw=0.8, ls=":")
    ax.set_xlabel(f"position along the phase-encode axis (mm, + towards {profile.towards})", fontsize=8.5)
    ax.set_ylabel("intensity / 99th percentile", fontsize=8.5)
    point = ", ".join(f"{v:.1f}" for v in profile.point_mm)
    ax.set_title(f"Through the largest shift ({profile.shift_vox:+.1f} voxels, {profile.shift_mm:+.1f} mm) "
                 f"at ({point}) mm", fontsize=8.5, loc="left")
    legend = ax.legend(fontsize=7.5, frameon=False, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    for text in legend.get_texts():
        text_literal(text)
    _tidy(ax)
    return fig


# ----------------------------------------------------------------------------- plan trade-offs

def _metric_words(row) -> str:
    return "BOLD sensitivity" if row.metric == "bold_sensitivity" else "retention"


def _label_offset(ax, x: float, y: float, xs, ys) -> tuple[float, float]:
    """A label offset (points) towards the emptiest quadrant around (x, y)."""
    xs, ys = np.asarray(xs, float), np.asarray(ys, float)
    xr = np.ptp(xs) or 1.0
    yr = np.ptp(ys) or 1.0
    best, offset = None, (30.0, -30.0)
    for dx, dy in ((1, 1), (1, -1), (-1, 1), (-1, -1)):
        near = np.count_nonzero(((xs - x) * dx / xr > 0) & ((xs - x) * dx / xr < 0.5)
                                & ((ys - y) * dy / yr > 0) & ((ys - y) * dy / yr < 0.5))
        if best is None or near < best:
            best, offset = near, (32.0 * dx, 26.0 * dy)
    return offset


def _against(ax, rows, rec, x, others, xlabel, colour, thicknesses, ylabel, y):
    """`x`, `y`: the plotted numbers of a row; lines join rows that differ from `rec` only in `x`
    (the fields `others` equal to the recommended row's)."""
    for d in thicknesses:
        sel = sorted((r for r in rows if r.thickness_mm == d and all(getattr(r, k) == getattr(rec, k) for k in others)),
                     key=x)
        if sel:
            ax.plot([x(r) for r in sel], [y(r) for r in sel], "-o", color=colour[d], ms=3.5, lw=1.6)
    ax.axvline(x(rec), color="#9aa0a6", lw=0.8, ls=":")
    ax.plot([x(rec)], [y(rec)], "o", ms=11, mfc="none", mec="#111111", mew=1.3)
    ax.set_xlabel(xlabel, fontsize=8.5)
    ax.set_ylabel(ylabel, fontsize=8.5)
    _tidy(ax)


def _scatter(ax, rows, rec, xkey, ykey, colour, thicknesses, xlabel, ylabel):
    for sign, marker in ((1, "^"), (-1, "v"), (0, "o")):
        for d in thicknesses:
            sel = [r for r in rows if r.thickness_mm == d and r.pe_sign == sign]
            if sel:
                ax.scatter([xkey(r) for r in sel], [ykey(r) for r in sel], s=16, marker=marker,
                           color=colour[d], alpha=0.75, linewidths=0)
    x, y = xkey(rec), ykey(rec)
    ax.plot([x], [y], "o", ms=13, mfc="none", mec="#111111", mew=1.4)
    xs = np.array([xkey(r) for r in rows], float)
    dx, dy = _label_offset(ax, x, y, xs, [ykey(r) for r in rows])
    if x > xs.min() + 0.7 * (np.ptp(xs) or 1.0):  # keep the label inside the panel
        dx = -abs(dx)
    ax.annotate("recommended", (x, y), xytext=(dx, dy), textcoords="offset points",
                fontsize=8, ha="left" if dx > 0 else "right", va="bottom" if dy > 0 else "top",
                arrowprops={"arrowstyle": "-", "color": "#111111", "lw": 0.8},
                bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.85, "pad": 1.5})
    ax.set_xlabel(xlabel, fontsize=8.5)
    ax.set_ylabel(ylabel, fontsize=8.5)
    _tidy(ax)


def _covered_mm(row) -> float:
    return row.n_slices * row.thickness_mm


def tradeoff_figure(rows: Sequence, *, recommended=None, title: str | None = None,
                    ranking: str = "retention", modelled: bool = False):
    """Trade-offs of a protocol sweep (the :class:`fieldfix.outputs.PlanRow` of :func:`fieldfix.plan.sweep`).

    The figure ranked by (ROI median of the metric, or the relative BOLD contrast-to-noise per
    unit time with ``ranking='efficiency'``): (a) against slice tilt and (b) against echo time,
    one line per slice thickness at the recommended protocol's other settings; (c) every
    protocol against its TR and (d) against the slab its slices cover (slices x thickness),
    marker by phase-encode polarity. The recommended protocol is ringed in every panel; one
    legend serves all four, above them.
    """
    from matplotlib.lines import Line2D

    from ...errors import InputError

    if not rows:
        raise InputError("no protocols to plot")
    rec = recommended or rows[0]
    efficiency = ranking == "efficiency"
    y = (lambda r: r.merit) if efficiency else (lambda r: r.roi_median)
    ylabel = ("BOLD CNR per unit time (relative, best = 1)" if efficiency
              else f"ROI median {_metric_words(rec)} (0\u20131)")
    thicknesses = sorted({r.thickness_mm for r in rows})
    colour = {d: LINE_COLOURS[i % len(LINE_COLOURS)] for i, d in enumerate(thicknesses)}
    n_panels = 4
    fig = new_figure(15.0, 4.6)
    width = 0.94 / n_panels
    axes = [fig.add_axes((0.05 + i * width, 0.14, width * 0.78, 0.62)) for i in range(n_panels)]
    _against(axes[0], rows, rec, lambda r: r.tilt_deg, ("te_s", "pe_sign", "zshim_mtms_per_m"), "slice tilt (\u00b0)",
             colour, thicknesses, ylabel, y)
    _against(axes[1], rows, rec, lambda r: r.te_s * 1e3, ("tilt_deg", "pe_sign", "zshim_mtms_per_m"), "echo time (ms)",
             colour, thicknesses, ylabel, y)
    _scatter(axes[2], rows, rec, lambda r: r.tr_s, y, colour, thicknesses, "TR (s)", ylabel)
    _scatter(axes[3], rows, rec, _covered_mm, y, colour, thicknesses, "slab covered: slices \u00d7 thickness (mm)",
             ylabel)
    for axis, text in zip(axes, ("(a) against slice tilt", "(b) against echo time", "(c) against time",
                                      "(d) against coverage")):
        axis.set_title(text, loc="left", fontsize=9.5)
    handles = [Line2D([], [], color=colour[d], marker="o", lw=1.6, ms=4, label=f"{d:g} mm slices")
               for d in thicknesses]
    polarities = {r.pe_sign for r in rows}
    if 1 in polarities or -1 in polarities:
        handles += [Line2D([], [], ls="", marker="^", color="#444444", label="PE polarity +"),
                    Line2D([], [], ls="", marker="v", color="#444444", label="PE polarity \u2212")]
    handles.append(Line2D([], [], ls="", marker="o", ms=10, mfc="none", mec="#111111", label="recommended"))
    fig.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.9), ncol=len(handles), fontsize=8,
               frameon=False)
    field = " (modelled field, no field map)" if modelled else ""
    fig.suptitle(literal(title or f"Protocol trade-offs{field}; recommended: {rec.protocol}"), fontsize=11,
                 y=0.985)
    fig.text(0.995, 0.005, "fieldfix prediction for planning; research software, not a medical device",
             ha="right", va="bottom", fontsize=7, color="#6b7280")
    return fig


# ----------------------------------------------------------------------------- group strips

_GROUP_PANELS = (("max_abs_shift_vox", "largest shift (voxels)"),
                 ("retention_percent_below_threshold", "predicted dropout (% of mask voxels)"),
                 ("edge_agreement_gain", "edge agreement gain by the correction (NGF, 0\u20131)"))


def group_figure(rows: Sequence, *, title: str = "Runs across subjects"):
    """Strip plots of each measured quantity of :class:`fieldfix.outputs.GroupRow` rows across
    subjects (one dot per row); None when nothing was measured. Subjects with a failed run are marked.
    The batch's group figure and the report's (several subjects) are this one."""
    panels = [(key, label) for key, label in _GROUP_PANELS if any(getattr(r, key) is not None for r in rows)]
    if not panels:
        return None
    subjects = sorted({r.subject for r in rows})
    fig = new_figure(3.7 * len(panels), 3.3)
    for i, (key, label) in enumerate(panels):
        ax = fig.add_axes((0.08 / len(panels) + i / len(panels), 0.3, 0.78 / len(panels), 0.55))
        for x, subject in enumerate(subjects):
            values = [getattr(r, key) for r in rows if r.subject == subject and getattr(r, key) is not None]
            offsets = [x + 0.08 * (n - (len(values) - 1) / 2) for n in range(len(values))]
            ax.plot(offsets, values, "o", color=LINE_COLOURS[0], ms=6)
            if any(r.subject == subject and r.status == "failed" for r in rows):
                ax.annotate("failed", (x, 0.02), xycoords=("data", "axes fraction"), ha="center", fontsize=7,
                            color=LINE_COLOURS[1])
        if key == "edge_agreement_gain":
            ax.axhline(0.0, color="#6b7280", lw=0.8)
        else:
            top = max([getattr(r, key) for r in rows if getattr(r, key) is not None] + [0.0])
            ax.set_ylim(0.0, top * 1.15 if top > 0 else 1.0)
        ax.set_xticks(range(len(subjects)), [f"sub-{s}" if s.isalnum() else s for s in subjects], rotation=40,
                      ha="right")  # a BIDS label as its folder name
        for tick in ax.get_xticklabels():
            text_literal(tick)
        ax.set_xlim(-0.6, len(subjects) - 0.4)
        ax.set_title(label, fontsize=8.5)
        _tidy(ax)
    fig.suptitle(literal(title) + " (research software, not a medical device)", fontsize=9.5)
    return fig
