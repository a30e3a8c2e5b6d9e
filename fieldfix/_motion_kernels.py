"""Numba kernels of motion estimation and correction, each beside a plain-numpy reference.

Private module: the public entry points are in :mod:`fieldfix.motion`.

* ``prefilter_cubic``: the cubic B-spline prefilter along all three axes (mirror boundary;
  Unser, Aldroubi and Eden 1993, IEEE Trans. Signal Process. 41(2):821, recursive filter with
  pole ``sqrt(3) - 2``); values equal ``scipy.ndimage.spline_filter(order=3, mode='mirror')``.
* ``resample_rigid_shift``: motion and distortion in one interpolation: every output voxel
  takes the cubic B-spline value at its source position (a rigid voxel map plus a shift along
  the phase-encode axis) times an intensity weight; zero beyond half a voxel outside.
* ``block_mean``: means over ``f x f x f`` blocks (the pyramid of the pose estimation).
* ``pull_values`` and ``normal_equations``: the pose cost of :mod:`fieldfix.motion` on a list
  of voxels. Each voxel ``v`` has a reference position ``y = R (A v - c)`` (world mm, about the
  rotation centre) and a source position ``p = B (y + c + t) + b + shift * e_pe`` in the
  volume's voxels (``A`` the level grid's affine, ``B, b`` its inverse). The volume is read
  there through the cubic B-spline whose coefficients are the samples themselves (no
  prefilter: interpolation and a light smoothing of width ~0.58 voxel in one kernel, the same
  for every volume). ``normal_equations`` returns, in one pass, the sums of the Gauss-Newton
  normal equations for the residual ``r = jac * value - still``: the cost ``sum w r^2``, the
  gradient ``sum w r J`` and ``sum w J J^T`` with the exact Jacobian
  ``J = [jac g, jac y x g + value d jac / d omega]`` (``g`` the world gradient of the value,
  ``jac`` the moved volume's Jacobian along the phase-encode axis; translations, then rotations
  ``omega`` about world x, y, z applied on the left of ``R``). A voxel counts only while all
  its 4 x 4 x 4 taps lie inside the grid (no mirrored or clamped samples).

The ``*_reference`` functions compute the same in plain numpy; the tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from ._kernel import kernel
from ._align_kernels import use_parallel
from ._unwarp_kernels import mirror_index

__all__ = ["prefilter_cubic", "prefilter_cubic_reference", "pad_mirror", "resample_rigid_shift",
           "resample_rigid_shift_reference",
           "block_mean", "pull_values", "pull_values_reference", "normal_equations", "normal_equations_reference",
           "SUMS"]

_POLE = np.sqrt(3.0) - 2.0
#: Fused multiply-adds allowed (no other fast-math licence: NaN and infinity keep their meaning).
_FMA = {"contract"}
#: Layout of the sums of :func:`normal_equations`: cost, 6 gradient terms, the 21 upper-triangle
#: terms of the 6x6 matrix (row by row), the sum of the weights and of ``w * still^2`` counted.
SUMS = 30
#: Voxel lists at least this long use the parallel pose kernel when ``parallel`` is None. Shorter
#: ones take about a millisecond per pass, less than the threads' start-up costs on a busy machine.
PARALLEL_POSE_VOXELS = 1 << 16


# ---------------------------------------------------------------------------------------------
# Cubic B-spline prefilter
# ---------------------------------------------------------------------------------------------

@kernel()
def _filter_rows(c):  # pragma: no cover - compiled
    """Prefilter a 2D array along its first axis, all columns at once, mirror boundary, exact start."""
    n, m = c.shape
    if n < 2:
        return
    z = _POLE
    z_n1 = z ** (n - 1)
    first = np.empty(m)
    for q in range(m):
        first[q] = c[0, q] + z_n1 * c[n - 1, q]
    z_i = z
    for k in range(1, n - 1):
        zk = z_i * z_n1
        for q in range(m):
            first[q] += z_i * c[k, q] + zk * c[n - 1 - k, q]
        z_i *= z
    scale = 1.0 / (1.0 - z_n1 * z_n1)
    for q in range(m):
        c[0, q] = first[q] * scale
    for k in range(1, n):
        for q in range(m):
            c[k, q] += z * c[k - 1, q]
    end = z / (z * z - 1.0)
    for q in range(m):
        c[n - 1, q] = end * (c[n - 1, q] + z * c[n - 2, q])
    for k in range(n - 2, -1, -1):
        for q in range(m):
            c[k, q] = z * (c[k + 1, q] - c[k, q])
    for k in range(n):
        for q in range(m):
            c[k, q] *= 6.0


@kernel()
def _filter_last(c, i):  # pragma: no cover - compiled
    """Prefilter plane i along the last axis (transposed so that the recursion is vectorised)."""
    t = np.ascontiguousarray(c[i].T)
    _filter_rows(t)
    ny, nz = c.shape[1], c.shape[2]
    for j in range(ny):
        for k in range(nz):
            c[i, j, k] = t[k, j]


@kernel(parallel=True)
def _prefilter_parallel(c):  # pragma: no cover - compiled
    nx, ny, nz = c.shape
    columns = c.reshape(nx, ny * nz)
    chunks = 8
    for part in prange(chunks):
        _filter_rows(columns[:, part * ny * nz // chunks:(part + 1) * ny * nz // chunks])
    for i in prange(nx):
        _filter_rows(c[i])
        _filter_last(c, i)


@kernel()
def _prefilter_serial(c):  # pragma: no cover - compiled
    nx, ny, nz = c.shape
    _filter_rows(c.reshape(nx, ny * nz))
    for i in range(nx):
        _filter_rows(c[i])
        _filter_last(c, i)


def prefilter_cubic(volume, parallel=None):
    """Cubic B-spline coefficients of a 3D volume, mirror boundary, C-ordered float64 (numba)."""
    c = np.array(volume, dtype=np.float64, order="C", copy=True)
    if c.ndim != 3:
        raise ValueError(f"prefilter_cubic needs a 3D volume, got {c.ndim} dimensions")
    (_prefilter_parallel if use_parallel(parallel, c.size) else _prefilter_serial)(c)
    return c


def prefilter_cubic_reference(volume):
    """Plain-numpy reference of :func:`prefilter_cubic`: the exact mirror-periodic B-spline inverse.

    Along each axis the mirror extension has period ``2n - 2``; the coefficients solve the
    circulant system ``(c[k-1] + 4 c[k] + c[k+1]) / 6 = s[k]`` on that period (by FFT).
    """
    c = np.asarray(volume, float)
    for axis in range(3):
        n = c.shape[axis]
        if n < 2:
            continue
        moved = np.moveaxis(c, axis, -1)
        extended = np.concatenate([moved, moved[..., -2:0:-1]], axis=-1)
        period = extended.shape[-1]
        freq = np.fft.rfftfreq(period)
        response = (4.0 + 2.0 * np.cos(2 * np.pi * freq)) / 6.0
        solved = np.fft.irfft(np.fft.rfft(extended, axis=-1) / response, n=period, axis=-1)
        c = np.moveaxis(solved[..., :n], -1, axis)
    return c


# ---------------------------------------------------------------------------------------------
# The single-interpolation resampler
# ---------------------------------------------------------------------------------------------

#: Samples added on every side of the coefficients, so that every tap of a clamped position is a
#: plain read (cubic taps reach one sample below and two above the position's floor).
_PAD = 2


@kernel()
def _pad_small(coef, out):  # pragma: no cover - compiled
    """Mirror padding for any axis length (several reflections on axes shorter than the pad)."""
    nx, ny, nz = coef.shape
    for i in range(nx + 2 * _PAD):
        si = mirror_index(i - _PAD, nx)
        for j in range(ny + 2 * _PAD):
            sj = mirror_index(j - _PAD, ny)
            for k in range(nz + 2 * _PAD):
                out[i, j, k] = coef[si, sj, mirror_index(k - _PAD, nz)]


def pad_mirror(coef) -> np.ndarray:
    """`coef` with :data:`_PAD` samples of mirror extension (scipy's 'mirror') on every side."""
    coef = np.ascontiguousarray(coef, np.float64)
    out = np.empty(tuple(n + 2 * _PAD for n in coef.shape))
    if min(coef.shape) <= _PAD + 1:
        _pad_small(coef, out)
        return out
    out[_PAD:-_PAD, _PAD:-_PAD, _PAD:-_PAD] = coef
    for axis in range(3):  # one reflection: padded p < PAD copies 2 PAD - p, the far side likewise
        moved = np.moveaxis(out, axis, 0)
        n = coef.shape[axis]
        for p in range(_PAD):
            moved[p] = moved[2 * _PAD - p]
            moved[n + 2 * _PAD - 1 - p] = moved[n - 1 + p]
    return out


@njit(cache=True, inline="always", fastmath=_FMA)
def _weights_into(t, w, first, k):  # pragma: no cover - compiled
    u = 1.0 - t
    t2 = t * t
    w[first, k] = u * u * u * (1.0 / 6.0)
    w[first + 1, k] = (4.0 - 6.0 * t2 + 3.0 * t2 * t) * (1.0 / 6.0)
    w[first + 2, k] = (1.0 + 3.0 * t + 3.0 * t2 - 3.0 * t2 * t) * (1.0 / 6.0)
    w[first + 3, k] = t2 * t * (1.0 / 6.0)


@njit(cache=True, inline="always", fastmath=_FMA)
def _line_taps(shape, vmap, shift, gradient, column, floor, pe, i, j, w, start, scale):  # pragma: no cover
    """First pass over one output line: clamped positions, tap weights, first taps, intensity weights.

    Branch-free, so that the compiler vectorises it; zero weight beyond half a voxel outside.
    """
    sx, sy, sz = shape
    b0 = vmap[0, 0] * i + vmap[0, 1] * j + vmap[0, 3]
    b1 = vmap[1, 0] * i + vmap[1, 1] * j + vmap[1, 3]
    b2 = vmap[2, 0] * i + vmap[2, 1] * j + vmap[2, 3]
    row = sz + 2.0 * _PAD
    plane = (sy + 2.0 * _PAD) * row
    for k in range(shift.shape[0]):
        s = shift[k]
        p0 = b0 + vmap[0, 2] * k + pe[0] * s
        p1 = b1 + vmap[1, 2] * k + pe[1] * s
        p2 = b2 + vmap[2, 2] * k + pe[2] * s
        inside = ((p0 >= -0.5) & (p0 <= sx - 0.5) & (p1 >= -0.5) & (p1 <= sy - 0.5)
                  & (p2 >= -0.5) & (p2 <= sz - 0.5))
        p0 = min(max(p0, 0.0), sx - 1.0)
        p1 = min(max(p1, 0.0), sy - 1.0)
        p2 = min(max(p2, 0.0), sz - 1.0)
        f0, f1, f2 = np.floor(p0), np.floor(p1), np.floor(p2)
        start[k] = (f0 + _PAD - 1.0) * plane + (f1 + _PAD - 1.0) * row + (f2 + _PAD - 1.0)
        _weights_into(p0 - f0, w, 0, k)
        _weights_into(p1 - f1, w, 4, k)
        _weights_into(p2 - f2, w, 8, k)
        jac = 1.0 + column[0] * gradient[0, k] + column[1] * gradient[1, k] + column[2] * gradient[2, k]
        scale[k] = max(jac, floor) if inside else 0.0


@njit(cache=True, inline="always", fastmath=_FMA)
def _line_values(flat, row, plane, w, start, scale, out):  # pragma: no cover - compiled
    """Second pass: the 64 taps of every voxel of the line (unsigned indices: no wrap-around tests)."""
    for k in range(out.shape[0]):
        first = np.uint64(start[k])
        c0, c1, c2, c3 = 0.0, 0.0, 0.0, 0.0
        for a in range(4):
            q = first + np.uint64(a) * plane
            for b in range(4):
                wab = w[a, k] * w[4 + b, k]
                c0 += wab * flat[q]
                c1 += wab * flat[q + np.uint64(1)]
                c2 += wab * flat[q + np.uint64(2)]
                c3 += wab * flat[q + np.uint64(3)]
                q += row
        out[k] = (w[8, k] * c0 + w[9, k] * c1 + w[10, k] * c2 + w[11, k] * c3) * scale[k]


@njit(cache=True, inline="always")
def _resample_plane(flat, shape, vmap, shift, gradient, column, floor, pe, out, i):  # pragma: no cover
    nz = out.shape[2]
    w, start, scale = np.empty((12, nz)), np.empty(nz), np.empty(nz)
    row = np.uint64(shape[2] + 2 * _PAD)
    plane = np.uint64((shape[1] + 2 * _PAD) * (shape[2] + 2 * _PAD))
    for j in range(out.shape[1]):
        _line_taps(shape, vmap, shift[i, j], gradient[:, i, j], column, floor, pe, i, j, w, start, scale)
        _line_values(flat, row, plane, w, start, scale, out[i, j])


@kernel(parallel=True, fastmath=_FMA)  # inlined callees compile with these flags
def _resample_parallel(padded, shape, vmap, shift, gradient, column, floor, pe, out):  # pragma: no cover
    flat = padded.ravel()
    for i in prange(out.shape[0]):
        _resample_plane(flat, shape, vmap, shift, gradient, column, floor, pe, out, i)


@kernel(fastmath=_FMA)
def _resample_serial(padded, shape, vmap, shift, gradient, column, floor, pe, out):  # pragma: no cover
    flat = padded.ravel()
    for i in range(out.shape[0]):
        _resample_plane(flat, shape, vmap, shift, gradient, column, floor, pe, out, i)


def resample_rigid_shift(coef, vmap, shift, gradient, column, floor, pe_axis, out=None, parallel=None):
    """Cubic B-spline values at ``vmap @ (i, j, k, 1) + shift * e_pe``, times an intensity weight (numba).

    The weight of each voxel is ``max(1 + column . gradient, floor)`` (the Jacobian of the
    combined map along the phase-encode axis, see :func:`fieldfix.motion.align_resample_volume`).
    Positions are clamped to the grid, whose mirror extension (scipy's 'mirror') gives the taps
    beyond it; zero beyond half a voxel outside.

    Parameters
    ----------
    coef : (X, Y, Z) float64, B-spline coefficients (:func:`prefilter_cubic`)
    vmap : (3, 4) output voxel -> source voxel map
    shift : (X', Y', Z') array on the output grid, voxels along `pe_axis`
    gradient : (3, X', Y', Z') array, derivatives of `shift` along the output voxel axes
    column : (3,) the weight's direction; floor : float, the weight's lower bound
    pe_axis : int, source voxel axis of the shift
    out : (X', Y', Z') float32 C-contiguous array, optional
    """
    shift = np.ascontiguousarray(shift, np.float64)
    gradient = np.ascontiguousarray(gradient, np.float64)
    if gradient.shape != (3,) + shift.shape:
        raise ValueError(f"gradient {gradient.shape} must be (3,) + the shift's shape {shift.shape}")
    if out is None:
        out = np.empty(shift.shape, np.float32)
    coef = np.asarray(coef, np.float64)
    pe = np.zeros(3)
    pe[int(pe_axis)] = 1.0
    kernel = _resample_parallel if use_parallel(parallel, shift.size) else _resample_serial
    kernel(pad_mirror(coef), tuple(int(n) for n in coef.shape), np.ascontiguousarray(vmap, np.float64), shift,
           gradient, np.ascontiguousarray(column, np.float64), float(floor), pe, out)
    return out


def _bspline_taps(p, n):
    """Indices (4, N), weights (4, N) and derivative weights (4, N) of cubic B-spline taps (mirror)."""
    base = np.floor(p).astype(int)
    f = p - base
    w = np.stack([(1 - f) ** 3 / 6, (4 - 6 * f**2 + 3 * f**3) / 6, (1 + 3 * f + 3 * f**2 - 3 * f**3) / 6, f**3 / 6])
    dw = np.stack([-0.5 * (1 - f) ** 2, -2 * f + 1.5 * f**2, 0.5 + f - 1.5 * f**2, 0.5 * f**2])
    idx = base[None] + np.arange(-1, 3)[:, None]
    period = max(2 * (n - 1), 1)
    idx = np.mod(idx, period)
    idx = np.where(idx >= n, period - idx, idx) if n > 1 else np.zeros_like(idx)
    return idx, w, dw


def _bspline_reference(samples, pos, derivatives=False):
    """Value (and gradient along the voxel axes) of the cubic B-spline with coefficients `samples`."""
    taps = [_bspline_taps(pos[a], samples.shape[a]) for a in range(3)]
    value = np.zeros(pos.shape[1])
    grad = np.zeros((3, pos.shape[1]))
    for a in range(4):
        for b in range(4):
            for c in range(4):
                sample = samples[taps[0][0][a], taps[1][0][b], taps[2][0][c]]
                wa, wb, wc = taps[0][1][a], taps[1][1][b], taps[2][1][c]
                value += wa * wb * wc * sample
                if derivatives:
                    grad[0] += taps[0][2][a] * wb * wc * sample
                    grad[1] += wa * taps[1][2][b] * wc * sample
                    grad[2] += wa * wb * taps[2][2][c] * sample
    return (value, grad) if derivatives else value


def resample_rigid_shift_reference(coef, vmap, shift, gradient, column, floor, pe_axis):
    """Plain-numpy reference of :func:`resample_rigid_shift` (64 taps vectorised)."""
    coef = np.asarray(coef, float)
    shape = np.shape(shift)
    ijk = np.indices(shape, dtype=float).reshape(3, -1)
    pos = np.asarray(vmap, float)[:, :3] @ ijk + np.asarray(vmap, float)[:, 3:4]
    pos[pe_axis] += np.asarray(shift, float).ravel()
    inside = np.all((pos >= -0.5) & (pos <= np.array(coef.shape)[:, None] - 0.5), axis=0)
    pos = np.clip(pos, 0.0, np.array(coef.shape, float)[:, None] - 1.0)
    weight = np.maximum(1.0 + np.tensordot(np.asarray(column, float), np.asarray(gradient, float), axes=1), floor)
    return (_bspline_reference(coef, pos) * inside).reshape(shape) * weight


# ---------------------------------------------------------------------------------------------
# Pyramid
# ---------------------------------------------------------------------------------------------

@kernel()
def _block_mean(volume, factor, out):  # pragma: no cover - compiled
    nx, ny, nz = volume.shape
    scale = 1.0 / (factor * factor * factor)
    out[:] = 0.0
    for i in range(nx):
        for j in range(ny):
            row = out[i // factor, j // factor]
            line = volume[i, j]
            for block in range(out.shape[2]):
                total = 0.0
                for k in range(block * factor, min(block * factor + factor, nz)):
                    total += line[k]
                row[block] += total * scale


def block_mean(volume, factor: int):
    """Means over `factor`-voxel blocks, the volume padded with zeros to whole blocks (numba).

    The same values as :func:`fieldfix._pose.block_mean` (its plain-numpy reference).
    """
    volume = np.ascontiguousarray(volume, np.float64)
    factor = int(factor)
    if factor == 1:
        return volume
    out = np.empty(tuple(-(-n // factor) for n in volume.shape))
    _block_mean(volume, factor, out)
    return out


# ---------------------------------------------------------------------------------------------
# The pose cost on a list of voxels
# ---------------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _taps(p, w, dw):  # pragma: no cover - compiled
    """Cubic B-spline weights and derivative weights at an interior position; returns the first tap."""
    base = int(p)
    f = p - base
    f2 = f * f
    g = 1.0 - f
    w[0] = g * g * g * (1.0 / 6.0)
    w[1] = (4.0 - 6.0 * f2 + 3.0 * f2 * f) * (1.0 / 6.0)
    w[2] = (1.0 + 3.0 * f + 3.0 * f2 - 3.0 * f2 * f) * (1.0 / 6.0)
    w[3] = f2 * f * (1.0 / 6.0)
    dw[0] = -0.5 * g * g
    dw[1] = -2.0 * f + 1.5 * f2
    dw[2] = 0.5 + f - 1.5 * f2
    dw[3] = 0.5 * f2
    return base - 1


@njit(cache=True, inline="always", fastmath=_FMA)
def _value_gradient(flat, shape, p0, p1, p2, w, dw):  # pragma: no cover - compiled
    """B-spline value and gradient (voxel axes) at an interior position; `w`, `dw` are (3, 4) scratch."""
    i0 = _taps(p0, w[0], dw[0])
    j0 = _taps(p1, w[1], dw[1])
    k0 = _taps(p2, w[2], dw[2])
    row, plane = np.uint64(shape[2]), np.uint64(shape[1] * shape[2])
    start = np.uint64((i0 * shape[1] + j0) * shape[2] + k0)
    value, g0, g1, g2 = 0.0, 0.0, 0.0, 0.0
    for a in range(4):
        pv, pdy, pdz = 0.0, 0.0, 0.0
        q = start + np.uint64(a) * plane
        for b in range(4):
            c0, c1 = flat[q], flat[q + np.uint64(1)]
            c2, c3 = flat[q + np.uint64(2)], flat[q + np.uint64(3)]
            s = w[2, 0] * c0 + w[2, 1] * c1 + w[2, 2] * c2 + w[2, 3] * c3
            pv += w[1, b] * s
            pdy += dw[1, b] * s
            pdz += w[1, b] * (dw[2, 0] * c0 + dw[2, 1] * c1 + dw[2, 2] * c2 + dw[2, 3] * c3)
            q += row
        value += w[0, a] * pv
        g0 += dw[0, a] * pv
        g1 += w[0, a] * pdy
        g2 += w[0, a] * pdz
    return value, g0, g1, g2


@njit(cache=True, inline="always")
def _position(ijk, n, ymap, pmap, shift, pe_axis, y, p):  # pragma: no cover - compiled
    """Reference position y (world, about the centre) and source position p (voxels) of voxel n."""
    i, j, k = ijk[n, 0], ijk[n, 1], ijk[n, 2]
    for a in range(3):
        y[a] = ymap[a, 0] * i + ymap[a, 1] * j + ymap[a, 2] * k + ymap[a, 3]
    for a in range(3):
        p[a] = pmap[a, 0] * y[0] + pmap[a, 1] * y[1] + pmap[a, 2] * y[2] + pmap[a, 3]
    p[pe_axis] += shift[n]


@njit(cache=True, inline="always")
def _interior(p, shape):  # pragma: no cover - compiled
    return (1.0 <= p[0] < shape[0] - 2.0) and (1.0 <= p[1] < shape[1] - 2.0) and (1.0 <= p[2] < shape[2] - 2.0)


@kernel()
def _pull_values(samples, ijk, shift, ymap, pmap, pe_axis, out):  # pragma: no cover - compiled
    y, p = np.empty(3), np.empty(3)
    w, dw = np.empty((3, 4)), np.empty((3, 4))
    for n in range(ijk.shape[0]):
        _position(ijk, n, ymap, pmap, shift, pe_axis, y, p)
        if _interior(p, samples.shape):
            out[n] = _value_gradient(samples.ravel(), samples.shape, p[0], p[1], p[2], w, dw)[0]
        else:
            out[n] = np.nan


def pull_values(samples, ijk, shift, ymap, pmap, pe_axis):
    """B-spline values (coefficients = `samples`) at the source positions of voxels `ijk` (numba).

    NaN where a voxel's taps leave the grid. See the module docstring for `ymap` and `pmap`.
    """
    out = np.empty(len(ijk))
    _pull_values(np.ascontiguousarray(samples, np.float64), np.ascontiguousarray(ijk, np.int64),
                 np.ascontiguousarray(shift, np.float64), np.ascontiguousarray(ymap, np.float64),
                 np.ascontiguousarray(pmap, np.float64), int(pe_axis), out)
    return out


@njit(cache=True, inline="always")
def _accumulate(acc, wn, r, row, still):  # pragma: no cover - compiled
    acc[0] += wn * r * r
    q = 7
    for a in range(6):
        acc[1 + a] += wn * r * row[a]
        wa = wn * row[a]
        for b in range(a, 6):
            acc[q] += wa * row[b]
            q += 1
    acc[28] += wn
    acc[29] += wn * still * still


@kernel(fastmath=_FMA)
def _normal_chunk(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis, lo, hi,
                  acc):  # pragma: no cover - compiled
    y, p, row = np.empty(3), np.empty(3), np.empty(6)
    w, dw = np.empty((3, 4)), np.empty((3, 4))
    flat = samples.ravel()
    for n in range(lo, hi):
        _position(ijk, n, ymap, pmap, shift, pe_axis, y, p)
        if not _interior(p, samples.shape):
            continue
        value, g0, g1, g2 = _value_gradient(flat, samples.shape, p[0], p[1], p[2], w, dw)
        s0, s1, s2 = gradient[n, 0], gradient[n, 1], gradient[n, 2]
        linear = 1.0 + jmap[0, 0] * s0 + jmap[0, 1] * s1 + jmap[0, 2] * s2
        jn = max(linear, floor)
        live = value if linear > floor else 0.0
        r = jn * value - still[n]
        h0 = jn * (pmap[0, 0] * g0 + pmap[1, 0] * g1 + pmap[2, 0] * g2)
        h1 = jn * (pmap[0, 1] * g0 + pmap[1, 1] * g1 + pmap[2, 1] * g2)
        h2 = jn * (pmap[0, 2] * g0 + pmap[1, 2] * g1 + pmap[2, 2] * g2)
        row[0], row[1], row[2] = h0, h1, h2
        row[3] = y[1] * h2 - y[2] * h1 + live * (jmap[1, 0] * s0 + jmap[1, 1] * s1 + jmap[1, 2] * s2)
        row[4] = y[2] * h0 - y[0] * h2 + live * (jmap[2, 0] * s0 + jmap[2, 1] * s1 + jmap[2, 2] * s2)
        row[5] = y[0] * h1 - y[1] * h0 + live * (jmap[3, 0] * s0 + jmap[3, 1] * s1 + jmap[3, 2] * s2)
        _accumulate(acc, weight[n], r, row, still[n])


@kernel(parallel=True, fastmath=_FMA)
def _normal_parallel(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis,
                     out):  # pragma: no cover - compiled
    n, chunks = ijk.shape[0], out.shape[0]
    for c in prange(chunks):
        _normal_chunk(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis,
                      n * c // chunks, n * (c + 1) // chunks, out[c])


@kernel(fastmath=_FMA)
def _normal_serial(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis,
                   out):  # pragma: no cover - compiled
    _normal_chunk(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis, 0,
                  ijk.shape[0], out[0])


def normal_equations(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis,
                     parallel=None):
    """Sums of the Gauss-Newton normal equations of the pose cost over voxels `ijk` (numba).

    The intensity weight of voxel n is ``jac = max(1 + jmap[0] . gradient[n], floor)`` (the
    Jacobian along the phase-encode axis of the moved volume, `gradient` the shift's derivatives
    along the level's voxel axes, ``jmap[0]`` the pose's column ``Q^-1 e_pe``); ``jmap[1 + a]`` is
    the derivative of that column with respect to the rotation about world axis a, so the
    Jacobian of the residual includes the weight's change with the rotation.

    Returns a (:data:`SUMS`,) array: ``sum w r^2``, ``sum w r J`` (6), the upper triangle of
    ``sum w J J^T`` (21, row by row), ``sum w`` and ``sum w still^2`` over the voxels counted.
    """
    arrays = [np.ascontiguousarray(a, np.float64) for a in (samples, shift, gradient, weight, still, ymap, pmap,
                                                            jmap)]
    samples, shift, gradient, weight, still, ymap, pmap, jmap = arrays
    ijk = np.ascontiguousarray(ijk, np.int64)
    use = bool(len(ijk) >= PARALLEL_POSE_VOXELS) if parallel is None else bool(parallel)
    out = np.zeros((8 if use else 1, SUMS))
    (_normal_parallel if use else _normal_serial)(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap,
                                                  float(floor), int(pe_axis), out)
    return out.sum(axis=0)


def _positions_reference(ijk, shift, ymap, pmap, pe_axis):
    ijk = np.asarray(ijk, float).T
    y = np.asarray(ymap)[:, :3] @ ijk + np.asarray(ymap)[:, 3:4]
    p = np.asarray(pmap)[:, :3] @ y + np.asarray(pmap)[:, 3:4]
    p[pe_axis] += np.asarray(shift, float)
    return y, p


def _interior_reference(p, shape):
    return np.all((p >= 1.0) & (p < np.array(shape, float)[:, None] - 2.0), axis=0)


def pull_values_reference(samples, ijk, shift, ymap, pmap, pe_axis):
    """Plain-numpy reference of :func:`pull_values`."""
    samples = np.asarray(samples, float)
    _, p = _positions_reference(ijk, shift, ymap, pmap, pe_axis)
    inside = _interior_reference(p, samples.shape)
    value = _bspline_reference(samples, np.clip(p, 1.0, np.array(samples.shape)[:, None] - 2.0))
    return np.where(inside, value, np.nan)


def normal_equations_reference(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, floor, pe_axis):
    """Plain-numpy reference of :func:`normal_equations`."""
    samples = np.asarray(samples, float)
    y, p = _positions_reference(ijk, shift, ymap, pmap, pe_axis)
    inside = _interior_reference(p, samples.shape)
    value, grad = _bspline_reference(samples, np.clip(p, 1.0, np.array(samples.shape)[:, None] - 2.0), True)
    gradient, weight, still, jmap = (np.asarray(a, float) for a in (gradient, weight, still, jmap))
    linear = 1.0 + gradient @ jmap[0]
    jac = np.maximum(linear, floor)
    w = weight * inside
    r = jac * value - still
    h = jac * (np.asarray(pmap)[:, :3].T @ grad)
    turn = np.cross(y.T, h.T).T + (value * (linear > floor)) * (gradient @ jmap[1:].T).T
    rows = np.concatenate([h, turn])
    matrix = (rows * w) @ rows.T
    upper = matrix[np.triu_indices(6)]
    return np.concatenate([[np.sum(w * r * r)], rows @ (w * r), upper, [w.sum(), np.sum(w * still * still)]])
