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
  there (float32) by the recursive cubic B-spline filter (all lines of the block at once, so the
  recursion vectorises across lines), padded by mirror reflection, turned into the four
  polynomial coefficients of every interval (side by side), and sampled with one Horner
  evaluation from one stored float32 position per voxel. The block stays in cache from
  the prefilter to the sampling. Parallel over blocks.
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

from ._kernel import kernel

__all__ = ["gather", "gather_reference", "cubic_lines", "cubic_lines_reference", "bspline_prefilter_reference",
           "splat_lines", "splat_lines_reference"]

_MIN_WIDTH = 1e-9


@njit(cache=True, inline="always")
def _row(source, index, weight, v):  # pragma: no cover - compiled
    acc = 0.0
    for t in range(index.shape[1]):
        acc += np.float64(weight[v, t]) * source[index[v, t]]
    return acc


def _fixed_row(taps: int):
    """The row sum for a fixed tap count: the count is a compile-time constant, so the
    compiler unrolls the inner loop (two to three times faster than :func:`_row`)."""

    @njit(cache=True, inline="always")
    def row(source, index, weight, v):  # pragma: no cover - compiled
        acc = 0.0
        for t in range(taps):
            acc += np.float64(weight[v, t]) * source[index[v, t]]
        return acc

    return row


def _gather_loop(row, parallel: bool):
    """The loop over voxels; `parallel` spreads it over the numba threads (prange). The
    single-threaded form serves callers that already run one job per core (several
    processes), where extra threads would only compete for the same cores."""

    @kernel(parallel=parallel)
    def loop(source, index, weight, out):  # pragma: no cover - compiled
        for v in prange(index.shape[0]):
            out[v] = row(source, index, weight, v)

    return loop


