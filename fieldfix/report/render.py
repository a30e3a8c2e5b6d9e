"""The report's pictures at one resolution, drawn from the views measured once.

Maps are laid out as panel grids whose panels share one crosshair on the page: for a
run, one row per slice and one column per map (before, after, their difference, the
shift, the Jacobian); for a field map or a dropout prediction, one row per map and one
column per slice. Every panel is its own PNG carrying its orientation letters and slice
position, and its world-mm mapping for the crosshair.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .figures import style
from .figures.charts import field_histogram, profile_figure, tradeoff_figure
from .figures.paper import PaperPanel, summary_figure
from .figures.panels import Layers, Scale, colourbar_png, panel_png, pick_slices
from .view import METRIC_WORDS

__all__ = ["Panel", "GridRow", "PanelGrid", "Picture", "run_grid", "field_grid", "dropout_grid", "field_picture",
           "profile_picture", "plan_picture", "paper_panels"]


@dataclass
class Panel:
    """One panel of a grid: its picture, its world mapping, its edge letters and position."""

    png: bytes
    map: dict
    alt: str
    letters: dict
    label: str


@dataclass
class GridRow:
    label: str
    panels: list
    bar: bytes | None = None


@dataclass
class PanelGrid:
    """Panels that share a crosshair: column titles (with colour bars) and rows."""

    id: str
    headers: list
    column_bars: list
    rows: list
    caption: str
    initial: list | None = None
    columns: int = field(init=False)

    def __post_init__(self):
        self.columns = max((len(r.panels) for r in self.rows), default=1)


@dataclass
class Picture:
    id: str
    png: bytes
    caption: str
    alt: str


def _panel(grid, volume, k, scale, layers, alt, dpi) -> Panel:
    return Panel(png=panel_png(grid, volume, k, scale, layers, dpi=dpi), map=grid.panel_map(k),
                 alt=alt, letters=grid.edge_letters(), label=grid.slice_label(k))


def _run_columns(view) -> list:
    """(title, volume, scale, layers) of each column of a run's grid."""
    lo, hi = view.grey
    grey = Scale(style.GREY, lo, hi)
    epi = Layers(edges=view.edges, line=view.line)
    columns = []
    if view.before is not None:
        columns.append(("Before correction", view.before, grey, epi))
    columns.append(("After correction", view.after, grey, epi))
    if view.before is not None:
        limit = view.difference_limit
        columns.append(("After \u2212 before", view.after - view.before,
                        Scale(style.SIGNED, -limit, limit, label="intensity difference (EPI units)"),
                        Layers(mask=view.mask, line=view.line)))
    if view.shift_mm is not None:
        limit = view.shift_limit_mm
        columns.append(("Shift", view.shift_mm,
                        Scale(style.SIGNED, -limit, limit, label=f"shift (mm, + towards {view.towards})"),
                        Layers(mask=view.mask, line=view.line)))
    if view.jacobian is not None:
        k = view.jacobian_k
        columns.append(("Jacobian", view.jacobian,
                        Scale(style.RATIO, 1.0 / k, k, log=True, label="intensity factor (log scale, 1 = none)",
                              ticks=(round(1.0 / k, 3), 1.0, k)),
                        Layers(mask=view.mask, overlay=view.fold)))
    return columns


def run_grid(view, index: int, name: str, dpi: int) -> PanelGrid:
    """Before / after / difference / shift / Jacobian, one row per slice, one crosshair."""
    columns = _run_columns(view)
    rows = [GridRow(label=view.grid.slice_label(k),
                    panels=[_panel(view.grid, volume, k, scale, layers, f"{title}, {name}, {view.grid.slice_label(k)}",
                                   dpi) for title, volume, scale, layers in columns])
            for k in view.slices]
    bars = [colourbar_png(scale, dpi=dpi) if scale.label else None for _, _, scale, _ in columns]
    initial = None
    if view.line is not None:
        nx, ny, _ = view.grid.shape
        i, j, k = view.line[1]
        row = view.slices.index(k) if k in view.slices else 0
        initial = [round((i + 0.5) / nx, 4), round(1.0 - (j + 0.5) / ny, 4), row * len(columns)]
    caption = ("Grey panels share one window (1st to 99.5th percentile inside the mask); yellow: edges of the "
               "field-map magnitude (Canny) on both; dashed green: the line of the profile below; magenta: folded "
               "voxels. Move the pointer over any panel: the crosshair follows on every panel; click to hold it.")
    if view.edges is None:
        caption = caption.replace("yellow: edges of the field-map magnitude (Canny) on both; ", "")
    return PanelGrid(id=f"run{index}", headers=[c[0] for c in columns], column_bars=bars, rows=rows,
                     caption=caption, initial=initial)


def field_grid(view, index: int, name: str, dpi: int) -> PanelGrid:
    """The field map in four slices, colour scale fitted to the data."""
    limit = view.limit_hz
    scale = Scale(style.SIGNED, -limit, limit, label="B0 field (Hz)")
    layers = Layers(mask=view.mask)
    panels = [_panel(view.grid, view.field_hz, k, scale, layers, f"B0 field, {name}, {view.grid.slice_label(k)}", dpi)
              for k in view.slices]
    caption = (f"Colour scale \u00b1{limit:g} Hz: the 99th percentile of |field| inside the mask, rounded up "
               "(dark: outside the mask).")
    return PanelGrid(id=f"field{index}", headers=[], column_bars=[],
                     rows=[GridRow("B0 field", panels, colourbar_png(scale, dpi=dpi))], caption=caption)


