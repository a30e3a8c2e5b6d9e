"""Numba kernels of the unwarping step, each beside a plain-numpy reference.

Private module: the public entry points are in :mod:`fieldfix.unwarp`.

* ``gather`` applies an index/weight table to one volume:
  ``out[v] = sum_t weight[v, t] * source[index[v, t]]`` (flattened volumes). The
  tables already contain the interpolation weights times the Jacobian intensity weight.
  Parallel over voxels (``prange``).
* ``splat_lines`` is the forward (distorting) model: each undistorted voxel's signal is
  spread uniformly over the interval its two edges map to, and every distorted voxel
  receives the part of the interval that overlaps it. Signal is conserved exactly
  (apart from what leaves the field of view); folded intervals pile up where they land.
  Parallel over lines.

The ``*_reference`` functions compute the same thing with plain numpy; the tests
compare them against the kernels.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = ["gather", "gather_reference", "splat_lines", "splat_lines_reference"]

_MIN_WIDTH = 1e-9


@njit(cache=True, inline="always")
def _row(source, index, weight, v):  # pragma: no cover - compiled
    acc = 0.0
    for t in range(index.shape[1]):
        acc += np.float64(weight[v, t]) * source[index[v, t]]
    return acc


# Fixed tap counts let the compiler unroll the inner loop (two to three times faster).
@njit(cache=True, inline="always")
def _row2(source, index, weight, v):  # pragma: no cover - compiled
    return np.float64(weight[v, 0]) * source[index[v, 0]] + np.float64(weight[v, 1]) * source[index[v, 1]]


@njit(cache=True, inline="always")
def _row4(source, index, weight, v):  # pragma: no cover - compiled
    acc = np.float64(weight[v, 0]) * source[index[v, 0]] + np.float64(weight[v, 1]) * source[index[v, 1]]
    return acc + np.float64(weight[v, 2]) * source[index[v, 2]] + np.float64(weight[v, 3]) * source[index[v, 3]]


@njit(cache=True, inline="always")
def _row8(source, index, weight, v):  # pragma: no cover - compiled
    acc = 0.0
    for t in range(8):
        acc += np.float64(weight[v, t]) * source[index[v, t]]
    return acc


# Parallel loops (prange over voxels) and their single-threaded twins. The twins serve
# callers that already run one job per core (several processes), where extra threads
# would only compete for the same cores.
@njit(parallel=True, cache=True)
def _gather_parallel(source, index, weight, out):  # pragma: no cover - compiled
    for v in prange(index.shape[0]):
        out[v] = _row(source, index, weight, v)


@njit(parallel=True, cache=True)
def _gather2_parallel(source, index, weight, out):  # pragma: no cover - compiled
    for v in prange(index.shape[0]):
        out[v] = _row2(source, index, weight, v)


@njit(parallel=True, cache=True)
def _gather4_parallel(source, index, weight, out):  # pragma: no cover - compiled
    for v in prange(index.shape[0]):
        out[v] = _row4(source, index, weight, v)


@njit(parallel=True, cache=True)
def _gather8_parallel(source, index, weight, out):  # pragma: no cover - compiled
    for v in prange(index.shape[0]):
        out[v] = _row8(source, index, weight, v)


@njit(cache=True)
def _gather_serial(source, index, weight, out):  # pragma: no cover - compiled
    for v in range(index.shape[0]):
        out[v] = _row(source, index, weight, v)


@njit(cache=True)
def _gather2_serial(source, index, weight, out):  # pragma: no cover - compiled
    for v in range(index.shape[0]):
        out[v] = _row2(source, index, weight, v)


@njit(cache=True)
def _gather4_serial(source, index, weight, out):  # pragma: no cover - compiled
    for v in range(index.shape[0]):
        out[v] = _row4(source, index, weight, v)


@njit(cache=True)
def _gather8_serial(source, index, weight, out):  # pragma: no cover - compiled
    for v in range(index.shape[0]):
        out[v] = _row8(source, index, weight, v)


_KERNELS = {
    True: ({2: _gather2_parallel, 4: _gather4_parallel, 8: _gather8_parallel}, _gather_parallel),
    False: ({2: _gather2_serial, 4: _gather4_serial, 8: _gather8_serial}, _gather_serial),
}


def gather(source: np.ndarray, index: np.ndarray, weight: np.ndarray, out: np.ndarray | None = None, *,
           parallel: bool = True) -> np.ndarray:
    """Apply a (voxels x taps) index/weight table to a flat source volume (numba).

    Parameters
    ----------
    source : (M,) float32 or float64 array
    index : (N, T) int32 or int64 array of positions in `source`
    weight : (N, T) float32 array
    out : (N,) float32 array, optional
    parallel : bool
        Use all numba threads (prange over voxels); False runs on one thread, which is
        faster when other processes already occupy the cores.

    Returns
    -------
    (N,) float32 array
    """
    if out is None:
        out = np.empty(index.shape[0], np.float32)
    index = np.ascontiguousarray(index)
    weight = np.ascontiguousarray(weight)
    fixed, generic = _KERNELS[bool(parallel)]
    fixed.get(index.shape[1], generic)(np.ascontiguousarray(source), index, weight, out)
    return out


def gather_reference(source: np.ndarray, index: np.ndarray, weight: np.ndarray) -> np.ndarray:
    """Plain-numpy reference of :func:`gather`."""
    return (weight.astype(np.float64) * np.asarray(source, np.float64)[index]).sum(axis=1).astype(np.float32)


@njit(parallel=True, cache=True)
def _splat_kernel(values, left, right, out):  # pragma: no cover - compiled
    n_lines, n = values.shape
    for line in prange(n_lines):
        for j in range(n):
            lo = left[line, j]
            hi = right[line, j]
            if hi < lo:
                lo, hi = hi, lo
            width = hi - lo
            if width < _MIN_WIDTH:
                # A degenerate interval: its signal lands in the one voxel containing it.
                cell = int(np.floor(lo + 0.5))
                if 0 <= cell < n:
                    out[line, cell] += values[line, j]
                continue
            density = values[line, j] / width
            first = int(np.floor(lo + 0.5))
            last = int(np.floor(hi + 0.5))
            if first < 0:
                first = 0
            if last > n - 1:
                last = n - 1
            for cell in range(first, last + 1):
                a = max(lo, cell - 0.5)
                b = min(hi, cell + 0.5)
                if b > a:
                    out[line, cell] += density * (b - a)


def splat_lines(values: np.ndarray, left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """Spread each value over its mapped interval and integrate per output voxel (numba).

    Parameters
    ----------
    values : (L, N) array
        Signal of each undistorted voxel, line by line along the PE axis.
    left, right : (L, N) arrays
        Distorted positions (in voxel index units) of each voxel's two edges.

    Returns
    -------
    (L, N) float64 array: signal per distorted voxel ``[n - 0.5, n + 0.5]``.
    """
    out = np.zeros(values.shape, np.float64)
    _splat_kernel(np.ascontiguousarray(values, np.float64), np.ascontiguousarray(left, np.float64),
                  np.ascontiguousarray(right, np.float64), out)
    return out


def splat_lines_reference(values: np.ndarray, left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """Plain-numpy reference of :func:`splat_lines` (cumulative distribution per interval).

    The signal of interval j below position q is ``value_j * clip((q - lo_j) / width_j, 0, 1)``;
    the signal in voxel n is the difference of that at ``n + 0.5`` and ``n - 0.5``.
    """
    values = np.asarray(values, np.float64)
    lo = np.minimum(left, right).astype(np.float64)
    hi = np.maximum(left, right).astype(np.float64)
    width = hi - lo
    degenerate = width < _MIN_WIDTH
    n = values.shape[1]
    edges = np.arange(n + 1) - 0.5  # (n + 1,)
    safe_width = np.where(degenerate, 1.0, width)
    fraction = np.clip((edges[None, None, :] - lo[..., None]) / safe_width[..., None], 0.0, 1.0)
    # Degenerate intervals: a step at their position (all of it below q when lo < q).
    step = (edges[None, None, :] > lo[..., None]).astype(np.float64)
    fraction = np.where(degenerate[..., None], step, fraction)
    cumulative = (values[..., None] * fraction).sum(axis=1)  # (L, n + 1)
    return np.diff(cumulative, axis=1)
