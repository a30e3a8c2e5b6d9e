"""Numba kernels of motion correction, each beside a plain-numpy reference.

Private module: the public entry point is :func:`fieldfix.motion.align_resample_volume`.

* ``prefilter_cubic``: the cubic B-spline prefilter along all three axes (mirror boundary;
  Unser, Aldroubi and Eden 1993, IEEE Trans. Signal Process. 41(2):821, recursive filter with
  pole ``sqrt(3) - 2``); values equal ``scipy.ndimage.spline_filter(order=3, mode='mirror')``.
* ``resample_rigid_shift``: motion and distortion in one interpolation: every output voxel
  takes the cubic B-spline value at its source position (a rigid voxel map plus a shift along
  the phase-encode axis) times an intensity weight; zero beyond half a voxel outside.

The ``*_reference`` functions compute the same in plain numpy; the tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from ._align_kernels import _use_parallel

__all__ = ["prefilter_cubic", "prefilter_cubic_reference", "resample_rigid_shift", "resample_rigid_shift_reference"]

_POLE = np.sqrt(3.0) - 2.0


# ---------------------------------------------------------------------------------------------
# Cubic B-spline prefilter and the single-interpolation resampler
# ---------------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _filter_line(c, n):  # pragma: no cover - compiled
    """In-place cubic B-spline prefilter of one line, mirror boundary, exact initial values."""
    z = _POLE
    z_i = z
    z_n1 = z ** (n - 1)
    first = c[0] + z_n1 * c[n - 1]
    for k in range(1, n - 1):
        first += z_i * (c[k] + z_n1 * c[n - 1 - k])
        z_i *= z
    c[0] = first / (1.0 - z_n1 * z_n1)
    for k in range(1, n):
        c[k] += z * c[k - 1]
    c[n - 1] = (z / (z * z - 1.0)) * (c[n - 1] + z * c[n - 2])
    for k in range(n - 2, -1, -1):
        c[k] = z * (c[k + 1] - c[k])
    for k in range(n):
        c[k] *= 6.0


@njit(cache=True)
def _filter_rows(c):  # pragma: no cover - compiled
    """Prefilter a 2D array along its first axis, all columns at once (contiguous rows)."""
    n, m = c.shape
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


@njit(parallel=True, cache=True)
def _prefilter_parallel(c):  # pragma: no cover - compiled
    nx, ny, nz = c.shape
    if nx > 1:
        for j in prange(ny):
            block = np.ascontiguousarray(c[:, j, :])
            _filter_rows(block)
            c[:, j, :] = block
    if ny > 1:
        for i in prange(nx):
            _filter_rows(c[i])
    if nz > 1:
        for i in prange(nx):
            for j in range(ny):
                _filter_line(c[i, j], nz)


@njit(cache=True)
def _prefilter_serial(c):  # pragma: no cover - compiled
    nx, ny, nz = c.shape
    if nx > 1:
        for j in range(ny):
            block = np.ascontiguousarray(c[:, j, :])
            _filter_rows(block)
            c[:, j, :] = block
    if ny > 1:
        for i in range(nx):
            _filter_rows(c[i])
    if nz > 1:
        for i in range(nx):
            for j in range(ny):
                _filter_line(c[i, j], nz)


def prefilter_cubic(volume, parallel=None):
    """Cubic B-spline coefficients of a 3D volume, mirror boundary, C-ordered float64 (numba)."""
    c = np.array(volume, dtype=np.float64, order="C", copy=True)
    if c.ndim != 3:
        raise ValueError(f"prefilter_cubic needs a 3D volume, got {c.ndim} dimensions")
    (_prefilter_parallel if _use_parallel(parallel, c.size) else _prefilter_serial)(c)
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


@njit(cache=True, inline="always")
def _mirror_index(m, n):  # pragma: no cover - compiled
    if n == 1:
        return 0
    period = 2 * (n - 1)
    m = m % period
    if m < 0:
        m += period
    if m >= n:
        m = period - m
    return m


@njit(cache=True, inline="always")
def _axis_taps(p, n, idx, w):  # pragma: no cover - compiled
    """Clamp, cubic B-spline weights and tap indices; True when no tap needs mirroring."""
    p = min(max(p, 0.0), n - 1.0)
    base = int(np.floor(p))
    f = p - base
    f2 = f * f
    f3 = f2 * f
    w[0] = (1.0 - f) * (1.0 - f) * (1.0 - f) * (1.0 / 6.0)
    w[1] = (4.0 - 6.0 * f2 + 3.0 * f3) * (1.0 / 6.0)
    w[2] = (1.0 + 3.0 * f + 3.0 * f2 - 3.0 * f3) * (1.0 / 6.0)
    w[3] = f3 * (1.0 / 6.0)
    if base >= 1 and base + 2 <= n - 1:
        for t in range(4):
            idx[t] = base - 1 + t
    else:
        for t in range(4):
            idx[t] = _mirror_index(base - 1 + t, n)


@njit(cache=True, inline="always")
def _resample_row(flat, shape, vmap, shift, weight, pe_axis, out, i):  # pragma: no cover - compiled
    ny, nz = out.shape[1], out.shape[2]
    sx, sy, sz = shape
    ix = np.empty(4, np.int64)
    iy = np.empty(4, np.int64)
    iz = np.empty(4, np.int64)
    wx = np.empty(4)
    wy = np.empty(4)
    wz = np.empty(4)
    for j in range(ny):
        for k in range(nz):
            p0 = vmap[0, 0] * i + vmap[0, 1] * j + vmap[0, 2] * k + vmap[0, 3]
            p1 = vmap[1, 0] * i + vmap[1, 1] * j + vmap[1, 2] * k + vmap[1, 3]
            p2 = vmap[2, 0] * i + vmap[2, 1] * j + vmap[2, 2] * k + vmap[2, 3]
            s = shift[i, j, k]
            if pe_axis == 0:
                p0 += s
            elif pe_axis == 1:
                p1 += s
            else:
                p2 += s
            if not (-0.5 <= p0 <= sx - 0.5 and -0.5 <= p1 <= sy - 0.5 and -0.5 <= p2 <= sz - 0.5):
                out[i, j, k] = 0.0
                continue
            _axis_taps(p0, sx, ix, wx)
            _axis_taps(p1, sy, iy, wy)
            _axis_taps(p2, sz, iz, wz)
            acc = 0.0
            for a in range(4):
                plane = 0.0
                for b in range(4):
                    o = (ix[a] * sy + iy[b]) * sz
                    plane += wy[b] * (wz[0] * flat[o + iz[0]] + wz[1] * flat[o + iz[1]]
                                      + wz[2] * flat[o + iz[2]] + wz[3] * flat[o + iz[3]])
                acc += wx[a] * plane
            out[i, j, k] = acc * weight[i, j, k]


@njit(parallel=True, cache=True)
def _resample_parallel(coef, vmap, shift, weight, pe_axis, out):  # pragma: no cover - compiled
    flat = coef.ravel()
    for i in prange(out.shape[0]):
        _resample_row(flat, coef.shape, vmap, shift, weight, pe_axis, out, i)


@njit(cache=True)
def _resample_serial(coef, vmap, shift, weight, pe_axis, out):  # pragma: no cover - compiled
    flat = coef.ravel()
    for i in range(out.shape[0]):
        _resample_row(flat, coef.shape, vmap, shift, weight, pe_axis, out, i)


def resample_rigid_shift(coef, vmap, shift, weight, pe_axis, out=None, parallel=None):
    """Cubic B-spline values at ``vmap @ (i, j, k, 1) + shift * e_pe``, times `weight` (numba).

    Parameters
    ----------
    coef : (X, Y, Z) float64, B-spline coefficients (:func:`prefilter_cubic`)
    vmap : (3, 4) output voxel -> source voxel map
    shift, weight : (X', Y', Z') arrays on the output grid
    pe_axis : int, source voxel axis of the shift
    out : (X', Y', Z') float32 C-contiguous array, optional
    """
    shift = np.ascontiguousarray(shift, np.float64)
    if out is None:
        out = np.empty(shift.shape, np.float32)
    kernel = _resample_parallel if _use_parallel(parallel, shift.size) else _resample_serial
    kernel(np.ascontiguousarray(coef, np.float64), np.ascontiguousarray(vmap, np.float64), shift,
                          np.ascontiguousarray(weight, np.float64), int(pe_axis), out)
    return out


def resample_rigid_shift_reference(coef, vmap, shift, weight, pe_axis):
    """Plain-numpy reference of :func:`resample_rigid_shift` (64 taps vectorised)."""
    coef = np.asarray(coef, float)
    shape = np.shape(shift)
    ijk = np.indices(shape, dtype=float).reshape(3, -1)
    pos = np.asarray(vmap, float)[:, :3] @ ijk + np.asarray(vmap, float)[:, 3:4]
    pos[pe_axis] += np.asarray(shift, float).ravel()
    inside = np.all((pos >= -0.5) & (pos <= np.array(coef.shape)[:, None] - 0.5), axis=0)
    taps = []
    for a in range(3):
        n = coef.shape[a]
        p = np.clip(pos[a], 0.0, n - 1.0)
        base = np.floor(p).astype(int)
        f = p - base
        w = np.stack([(1 - f) ** 3 / 6, (4 - 6 * f**2 + 3 * f**3) / 6, (1 + 3 * f + 3 * f**2 - 3 * f**3) / 6,
                      f**3 / 6])
        idx = base[None] + np.arange(-1, 3)[:, None]
        period = max(2 * (n - 1), 1)
        idx = np.mod(idx, period)
        idx = np.where(idx >= n, period - idx, idx) if n > 1 else np.zeros_like(idx)
        taps.append((idx, w))
    total = np.zeros(pos.shape[1])
    for a in range(4):
        for b in range(4):
            for c in range(4):
                total += (taps[0][1][a] * taps[1][1][b] * taps[2][1][c]
                          * coef[taps[0][0][a], taps[1][0][b], taps[2][0][c]])
    return (total * inside).reshape(shape) * np.asarray(weight, float)