def field_picture(view, index: int, dpi: int) -> Picture | None:
    """The histogram of the field inside the mask."""
    fig = field_histogram(view.inside_hz, limit_hz=view.limit_hz, unaliased_hz=view.unaliased_hz)
    span = 1.25 * view.limit_hz
    if view.unaliased_hz is None:
        where = "no unaliased range is known for this map"
    elif view.unaliased_hz <= span:
        where = f"dashed: the unaliased range \u00b1{view.unaliased_hz:.1f} Hz"
    else:
        where = f"the unaliased range \u00b1{view.unaliased_hz:.1f} Hz lies beyond this plot"
    return Picture(id=f"field{index}-histogram", png=style.figure_png(fig, dpi=dpi), alt="field histogram",
                   caption=f"Voxels inside the mask by field (values beyond \u00b1{span:g} Hz drawn at the edge); "
                           f"{where}.")


def dropout_grid(view, index: int, name: str, dpi: int) -> PanelGrid:
    """Retention (and BOLD sensitivity) in four slices, one of them with the most loss."""
    rows = []
    for label, values in view.maps:
        scale = Scale(style.FRACTION, 0.0, 1.0, label=f"{label} (fraction, 0\u20131)")
        panels = [_panel(view.grid, values, k, scale, Layers(mask=view.mask),
                         f"{label}, {name}, {view.grid.slice_label(k)}", dpi) for k in view.slices]
        rows.append(GridRow(label, panels, colourbar_png(scale, dpi=dpi)))
    caption = (f"The slices with the most voxels under {view.threshold:g} (fraction of signal), at least two slices "
               "apart; dark: outside the mask the job used.")
    return PanelGrid(id=f"dropout{index}", headers=[], column_bars=[], rows=rows, caption=caption)


def profile_picture(view, index: int, dpi: int) -> Picture | None:
    if view.profile is None:
        return None
    return Picture(id=f"run{index}-profile", png=style.figure_png(profile_figure(view.profile), dpi=dpi),
                   alt="line profile",
                   caption="Each curve is scaled to its own image's 99th percentile inside the mask; edges in the "
                           "right place line up with the dashed field-map magnitude.")


def plan_picture(view, record, index: int, dpi: int) -> Picture | None:
    if not view.rows:
        return None
    fig = tradeoff_figure(view.rows, recommended=view.recommended)
    return Picture(id=f"plan{index}", png=style.figure_png(fig, dpi=dpi), alt="protocol trade-offs",
                   caption=f"Predicted median {METRIC_WORDS.get(record.metric, record.metric)} in the region of "
                           f"interest for "
                           f"{record.protocols} protocols (ringed: the recommended one).")


def _nearest_slice(grid, z_mm: float) -> int:
    return int(np.argmin([abs(grid.slice_centre_mm(k)[2] - z_mm) for k in range(grid.shape[2])]))


def paper_panels(field_views, run_views, dropout_views) -> list[PaperPanel]:
    """Panels for the figure for papers: the field and the EPI before and after correction
    and the shift at the run's largest shift, the retention where the most signal is lost."""
    panels, z_mm = [], None
    if run_views:
        v = run_views[0]
        k = v.line[1][2] if v.line is not None else v.slices[len(v.slices) // 2]
        z_mm = float(v.grid.slice_centre_mm(k)[2])
        grey = Scale(style.GREY, *v.grey)
        if v.before is not None:
            panels.append(PaperPanel("EPI before correction", v.grid, v.before, k, grey, Layers(edges=v.edges)))
        panels.append(PaperPanel("EPI after correction", v.grid, v.after, k, grey, Layers(edges=v.edges)))
        if v.shift_mm is not None:
            panels.append(PaperPanel("Shift", v.grid, v.shift_mm, k, Scale(
                style.SIGNED, -v.shift_limit_mm, v.shift_limit_mm, label=f"mm, + towards {v.towards}"),
                Layers(mask=v.mask)))
    if field_views:
        v = field_views[0]
        k = _nearest_slice(v.grid, z_mm) if z_mm is not None else \
            pick_slices(v.mask, 1, focus=v.field_hz, n_z=v.field_hz.shape[2])[0]
        panels.insert(0, PaperPanel("B0 field", v.grid, v.field_hz, k,
                                    Scale(style.SIGNED, -v.limit_hz, v.limit_hz, label="Hz"), Layers(mask=v.mask)))
    if dropout_views:
        v = dropout_views[0]
        label, values = v.maps[0]
        lost = (values < v.threshold) & (v.mask if v.mask is not None else True)
        k = pick_slices(v.mask, 1, focus=lost, n_z=values.shape[2], count=True)[0]
        panels.append(PaperPanel(f"Predicted {label}", v.grid, values, k,
                                 Scale(style.FRACTION, 0.0, 1.0, label="fraction of signal"), Layers(mask=v.mask)))
    return panels[:6]


def paper_png(panels, title: str, dpi: int) -> bytes | None:
    if not panels:
        return None
    return style.figure_png(summary_figure(panels, title=title), dpi=max(dpi, 150))
