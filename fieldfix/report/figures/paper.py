"""The figure for papers (``report_summary.png``): one chosen slice per map, every panel
with its orientation letters, its slice position in mm and its colour bar with the unit.

Examples
--------
>>> import numpy as np
>>> from fieldfix.report.orientation import DisplayGrid
>>> from fieldfix.report.figures.panels import Scale
>>> grid = DisplayGrid.of((6, 6, 4), np.eye(4))
>>> panel = PaperPanel("B0 field", grid, grid.show(np.zeros((6, 6, 4))), 1, Scale("cividis", -5, 5, label="Hz"))
>>> len(summary_figure([panel]).axes)  # the panel and its colour bar
2
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..orientation import DisplayGrid
from .style import new_figure
from .panels import Layers, Scale, draw_axial

__all__ = ["PaperPanel", "summary_figure"]


@dataclass(frozen=True)
class PaperPanel:
    """One panel of the figure for papers (volume in display order)."""

    title: str
    grid: DisplayGrid
    volume: np.ndarray
    k: int
    scale: Scale
    layers: Layers = field(default_factory=Layers)


def summary_figure(panels: list[PaperPanel], *, title: str = ""):
    """Panels in rows of three, each with a colour bar under it when its scale has a label."""
    columns = min(max(len(panels), 1), 3)
    rows = max(math.ceil(len(panels) / columns), 1)
    cell_w, bar_h, title_h = 2.6, 0.55, 0.3
    heights = [max(p.grid.aspect() for p in panels[r * columns:(r + 1) * columns]) * cell_w
               for r in range(rows)] if panels else [cell_w]
    total_h = sum(heights) + rows * (bar_h + title_h) + (0.45 if title else 0.15)
    fig = new_figure(columns * cell_w + 0.3, total_h)
    top = total_h - (0.45 if title else 0.15)
    for r in range(rows):
        for c, panel in enumerate(panels[r * columns:(r + 1) * columns]):
            h = panel.grid.aspect() * cell_w
            left = (0.15 + c * cell_w + 0.06) / fig.get_figwidth()
            bottom = (top - title_h - h) / total_h
            ax = fig.add_axes((left, bottom, (cell_w - 0.12) / fig.get_figwidth(), h / total_h))
            image = draw_axial(ax, panel.grid, panel.volume, panel.k, panel.scale, panel.layers)
            ax.set_title(panel.title, fontsize=9, parse_math=False, pad=3)
            if panel.scale.label:
                cax = fig.add_axes((left + 0.1 / fig.get_figwidth(), bottom - 0.2 / total_h,
                                    (cell_w - 0.32) / fig.get_figwidth(), 0.09 / total_h))
                bar = fig.colorbar(image, cax=cax, orientation="horizontal")
                if panel.scale.ticks is not None:
                    bar.set_ticks(list(panel.scale.ticks))
                    bar.set_ticklabels([f"{t:g}" for t in panel.scale.ticks])
                if panel.scale.log:
                    bar.ax.minorticks_off()
                bar.ax.tick_params(labelsize=6.5, length=2, pad=1)
                bar.set_label(panel.scale.label, fontsize=7, labelpad=1)
                bar.ax.xaxis.label.set_parse_math(False)
        top -= heights[r] + bar_h + title_h
    if title:
        fig.suptitle(title, fontsize=10.5, parse_math=False, y=1 - 0.12 / total_h, va="top")
    return fig