_FIXED_ROWS = {taps: _fixed_row(taps) for taps in (2, 4, 8)}
_KERNELS = {
    parallel: ({taps: _gather_loop(row, parallel) for taps, row in _FIXED_ROWS.items()},
               _gather_loop(_row, parallel))
    for parallel in (True, False)
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
# Cubic B-spline pull-back: prefilter and sampling fused per block of lines
# --------------------------------------------------------------------------------------
#: Pole of the cubic B-spline prefilter, sqrt(3) - 2 (Unser, Aldroubi & Eden 1993, IEEE
#: Trans. Signal Process. 41(2)), and its gain (1 - z)(1 - 1/z) = 6.
CUBIC_POLE = float(np.sqrt(3.0) - 2.0)
#: Lines per block: long loops over the lanes, and a block's buffers stay in the L2 cache.
CUBIC_LANES = 128
#: Terms of the causal initial sum when the line is long; |z|**16 < 7e-10, far below the
#: float32 rounding of the coefficients.
_HORIZON = 16
_U0 = np.uint64(0)
_U1 = np.uint64(1)
_U4 = np.uint64(4)

# Indices in the kernels below are unsigned (np.uint64): numba then skips the check for
# negative (wrap-around) indices on every access, which otherwise doubles the cost of the
# per-voxel loop. Arrays are flat and indexed by hand, with no views inside the loops.


@njit(cache=True, inline="always")
def mirror_index(virtual, n):  # pragma: no cover - compiled
    """Coefficient index that mirror reflection gives for `virtual` (0 <= result < n)."""
    if n == 1:
        return 0
    period = 2 * (n - 1)
    src = abs(virtual) % period
    if src >= n:
        src = period - src
    return src


@kernel(fastmath={"contract"})
def _prefilter_rows(buf, n, width):  # pragma: no cover - compiled
    """Cubic B-spline prefilter of the `width` lanes of the flat buffer `buf`, in place (float32).

    Row ``r`` (``r = 1..n``) of `buf` holds sample ``r - 1`` of every lane at
    ``buf[r * width + t]``. On return rows 1..n hold the coefficients divided by the gain
    6 (the samples are not multiplied by it on the way in; :func:`_cubic_block` folds it
    into the polynomial), and rows 0, n + 1, n + 2 the
    mirror-reflected coefficients -1, n, n + 1. Each loop runs over contiguous lanes, so
    the recursion vectorises across lines.
    """
    w = np.uint64(width)
    z = np.float32(CUBIC_POLE)
    if n > 1:
        first = w  # row 1: causal initial value, mirror boundary (d c b | a b c d | c b a)
        if n <= _HORIZON:
            z_last = z ** (n - 1)
            norm = np.float32(1.0) / (np.float32(1.0) - z_last * z_last)
            for t in range(width):
                u = np.uint64(t)
                acc = buf[first + u] + z_last * buf[np.uint64(n) * w + u]
                zi = z
                for k in range(1, n - 1):
                    acc += zi * (buf[np.uint64(k + 1) * w + u] + z_last * buf[np.uint64(n - k) * w + u])
                    zi *= z
                buf[first + u] = acc * norm
        else:
            zi = z
            for k in range(1, _HORIZON):
                row = np.uint64(k + 1) * w
                for t in range(width):
                    u = np.uint64(t)
                    buf[first + u] += zi * buf[row + u]
                zi *= z
        for j in range(2, n + 1):  # causal recursion
            row = np.uint64(j) * w
            prev = row - w
            for t in range(width):
                u = np.uint64(t)
                buf[row + u] += z * buf[prev + u]
        factor = z / (z * z - np.float32(1.0))
        row = np.uint64(n) * w
        prev = row - w
        for t in range(width):  # anticausal initial value
            u = np.uint64(t)
            buf[row + u] = (z * buf[prev + u] + buf[row + u]) * factor
        for j in range(n - 1, 0, -1):  # anticausal recursion
            row = np.uint64(j) * w
            nxt = row + w
            for t in range(width):
                u = np.uint64(t)
                buf[row + u] = z * (buf[nxt + u] - buf[row + u])
    for row, virtual in ((0, -1), (n + 1, n), (n + 2, n + 1)):
        dst = np.uint64(row) * w
        src = np.uint64(mirror_index(virtual, n) + 1) * w
        for t in range(width):
            u = np.uint64(t)
            buf[dst + u] = buf[src + u]


@kernel(fastmath={"contract"})
def _cubic_block(volume, position, scale, out, start, step_j, step_t, n, lanes, buf, poly):  # pragma: no cover
    """One block of `lanes` lines of length `n` in flat arrays.

    Element ``j`` of lane ``t`` is at ``start + j * step_j + t * step_t`` (one of the two
    steps is 1). After the prefilter, the cubic on each interval ``[k, k + 1]`` of each
    lane is written as ``a0 + a1 f + a2 f^2 + a3 f^3`` with ``a0`` the sample itself (so
    positions on a sample are exact); the four numbers of an interval sit side by side in
    `poly`, so a voxel costs one 16-byte read and one Horner evaluation. With lanes along
    memory (``step_t == 1``) `poly` is laid out ``[k, lane, 4]`` and the voxels are visited
    row by row; with contiguous lines it is ``[lane, k, 4]`` and visited line by line, so
    consecutive voxels read neighbouring entries in both cases. One loop nest serves both
    orders: only its outer and inner steps differ.
    """
    w = np.uint64(lanes)
    origin = np.uint64(start)
    rows = step_t == 1
    pk, pt = (w * _U4, _U4) if rows else (_U4, np.uint64(n) * _U4)
    n_outer, n_inner = (n, lanes) if rows else (lanes, n)
    # Each index below is linear in (j, t) and is split into its outer and inner loop steps.
    # The inner loop runs along memory, so its volume step is 1 and its polynomial step 4.
    vo = np.uint64(step_j) if rows else np.uint64(step_t)  # volume, position, out
    bo, bi = _loop_steps(w, _U1, rows)  # buffer row j, lane t
    po = pk if rows else pt  # polynomial of interval j, lane t
    lo, li = _loop_steps(_U0, pt, rows)  # polynomial lane offset
    for a in range(n_outer):  # copy the block into rows 1..n of the buffer
        ua = np.uint64(a)
        for b in range(n_inner):
            ub = np.uint64(b)
            buf[w + ua * bo + ub * bi] = volume[origin + ua * vo + ub]
    _prefilter_rows(buf, n, lanes)
    for a in range(n_outer):
        ua = np.uint64(a)
        for b in range(n_inner):
            ub = np.uint64(b)
            _interval(buf, poly, ua * bo + ub * bi, w, ua * po + ub * _U4, volume[origin + ua * vo + ub])
    for a in range(n_outer):
        ua = np.uint64(a)
        for b in range(n_inner):
            ub = np.uint64(b)
            _horner(position, scale, out, poly, origin + ua * vo + ub, ua * lo + ub * li, pk)


@njit(cache=True, inline="always")
def _loop_steps(step_j, step_t, rows):  # pragma: no cover - compiled
    """(outer, inner) loop steps of an index ``j * step_j + t * step_t``: rows (j) outside
    when lanes lie along memory, lanes (t) outside when lines do."""
    return (step_j, step_t) if rows else (step_t, step_j)


@njit(cache=True, inline="always", fastmath={"contract"})
def _interval(buf, poly, r, w, q, sample):  # pragma: no cover - compiled
    """The cubic of one interval from four coefficients ``buf[r + m * w]`` (m = 0..3) at ``poly[q:q + 4]``.

    `buf` holds d = c / 6; with the true coefficients c the cubic is a1 = (c2 - c0) / 2,
    a2 = (c0 + c2) / 2 - c1, a3 = (c3 - c0) / 6 + (c1 - c2) / 2, and a0 the sample.
    """
    c0 = buf[r]
    c1 = buf[r + w]
    c2 = buf[r + w + w]
    c3 = buf[r + w + w + w]
    three = np.float32(3.0)
    poly[q] = sample
    poly[q + _U1] = three * (c2 - c0)
    poly[q + np.uint64(2)] = three * (c0 + c2) - np.float32(6.0) * c1
    poly[q + np.uint64(3)] = (c3 - c0) + three * (c1 - c2)


@njit(cache=True, inline="always", fastmath={"contract"})
def _horner(position, scale, out, poly, v, lane_offset, pk):  # pragma: no cover - compiled
    p = position[v]
    base = np.uint64(np.int64(p))  # positions are clipped to [0, n - 1], so this is the floor
    f = p - np.float32(base)
    q = base * pk + lane_offset
    out[v] = (poly[q] + f * (poly[q + _U1] + f * (poly[q + np.uint64(2)] + f * poly[q + np.uint64(3)]))) * scale[v]


@njit(cache=True, inline="always")
def _block_start(task, blocks, n, inner):  # pragma: no cover - compiled
    """Flat start, steps and first lane of block `task` of an (outer, n, inner) volume."""
    if inner == 1:  # contiguous lines: lanes are neighbouring lines
        first = task * CUBIC_LANES
        return first * n, 1, n, first
    o = task // blocks
    i0 = (task % blocks) * CUBIC_LANES
    return o * n * inner + i0, inner, 1, i0


@kernel(parallel=True)
def _cubic_parallel(volume, position, scale, out, outer, n, inner):  # pragma: no cover - compiled
    lines = outer if inner == 1 else inner
    width = min(CUBIC_LANES, lines)
    blocks = (lines + CUBIC_LANES - 1) // CUBIC_LANES
    tasks = blocks if inner == 1 else outer * blocks
    for task in prange(tasks):
        start, step_j, step_t, first = _block_start(task, blocks, n, inner)
        buf = np.empty((n + 3) * width, np.float32)
        poly = np.empty(4 * n * width, np.float32)
        _cubic_block(volume, position, scale, out, start, step_j, step_t, n, min(width, lines - first), buf, poly)


@kernel()
def _cubic_serial(volume, position, scale, out, outer, n, inner):  # pragma: no cover - compiled
    lines = outer if inner == 1 else inner
    width = min(CUBIC_LANES, lines)
    blocks = (lines + CUBIC_LANES - 1) // CUBIC_LANES
    tasks = blocks if inner == 1 else outer * blocks
    buf = np.empty((n + 3) * width, np.float32)
    poly = np.empty(4 * n * width, np.float32)
    for task in range(tasks):
        start, step_j, step_t, first = _block_start(task, blocks, n, inner)
        _cubic_block(volume, position, scale, out, start, step_j, step_t, n, min(width, lines - first), buf, poly)


def cubic_lines(volume: np.ndarray, position: np.ndarray, scale: np.ndarray, out: np.ndarray | None = None, *,
                parallel: bool = True) -> np.ndarray:
    """Cubic B-spline sampling along the middle axis of ``(outer, n, inner)`` arrays (numba).

    ``out[o, j, i] = scale[o, j, i] * sum_t beta3(position[o, j, i] - k_t) c[o, k_t, i]``,
    where ``c`` are the cubic B-spline coefficients of each line ``volume[o, :, i]``
    (mirror boundary) and ``k_t`` the four taps around the position. Arithmetic is
    float32 (relative error about 1e-7 of the line's largest value); positions on a
    sample return the sample exactly.

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


@kernel(parallel=True)
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
