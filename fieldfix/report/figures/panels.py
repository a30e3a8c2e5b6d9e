"""Axial panels: one display slice of a volume, its overlays, letters and position.

A panel is rasterised once by :func:`panel_rgba` (a matplotlib colour map applied to the
slice, voxels as crisp squares of the right aspect, overlays blended in): the page embeds
that picture as it is, with the orientation letters and the slice position as text over
it, and :func:`draw_axial` draws the same picture into a matplotlib axes (the figure for
papers) with the letters and the position drawn in. A fraction of the picture's width and
height maps to world millimetres linearly (:meth:`DisplayGrid.panel_map`, used by the
page's crosshair).

Examples
--------
>>> import numpy as np
>>> from fieldfix.report.orientation import DisplayGrid
>>> grid = DisplayGrid.of((6, 6, 4), np.eye(4))
>>> fig = panel_figure(grid, grid.show(np.ones((6, 6, 4))), 2, Scale("gray", 0.0, 2.0))
>>> sorted(t.get_text() for t in fig.axes[0].texts)
['A', 'L', 'P', 'R', 'z = 2.0 mm']
"""

from __future__ import annotations

import io as _stdio
from dataclasses import dataclass

import numpy as np

from ..orientation import DisplayGrid
from .style import BACKGROUND, EDGE_COLOUR, FOLD_COLOUR, PROFILE_COLOUR, colormap, figure_png, new_figure

__all__ = ["Scale", "Layers", "panel_rgba", "draw_axial", "panel_figure", "panel_png", "colourbar_png",
           "reference_edges", "pick_slices", "worst_slices", "PANEL_PX", "EDGE_UPSAMPLE"]

PANEL_WIDTH_IN = 2.3
#: Width of a page panel in pixels at 100 dpi (scaled with the resolution).
PANEL_PX = 240
#: Edges are found and drawn on a grid this many times finer than the voxels.
EDGE_UPSAMPLE = 4


@dataclass(frozen=True)
class Scale:
    """A colour scale: map name, limits, logarithmic or not, and its label with the unit."""

    cmap: str
    vmin: float
    vmax: float
    log: bool = False
    label: str = ""
    ticks: tuple | None = None

    def norm(self):
        from matplotlib.colors import LogNorm, Normalize

        return LogNorm(self.vmin, self.vmax) if self.log else Normalize(self.vmin, self.vmax)

    def colormap(self):
        return colormap(self.cmap).with_extremes(bad=BACKGROUND)

    def mappable(self):
        """A matplotlib ScalarMappable of this scale (for a colour bar)."""
        from matplotlib.cm import ScalarMappable

        return ScalarMappable(norm=self.norm(), cmap=self.colormap())


@dataclass(frozen=True)
class Layers:
    """What is drawn over a panel's base image (display order)."""

    mask: np.ndarray | None = None  # False: drawn as background
    edges: dict | None = None  # display slice -> fine-grid edge map of the reference (see reference_edges)
    overlay: np.ndarray | None = None  # True: folded voxel
    line: tuple | None = None  # (display axis of the line, display index (i, j, k)) for a profile


def pick_slices(mask_display: np.ndarray | None, n_slices: int, *, focus: np.ndarray | None = None,
                n_z: int | None = None, count: bool = False) -> list[int]:
    """Display slices spread over the mask, one of them where `focus` (display order) peaks.

    With ``count=True`` the peak is the slice where `focus` (a boolean map) is true most
    often, for example the slice with the most voxels under a retention threshold.

    Examples
    --------
    >>> focus = np.zeros((4, 4, 20)); focus[1, 1, 2] = 9.0
    >>> 2 in pick_slices(np.ones((4, 4, 20), bool), 4, focus=focus)
    True
    """
    if mask_display is not None and np.any(mask_display):
        z = np.nonzero(np.any(mask_display, axis=(0, 1)))[0]
        low, high = int(z.min()), int(z.max())
    else:
        n = n_z if n_z is not None else (focus.shape[2] if focus is not None else 1)
        low, high = 0, n - 1
    if high - low + 1 <= n_slices:
        chosen = list(range(low, high + 1))
    else:
        positions = np.linspace(low + 0.15 * (high - low), high - 0.15 * (high - low), n_slices)
        chosen = sorted({int(round(p)) for p in positions})
    if focus is not None:
        strength = np.abs(np.nan_to_num(np.asarray(focus, float)))
        if mask_display is not None:
            strength = np.where(mask_display, strength, 0.0)
        per_slice = strength.sum(axis=(0, 1)) if count else strength.max(axis=(0, 1))
        if per_slice.max() > 0:
            peak = int(np.argmax(per_slice))
            if peak not in chosen:
                chosen[min(range(len(chosen)), key=lambda n: abs(chosen[n] - peak))] = peak
    return sorted(set(chosen))


