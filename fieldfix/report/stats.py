"""Small numbers the report needs beside the jobs' own: colour limits, masks, coverage.

Colour scales are fitted to the data: a signed map gets ``[-L, L]`` with ``L`` a
percentile of ``|values|`` rounded up to a short number (:func:`symmetric_limit`); the
Jacobian, a ratio, gets ``[1/k, k]`` on a logarithmic scale so that halving and doubling
look equally strong (:func:`jacobian_limit`); grey images share one percentile window
(:func:`intensity_limits`).

Examples
--------
>>> symmetric_limit([-37.0, 12.0, 20.0], percentile=100)
40.0
>>> jacobian_limit([0.5, 1.0, 1.8], percentile=100)
2.0
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

__all__ = ["nice_ceiling", "symmetric_limit", "jacobian_limit", "intensity_limits", "otsu_level", "otsu_mask",
           "mask_coverage", "finite_or_none"]

_STEPS = (1.0, 1.2, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0, 10.0)


def finite_or_none(value) -> float | None:
    """A float, or None for None, NaN and infinities."""
    if value is None:
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def nice_ceiling(value: float) -> float:
    """The smallest of 1, 1.2, 1.5, 2, 2.5, 3, 4, 5, 6, 8 times a power of ten that is >= `value`.

    Examples
    --------
    >>> nice_ceiling(52.0), nice_ceiling(0.23), nice_ceiling(180.0)
    (60.0, 0.25, 200.0)
    """
    if not value > 0:
        return 1.0
    power = 10.0 ** math.floor(math.log10(value))
    for step in _STEPS:
        if step * power >= value * (1 - 1e-12):
            return float(step * power)
    return float(10 * power)  # pragma: no cover


def symmetric_limit(values, percentile: float = 99.0) -> float:
    """A limit L for a signed map so that its colour scale is ``[-L, L]``.

    L is the `percentile` of ``|values|`` (NaN ignored) rounded up by :func:`nice_ceiling`;
    never zero. The 99th percentile keeps a few extreme voxels (next to an air cavity) from
    washing out the rest of the brain.
    """
    values = np.abs(np.asarray(values, float))
    values = values[np.isfinite(values)]
    top = float(np.percentile(values, percentile)) if values.size else 0.0
    return nice_ceiling(top) if top > 0 else 1.0


def jacobian_limit(jacobian, percentile: float = 99.0) -> float:
    """The factor k of a Jacobian scale ``[1/k, k]`` (logarithmic, centred on 1).

    k is ``exp`` of the `percentile` of ``|log J|`` over positive values, rounded up to
    1.25, 1.5, 2, 3, 4, 6 or 10 (at least 1.25). Folded voxels (J <= 0) are shown by their
    own overlay, not by the scale.
    """
    values = np.asarray(jacobian, float)
    values = values[np.isfinite(values) & (values > 0)]
    spread = float(np.percentile(np.abs(np.log(values)), percentile)) if values.size else 0.0
    for k in (1.25, 1.5, 2.0, 3.0, 4.0, 6.0, 10.0):
        if math.log(k) >= spread * (1 - 1e-12):
            return k
    return 10.0


def intensity_limits(*volumes, mask=None) -> tuple[float, float]:
    """Shared grey-scale limits: 1st to 99.5th percentile of all volumes inside `mask`.

    Examples
    --------
    >>> intensity_limits(np.arange(1000.0).reshape(10, 10, 10))
    (9.99, 994.005)
    """
    pooled = []
    for volume in volumes:
        volume = np.asarray(volume, float)
        pooled.append(volume[np.asarray(mask, bool)] if mask is not None else volume.ravel())
    values = np.concatenate(pooled) if pooled else np.zeros(0)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return 0.0, 1.0
    low, high = np.percentile(values, [1, 99.5])
    return float(low), float(high if high > low else low + 1.0)


def otsu_level(volume) -> float | None:
    """Otsu's threshold of a volume (Otsu 1979, IEEE Trans Syst Man Cybern, via
    :func:`skimage.filters.threshold_otsu`); None when the volume is constant."""
    from skimage.filters import threshold_otsu

    volume = np.asarray(volume, float)
    finite = volume[np.isfinite(volume)]
    if finite.size == 0 or finite.min() == finite.max():
        return None
    return float(threshold_otsu(finite))


def otsu_mask(volume) -> np.ndarray:
    """Voxels above Otsu's threshold, closed and with holes filled (our rule)."""
    level = otsu_level(volume)
    if level is None:
        return np.ones(np.shape(volume), bool)
    return ndimage.binary_fill_holes(ndimage.binary_closing(np.asarray(volume) > level, iterations=2))


def mask_coverage(mask, magnitude) -> float | None:
    """Fraction (0 to 1) of the bright part of a magnitude image (above Otsu's threshold)
    that a mask covers; the rule is ours. None when the magnitude is constant.

    Examples
    --------
    >>> magnitude = np.zeros((10, 1, 1)); magnitude[:6] = 100.0
    >>> mask = np.zeros((10, 1, 1), bool); mask[:3] = True
    >>> mask_coverage(mask, magnitude)
    0.5
    """
    level = otsu_level(magnitude)
    if level is None:
        return None
    bright = np.asarray(magnitude, float) > level
    n_bright = int(np.count_nonzero(bright))
    if n_bright == 0:
        return None
    return float(np.count_nonzero(bright & np.asarray(mask, bool)) / n_bright)
