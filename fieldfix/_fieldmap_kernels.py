"""Numba kernels of the field-map regularisation, each beside a plain-numpy reference.

Private module: used by :func:`fieldfix.fieldmap.find_outliers`.

* ``local_residuals_nb``: for every mask voxel, the median of the mask voxels in its
  3x3x3 neighbourhood (itself included; the mean of the two middle values for an even
  count), and the residual ``r = f - median``; then, for every mask voxel, the standard
  deviation of the residuals of its mask neighbours (itself left out). Only mask voxels
  take part, so no value from outside the mask is ever invented.

The ``*_reference`` function computes the same with plain numpy; the tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import prange

from ._kernel import kernel
from ._select_kernels import median_of

__all__ = ["local_residuals_nb", "local_residuals_reference"]


@kernel(parallel=True)
def local_residuals_nb(field, mask):  # pragma: no cover - compiled
    """Residual against the local median, and the local scale of the neighbours' residuals.

    Returns ``(residual, local_sd)``, float64 arrays, 0 outside the mask. Parallel over the
    first axis (each pass writes only its own voxels).
    """
    n0, n1, n2 = field.shape
    residual = np.zeros(field.shape)
    for i in prange(n0):
        scratch = np.empty(27)
        for j in range(n1):
            for k in range(n2):
                if not mask[i, j, k]:
                    continue
                n = 0
                for a in range(max(i - 1, 0), min(i + 2, n0)):
                    for b in range(max(j - 1, 0), min(j + 2, n1)):
                        for c in range(max(k - 1, 0), min(k + 2, n2)):
                            if mask[a, b, c]:
                                scratch[n] = field[a, b, c]
                                n += 1
                residual[i, j, k] = field[i, j, k] - median_of(scratch, n)
    local_sd = np.zeros(field.shape)
    for i in prange(n0):
        for j in range(n1):
            for k in range(n2):
                if not mask[i, j, k]:
                    continue
                n = 0
                total = 0.0
                for a in range(max(i - 1, 0), min(i + 2, n0)):
                    for b in range(max(j - 1, 0), min(j + 2, n1)):
                        for c in range(max(k - 1, 0), min(k + 2, n2)):
                            if mask[a, b, c] and not (a == i and b == j and c == k):
                                total += residual[a, b, c]
                                n += 1
                if n == 0:
                    continue
                mean = total / n
                spread = 0.0
                for a in range(max(i - 1, 0), min(i + 2, n0)):
                    for b in range(max(j - 1, 0), min(j + 2, n1)):
                        for c in range(max(k - 1, 0), min(k + 2, n2)):
                            if mask[a, b, c] and not (a == i and b == j and c == k):
                                d = residual[a, b, c] - mean
                                spread += d * d
                local_sd[i, j, k] = np.sqrt(spread / n)
    return residual, local_sd


def local_residuals_reference(field, mask):
    """Plain-numpy twin of :func:`local_residuals_nb` (27 shifted copies, NaN outside the mask)."""
    field = np.asarray(field, np.float64)
    mask = np.asarray(mask, bool)
    values = np.pad(np.where(mask, field, np.nan), 1, constant_values=np.nan)
    shifts = [(a, b, c) for a in range(3) for b in range(3) for c in range(3)]
    n0, n1, n2 = field.shape
    stack = np.stack([values[a:a + n0, b:b + n1, c:c + n2] for a, b, c in shifts])
    with np.errstate(all="ignore"):
        residual = np.where(mask, field - np.nanmedian(stack, axis=0), 0.0)
        padded = np.pad(np.where(mask, residual, np.nan), 1, constant_values=np.nan)
        others = np.stack([padded[a:a + n0, b:b + n1, c:c + n2] for a, b, c in shifts if (a, b, c) != (1, 1, 1)])
        local_sd = np.where(mask, np.nan_to_num(np.nanstd(others, axis=0)), 0.0)
    return residual, local_sd