def worst_slices(flag_display: np.ndarray, mask_display: np.ndarray | None, n_slices: int, *,
                 spacing: int = 2) -> list[int]:
    """The display slices where `flag_display` (display order) is true most often, at least
    `spacing` slices apart, completed by slices spread over the mask when too few are flagged.

    Examples
    --------
    >>> flag = np.zeros((3, 3, 12), bool); flag[:, :, 3] = flag[0, :, 4] = flag[0, 0, 9] = True
    >>> worst_slices(flag, None, 2)
    [3, 9]
    """
    counts = np.asarray(flag_display, bool).sum(axis=(0, 1))
    chosen: list[int] = []
    for k in np.argsort(-counts, kind="stable"):
        if counts[k] == 0 or len(chosen) == n_slices:
            break
        if all(abs(int(k) - c) >= spacing for c in chosen):
            chosen.append(int(k))
    for k in pick_slices(mask_display, n_slices, n_z=len(counts)):
        if len(chosen) < n_slices and all(abs(k - c) >= spacing for c in chosen):
            chosen.append(k)
    return sorted(chosen)


def reference_edges(reference_display: np.ndarray, k: int, upsample: int = EDGE_UPSAMPLE) -> np.ndarray:
    """Edges of the reference anatomy in display slice `k`, on a grid `upsample` times finer
    (so that they are drawn as thin lines): Canny (1986, IEEE TPAMI 8:679-698) via
    :func:`skimage.feature.canny` on the linearly upsampled slice, Gaussian width one voxel,
    hysteresis on the 75th / 90th percentiles of the gradient (our choice)."""
    from scipy.ndimage import zoom
    from skimage.feature import canny

    plane = np.nan_to_num(np.asarray(reference_display[:, :, k], float))
    fine = zoom(plane, upsample, order=1)
    if fine.max() <= fine.min():
        return np.zeros(fine.shape, bool)
    fine = (fine - fine.min()) / (fine.max() - fine.min())
    return canny(fine, sigma=float(upsample), low_threshold=0.75, high_threshold=0.90, use_quantiles=True)


def _pixels(grid: DisplayGrid, nx: int, ny: int, width_px: int) -> tuple[int, int]:
    zx, zy, _ = grid.zooms
    width = max(int(width_px), nx)
    return width, max(int(round(width * (ny * zy) / (nx * zx))), 1)


def _blend(rgba: np.ndarray, where: np.ndarray, colour: str, alpha: float = 1.0) -> None:
    import matplotlib

    rgb = np.asarray(matplotlib.colors.to_rgb(colour))
    rgba[where, :3] = (1 - alpha) * rgba[where, :3] + alpha * rgb


