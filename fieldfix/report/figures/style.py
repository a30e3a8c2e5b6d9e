"""Colours, text and PNG output shared by every figure (matplotlib, Agg canvas, no pyplot).

Colour maps are chosen to stay readable with the common colour-vision deficiencies:
signed maps (field, shift, difference) use fieldfix's own blue-orange map, built in CIELAB
with equal lightness steps on both sides of a light neutral centre (L* 97 to 32) and hues
on the blue-yellow axis, which red-green deficiencies keep (common practice, no source);
the Jacobian uses ColorBrewer's brown-teal 'BrBG' (Brewer and Harrower, ColorBrewer 2.0,
marked colour-blind safe there; from memory) on a logarithmic scale centred on 1;
fractions (retention, BOLD sensitivity) use 'cividis' (Nunez, Anderton and Renslow 2018,
PLoS ONE 13:e0199239), designed for deuteranopia. Line colours come from the Okabe-Ito
palette (common practice, no source). Lightness symmetry and monotony are checked in the
tests with scikit-image's CIELAB conversion.

Every text built from a dataset (a run or folder name) is drawn literally: math text is
off (:func:`literal`), so ``$x^2$`` stays ``$x^2$`` and cannot break the figure.
"""

from __future__ import annotations

import functools
import io as _stdio

import numpy as np

__all__ = ["SIGNED", "RATIO", "FRACTION", "GREY", "BACKGROUND", "EDGE_COLOUR", "FOLD_COLOUR", "PROFILE_COLOUR",
           "LINE_COLOURS", "literal", "figure_png", "new_figure", "text_literal", "colormap"]

SIGNED = "fieldfix-blue-orange"
RATIO = "BrBG"
FRACTION = "cividis"
GREY = "gray"
BACKGROUND = "#1b1f27"  # outside the mask: not a value of any scale
EDGE_COLOUR = "#ffd21f"  # reference edges drawn on EPI panels
FOLD_COLOUR = "#ff2bd6"  # folded voxels
PROFILE_COLOUR = "#7dff3a"  # the line of the profile
#: Okabe-Ito blue, vermillion, bluish green, reddish purple, sky blue, orange, yellow
LINE_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#56B4E9", "#E69F00", "#F0E442")


@functools.lru_cache(maxsize=None)
def _blue_orange():
    from matplotlib.colors import ListedColormap
    from skimage.color import lab2rgb

    t = np.linspace(-1.0, 1.0, 256)
    lightness = 97.0 - 65.0 * np.abs(t)
    a = np.where(t < 0, -8.0 * t, 30.0 * t)
    b = np.where(t < 0, 52.0 * t, 62.0 * t)
    rgb = np.clip(lab2rgb(np.stack([lightness, a, b], axis=-1)[None])[0], 0.0, 1.0)
    return ListedColormap(rgb, name=SIGNED)


def colormap(name: str):
    """A colour map by name: fieldfix's own (:data:`SIGNED`) or one of matplotlib's.

    Examples
    --------
    >>> colormap(SIGNED).N, colormap("cividis").name
    (256, 'cividis')
    """
    import matplotlib

    return _blue_orange() if name == SIGNED else matplotlib.colormaps[name]


def literal(text) -> str:
    """Text for matplotlib with every dollar sign escaped, so it is never read as math.

    Examples
    --------
    >>> literal("run $x^2$")
    'run \\\\$x^2\\\\$'
    """
    return str(text).replace("$", r"\$")


def text_literal(artist) -> None:
    """Turn math text off on a text artist (a tick label, a legend entry)."""
    artist.set_parse_math(False)


def new_figure(width_in: float, height_in: float, dpi: int = 100):
    """A matplotlib Figure on an Agg canvas (no global state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width_in, height_in), dpi=dpi)
    FigureCanvasAgg(fig)
    fig.patch.set_facecolor("white")
    return fig


def figure_png(fig, *, dpi: int = 100) -> bytes:
    """Render a figure to PNG bytes."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if fig.canvas is None or not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    buffer = _stdio.BytesIO()
    fig.savefig(buffer, format="png", dpi=dpi, facecolor=fig.get_facecolor())
    return buffer.getvalue()
