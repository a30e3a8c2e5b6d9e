"""Numba kernels of the unwarping step, each beside a plain-numpy reference.

Private module: the public entry points are in :mod:`fieldfix.unwarp`.

* ``gather`` applies an index/weight table to one volume:
  ``out[v] = sum_t weight[v, t] * source[index[v, t]]`` (flattened volumes). The
  tables already contain the interpolation weights times the Jacobian intensity weight.
  Parallel over voxels (``prange``).
* ``cubic_lines`` is the cubic B-spline pull-back without index tables: the volume is
  viewed as ``(outer, n, inner)`` with the phase-encode axis in the middle (any memory
  order reduces to that form). Blocks of up to ``CUBIC_LANES`` neighbouring lines (along
  ``inner``, or neighbouring contiguous lines when ``inner`` is 1) are
  copied into a small buffer laid out ``[position along the line, line]``, prefiltered
  there (float64) by the recursive cubic B-spline filter (all lines of the block at once, so the
  recursion vectorises across lines), padded by mirror reflection, and sampled with four
  taps whose weights are recomputed from one stored float32 position per voxel. The
  line stays in cache from the prefilter to the gather. Parallel over blocks.
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

__all__ = ["gather", "gather_reference", "cubic_lines", "cubic_lines_reference", "bspline_prefilter_reference",
           "splat_lines", "splat_lines_reference"]

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


# --------------------------------------------------------------------------------------
# Cubic B-spline pull-back: prefilter and gather fused per block of lines
# --------------------------------------------------------------------------------------
#: Pole of the cubic B-spline prefilter, sqrt(3) - 2 (Unser, Aldroubi & Eden 1993, IEEE
#: Trans. Signal Process. 41(2)), and its gain (1 - z)(1 - 1/z) = 6.
CUBIC_POLE = float(np.sqrt(3.0) - 2.0)
#: Lines per block: long loops over the lanes, and a block's buffers stay in the L2 cache.
CUBIC_LANES = 128
#: Terms of the causal initial sum when the line is long; |z|**28 < 1e-16.
_HORIZON = 28


@njit(cache=True, inline="always")
def _mirror_row(virtual, n):  # pragma: no cover - compiled
    """Row of the buffer holding coefficient `virtual` (mirror reflection, rows start at 1)."""
    if n == 1:
        return 1
    period = 2 * (n - 1)
    src = abs(virtual) % period
    if src >= n:
        src = period - src
    return src + 1


@njit(cache=True)
def _prefilter_block(buf, n):  # pragma: no cover - compiled
    """Cubic B-spline prefilter of the ``CUBIC_LANES`` columns of `buf`, in place.

    `buf` is ``(n + 3, CUBIC_LANES)``; rows 1..n hold six times the samples on entry and
    the coefficients on return; rows 0, n + 1, n + 2 receive the mirror-reflected
    coefficients -1, n, n + 1. Rows are taken as 1D views so that every loop runs over
    contiguous lanes, which the compiler vectorises.
    """
    z = CUBIC_POLE
    first = buf[1]
    if n > 1:
        # causal initial value, mirror boundary (d c b | a b c d | c b a)
        if n <= _HORIZON:
            z_last = z ** (n - 1)
            first += z_last * buf[n]
            zi = z
            for k in range(1, n - 1):
                first += zi * (buf[k + 1] + z_last * buf[n - k])
                zi *= z
            first /= 1.0 - z_last * z_last
        else:
            zi = z
            for k in range(1, _HORIZON):
                row = buf[k + 1]
                for t in range(row.size):
                    first[t] += zi * row[t]
                zi *= z
        for j in range(2, n + 1):  # causal recursion
            row = buf[j]
            prev = buf[j - 1]
            for t in range(row.size):
                row[t] += z * prev[t]
        factor = z / (z * z - 1.0)
        row = buf[n]
        prev = buf[n - 1]
        for t in range(row.size):  # anticausal initial value
            row[t] = (z * prev[t] + row[t]) * factor
        for j in range(n - 1, 0, -1):  # anticausal recursion
            row = buf[j]
            nxt = buf[j + 1]
            for t in range(row.size):
                row[t] = z * (nxt[t] - row[t])
    else:
        first /= 6.0
    for row, virtual in ((0, -1), (n + 1, n), (n + 2, n + 1)):
        src = 0
        if n > 1:
            period = 2 * (n - 1)
            src = abs(virtual) % period
            if src >= n:
                src = period - src
        buf[row, :] = buf[src + 1]


@njit(cache=True)
def _cubic_block(volume, position, scale, out, start, step_j, step_t, n, lanes, buf, poly):  # pragma: no cover
    """One block of `lanes` lines of length `n` in flat arrays.

    Element ``j`` of lane ``t`` is at ``start + j * step_j + t * step_t``. After the
    prefilter, the cubic on each interval ``[k, k + 1]`` of each lane is written as
    ``a0 + a1 f + a2 f^2 + a3 f^3`` with ``a0`` the sample itself (so positions on a
    sample are exact) and ``a1..a3`` in ``poly[0..2, k]``; a voxel then costs one Horner
    evaluation.
    """
    if step_t == 1:  # copy the block into rows 1..n, times the gain 6
        for j in range(n):
            src = volume[start + j * step_j:start + j * step_j + lanes]
            row = buf[j + 1]
            for t in range(lanes):
                row[t] = 6.0 * src[t]
    else:
        for t in range(lanes):
            src = volume[start + t * step_t:start + t * step_t + n]
            for j in range(n):
                buf[j + 1, t] = 6.0 * src[j]
    _prefilter_block(buf, n)
    third = 1.0 / 6.0
    for k in range(n):
        c0 = buf[k]
        c1 = buf[k + 1]
        c2 = buf[k + 2]
        c3 = buf[k + 3]
        a1 = poly[0, k]
        a2 = poly[1, k]
        a3 = poly[2, k]
        for t in range(c0.size):
            a1[t] = 0.5 * (c2[t] - c0[t])
            a2[t] = 0.5 * (c0[t] + c2[t]) - c1[t]
            a3[t] = third * (c3[t] - c0[t]) + 0.5 * (c1[t] - c2[t])
    if step_t == 1:  # lanes are neighbouring voxels: long inner loops over lanes
        for j in range(n):
            at = start + j * step_j
            for t in range(lanes):
                _horner(volume, position, scale, out, poly, at + t, t, start + t, step_j)
    else:  # lanes are contiguous lines: long inner loops along each line
        for t in range(lanes):
            at = start + t * step_t
            for j in range(n):
                _horner(volume, position, scale, out, poly, at + j, t, at, 1)


@njit(cache=True, inline="always")
def _horner(volume, position, scale, out, poly, v, t, line_start, step_j):  # pragma: no cover - compiled
    p = position[v]
    base = np.int64(p)  # positions are clipped to [0, n - 1], so this is the floor
    f = np.float64(p) - base
    cubic = poly[0, base, t] + f * (poly[1, base, t] + f * poly[2, base, t])
    out[v] = (volume[line_start + base * step_j] + f * cubic) * scale[v]


@njit(cache=True, inline="always")
def _block_start(task, blocks, n, inner):  # pragma: no cover - compiled
    """Flat start, steps and lane count of block `task` of an (outer, n, inner) volume."""
    if inner == 1:  # contiguous lines: lanes are neighbouring lines
        first = task * CUBIC_LANES
        return first * n, 1, n, first
    o = task // blocks
    i0 = (task % blocks) * CUBIC_LANES
    return o * n * inner + i0, inner, 1, i0


@njit(parallel=True, cache=True)
def _cubic_parallel(volume, position, scale, out, outer, n, inner):  # pragma: no cover - compiled
    lines = outer if inner == 1 else inner
    width = min(CUBIC_LANES, lines)
    blocks = (lines + CUBIC_LANES - 1) // CUBIC_LANES
    tasks = blocks if inner == 1 else outer * blocks
    for task in prange(tasks):
        start, step_j, step_t, first = _block_start(task, blocks, n, inner)
        buf = np.zeros((n + 3, width), np.float64)
        poly = np.empty((3, n, width), np.float64)
        _cubic_block(volume, position, scale, out, start, step_j, step_t, n, min(width, lines - first), buf, poly)


@njit(cache=True)
def _cubic_serial(volume, position, scale, out, outer, n, inner):  # pragma: no cover - compiled
    lines = outer if inner == 1 else inner
    width = min(CUBIC_LANES, lines)
    blocks = (lines + CUBIC_LANES - 1) // CUBIC_LANES
    tasks = blocks if inner == 1 else outer * blocks
    buf = np.zeros((n + 3, width), np.float64)
    poly = np.empty((3, n, width), np.float64)
    for task in range(tasks):
        start, step_j, step_t, first = _block_start(task, blocks, n, inner)
        _cubic_block(volume, position, scale, out, start, step_j, step_t, n, min(width, lines - first), buf, poly)


def cubic_lines(volume: np.ndarray, position: np.ndarray, scale: np.ndarray, out: np.ndarray | None = None, *,
                parallel: bool = True) -> np.ndarray:
    """Cubic B-spline sampling along the middle axis of ``(outer, n, inner)`` arrays (numba).

    ``out[o, j, i] = scale[o, j, i] * sum_t beta3(position[o, j, i] - k_t) c[o, k_t, i]``,
    where ``c`` are the cubic B-spline coefficients of each line ``volume[o, :, i]``
    (mirror boundary) and ``k_t`` the four taps around the position.

    Parameters
    ----------
    volume : (outer, n, inner) float32 array, C-contiguous
    position : (outer, n, inner) float32 array, positions along the line in voxels,
        already clipped to ``[0, n - 1]``
    scale : (outer, n, inner) float32 array, factor per voxel (0 for positions that
        came from outside the field of view)
    out : (outer, n, inner) float32 array, C-contiguous, optional
    parallel : bool

    Returns
    -------
    (outer, n, inner) float32 array
    """
    outer, n, inner = volume.shape
    if out is None:
        out = np.empty(volume.shape, np.float32)
    flat = [np.ascontiguousarray(a, np.float32).reshape(-1) for a in (volume, position, scale)]
    target = out.reshape(-1)
    if not np.shares_memory(target, out):
        raise ValueError("out must be a C-contiguous float32 array")
    (_cubic_parallel if parallel else _cubic_serial)(flat[0], flat[1], flat[2], target, outer, n, inner)
    return out


def bspline_prefilter_reference(lines: np.ndarray) -> np.ndarray:
    """Plain-numpy cubic B-spline prefilter along the last axis, mirror boundary.

    The exact causal initial value (the mirror-extended sum, closed form) and the
    recursive filter of Unser, Aldroubi & Eden 1993; float64.
    """
    c = 6.0 * np.array(lines, np.float64)
    n = c.shape[-1]
    if n == 1:
        return c / 6.0
    z = CUBIC_POLE
    k = np.arange(n)
    mirrored = z ** k + np.where((k > 0) & (k < n - 1), z ** (2 * (n - 1) - k), 0.0)
    mirrored[-1] = z ** (n - 1)
    c[..., 0] = (c * mirrored).sum(axis=-1) / (1.0 - z ** (2 * (n - 1)))
    for j in range(1, n):
        c[..., j] += z * c[..., j - 1]
    c[..., -1] = (z * c[..., -2] + c[..., -1]) * z / (z * z - 1.0)
    for j in range(n - 2, -1, -1):
        c[..., j] = z * (c[..., j + 1] - c[..., j])
    return c


def cubic_lines_reference(volume: np.ndarray, position: np.ndarray, scale: np.ndarray) -> np.ndarray:
    """Plain-numpy reference of :func:`cubic_lines` (explicit taps, float64)."""
    volume = np.asarray(volume, np.float64)
    n = volume.shape[1]
    coef = np.moveaxis(bspline_prefilter_reference(np.moveaxis(volume, 1, -1)), -1, 1)
    if n == 1:
        return (coef * scale).astype(np.float32)
    p = np.asarray(position, np.float64)
    base = np.floor(p).astype(np.int64)
    f = p - base
    weights = [(1 - f) ** 3 / 6, (4 - 6 * f**2 + 3 * f**3) / 6, (1 + 3 * f + 3 * f**2 - 3 * f**3) / 6, f**3 / 6]
    period = 2 * (n - 1)
    out = np.zeros(volume.shape)
    rows = np.arange(volume.shape[0])[:, None, None]
    cols = np.arange(volume.shape[2])[None, None, :]
    for t, w in enumerate(weights):
        k = np.abs(base - 1 + t) % period
        k = np.where(k >= n, period - k, k)
        out += w * coef[rows, k, cols]
    return (out * scale).astype(np.float32)


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