def _onto(plane: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """A (y, x) array in display order sampled onto picture rows (top first) and columns."""
    return plane[::-1][rows][:, cols]


def _line(rgba, line, k, rows, cols, ny) -> None:
    """The profile's line, dashed, on the picture of slice `k` (picture row r shows display
    row ``ny - 1 - rows[r]``, picture column c display column ``cols[c]``)."""
    axis, (i0, j0, k0) = line
    if int(k0) != k or axis not in (0, 1):
        return
    height, width = rgba.shape[:2]
    where = np.zeros((height, width), bool)
    if axis == 0:  # along the display x axis, at display row j0
        hit = np.flatnonzero(ny - 1 - rows == j0)
        if hit.size:
            where[int(hit.mean()), :] = (np.arange(width) // 6) % 2 == 0
    else:
        hit = np.flatnonzero(cols == i0)
        if hit.size:
            where[:, int(hit.mean())] = (np.arange(height) // 6) % 2 == 0
    _blend(rgba, where, PROFILE_COLOUR)


def panel_rgba(grid: DisplayGrid, volume: np.ndarray, k: int, scale: Scale, layers: Layers = Layers(), *,
               width_px: int = PANEL_PX) -> np.ndarray:
    """The picture of display slice `k`: (height, width, 4) floats in 0-1, top row first,
    subject's right on the right (display order), voxels of their true aspect."""
    nx, ny = volume.shape[0], volume.shape[1]
    k = int(min(max(k, 0), volume.shape[2] - 1))
    width, height = _pixels(grid, nx, ny, width_px)
    rows = np.minimum((np.arange(height) + 0.5) * ny / height, ny - 1).astype(int)
    cols = np.minimum((np.arange(width) + 0.5) * nx / width, nx - 1).astype(int)
    plane = np.asarray(volume[:, :, k], float).T.copy()
    if layers.mask is not None:
        plane[~np.asarray(layers.mask[:, :, k], bool).T] = np.nan
    if scale.log:
        plane[~(plane > 0)] = np.nan
    with np.errstate(invalid="ignore"):
        rgba = np.asarray(scale.colormap()(scale.norm()(np.ma.masked_invalid(_onto(plane, rows, cols)))), float)
    if layers.overlay is not None and np.any(layers.overlay[:, :, k]):
        _blend(rgba, _onto(np.asarray(layers.overlay[:, :, k], bool).T, rows, cols), FOLD_COLOUR)
    if layers.edges is not None and k in layers.edges:
        fine = np.asarray(layers.edges[k], bool).T
        fine_rows = np.minimum((np.arange(height) + 0.5) * fine.shape[0] / height, fine.shape[0] - 1).astype(int)
        fine_cols = np.minimum((np.arange(width) + 0.5) * fine.shape[1] / width, fine.shape[1] - 1).astype(int)
        _blend(rgba, _onto(fine, fine_rows, fine_cols), EDGE_COLOUR, 0.95)
    if layers.line is not None:
        _line(rgba, layers.line, k, rows, cols, ny)
    return rgba


def _letters(ax, grid: DisplayGrid, size: float) -> None:
    box = {"facecolor": "black", "alpha": 0.55, "pad": 1.2, "linewidth": 0}
    places = {"left": (0.012, 0.5, "left", "center"), "right": (0.988, 0.5, "right", "center"),
              "top": (0.5, 0.985, "center", "top"), "bottom": (0.5, 0.015, "center", "bottom")}
    for edge, letter in grid.edge_letters().items():
        x, y, ha, va = places[edge]
        ax.text(x, y, letter, transform=ax.transAxes, ha=ha, va=va, color="white", fontsize=size,
                fontweight="bold", bbox=box, parse_math=False)


def draw_axial(ax, grid: DisplayGrid, volume: np.ndarray, k: int, scale: Scale, layers: Layers = Layers(), *,
               annotate: bool = True, font_pt: float = 7.0, width_px: int = 2 * PANEL_PX):
    """Draw display slice `k` of `volume` (display order) into `ax`, filling it, with the
    orientation letters of its four edges and its slice position (`annotate`).

    Returns a ScalarMappable of the scale (for a colour bar).
    """
    ax.imshow(panel_rgba(grid, volume, k, scale, layers, width_px=width_px), interpolation="nearest",
              extent=(0.0, 1.0, 0.0, 1.0), aspect="auto")
    ax.set_xlim(0.0, 1.0)
    ax.set_ylim(0.0, 1.0)
    ax.set_axis_off()
    if annotate:
        _letters(ax, grid, font_pt)
        ax.text(0.015, 0.015, grid.slice_label(k), transform=ax.transAxes, ha="left", va="bottom", color="white",
                fontsize=font_pt, bbox={"facecolor": "black", "alpha": 0.55, "pad": 1.2, "linewidth": 0},
                parse_math=False)
    return scale.mappable()


def panel_figure(grid: DisplayGrid, volume: np.ndarray, k: int, scale: Scale, layers: Layers = Layers(), *,
                 width_in: float = PANEL_WIDTH_IN, dpi: int = 100):
    """One annotated panel in a figure of its own whose axes fill it exactly."""
    fig = new_figure(width_in, width_in * grid.aspect(), dpi)
    ax = fig.add_axes((0.0, 0.0, 1.0, 1.0))
    draw_axial(ax, grid, volume, k, scale, layers, width_px=int(width_in * dpi))
    return fig


def panel_png(grid: DisplayGrid, volume: np.ndarray, k: int, scale: Scale, layers: Layers = Layers(), *,
              dpi: int = 100) -> bytes:
    """PNG bytes of the picture of :func:`panel_rgba` (no text: the page writes it over)."""
    from matplotlib.image import imsave

    buffer = _stdio.BytesIO()
    rgba = panel_rgba(grid, volume, k, scale, layers, width_px=int(PANEL_PX * dpi / 100))
    imsave(buffer, np.clip(rgba, 0.0, 1.0), format="png")
    return buffer.getvalue()


def colourbar_png(scale: Scale, *, width_in: float = PANEL_WIDTH_IN, dpi: int = 100) -> bytes:
    """A horizontal colour bar with its label (the quantity and its unit)."""
    fig = new_figure(width_in, 0.62, dpi)
    cax = fig.add_axes((0.06, 0.62, 0.88, 0.28))
    bar = fig.colorbar(scale.mappable(), cax=cax, orientation="horizontal")
    if scale.ticks is not None:
        bar.set_ticks(list(scale.ticks))
        bar.set_ticklabels([f"{t:g}" for t in scale.ticks])
    bar.ax.tick_params(labelsize=7, length=2, pad=1)
    if scale.log:
        bar.ax.minorticks_off()
    fig.text(0.5, 0.02, scale.label, ha="center", va="bottom", fontsize=7.5, parse_math=False)
    return figure_png(fig, dpi=dpi)
