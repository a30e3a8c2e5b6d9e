"""Numba kernels of field-map alignment, each beside a plain-numpy reference.

Private module: the public entry point is :mod:`fieldfix.align`.

* ``sample_pair``: trilinear samples of a magnitude and a field at the source positions of
  every voxel of a target grid (a 3x4 voxel-to-voxel map), with their derivatives along the
  three source voxel axes. Magnitude outside the source voxels' extent is zero; the field
  takes the nearest edge value.
* ``distort_lines``: the signal-conserving forward model along the last axis (the same rule
  as :func:`fieldfix.unwarp.distort`): each voxel's signal is spread over the interval between
  its two edges' shifted positions (edge shifts are the mean of the two neighbouring voxel
  shifts, extrapolated linearly at the ends).
* ``distort_adjoint``: for a cost gradient ``g = dC/d(distorted)``, the transpose of the forward
  model applied to ``g`` (``dC/d(undistorted)``) and the derivative of the cost with respect to
  each voxel's shift ``dC/d(shift)``, exact for the piecewise-linear overlap rule.
* ``pose_sums``: the sums ``sum h`` and ``sum h z^T`` from which the gradient of the cost with
  respect to the six rigid parameters follows (``h`` is the cost gradient with respect to each
  voxel's source position, ``z`` its world position relative to the centre and translation).

The kernels of motion estimation and correction (cubic B-spline prefilter, the single-interpolation
resampler, the pose cost's normal equations) are in :mod:`fieldfix._motion_kernels`.

The ``*_reference`` functions compute the same in plain numpy; the tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from ._kernel import kernel

__all__ = [
    "sample_pair", "sample_pair_reference",
    "distort_lines", "distort_lines_reference",
    "distort_adjoint", "distort_adjoint_reference",
    "pose_sums", "pose_sums_reference",
    "PARALLEL_VOXELS",
]

_MIN_WIDTH = 1e-9


# ---------------------------------------------------------------------------------------------
# Trilinear sampling with derivatives
# ---------------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _corner(p, n):  # pragma: no cover - compiled
    """Clamped position, lower corner, fraction and whether the derivative is live."""
    live = 1.0
    if p <= 0.0:
        p = 0.0
        live = 0.0
    elif p >= n - 1.0:
        p = n - 1.0
        live = 0.0
    base = int(np.floor(p))
    if base > n - 2:
        base = n - 2
    return base, p - base, live


@njit(cache=True, inline="always")
def _trilinear(vol, x, y, z):  # pragma: no cover - compiled
    nx, ny, nz = vol.shape
    i, fx, lx = _corner(x, nx)
    j, fy, ly = _corner(y, ny)
    k, fz, lz = _corner(z, nz)
    c000 = vol[i, j, k]
    c100 = vol[i + 1, j, k]
    c010 = vol[i, j + 1, k]
    c110 = vol[i + 1, j + 1, k]
    c001 = vol[i, j, k + 1]
    c101 = vol[i + 1, j, k + 1]
    c011 = vol[i, j + 1, k + 1]
    c111 = vol[i + 1, j + 1, k + 1]
    c00 = c000 + fx * (c100 - c000)
    c10 = c010 + fx * (c110 - c010)
    c01 = c001 + fx * (c101 - c001)
    c11 = c011 + fx * (c111 - c011)
    c0 = c00 + fy * (c10 - c00)
    c1 = c01 + fy * (c11 - c01)
    value = c0 + fz * (c1 - c0)
    dz = (c1 - c0) * lz
    dy = ((1.0 - fz) * (c10 - c00) + fz * (c11 - c01)) * ly
    e0 = (1.0 - fy) * (c100 - c000) + fy * (c110 - c010)
    e1 = (1.0 - fy) * (c101 - c001) + fy * (c111 - c011)
    dx = ((1.0 - fz) * e0 + fz * e1) * lx
    return value, dx, dy, dz


@njit(cache=True, inline="always")
def _sample_row(mag, field, vmap, u, f, gu, gf, i):  # pragma: no cover - compiled
    ny, nz = u.shape[1], u.shape[2]
    sx, sy, sz = mag.shape
    for j in range(ny):
        for k in range(nz):
            x = vmap[0, 0] * i + vmap[0, 1] * j + vmap[0, 2] * k + vmap[0, 3]
            y = vmap[1, 0] * i + vmap[1, 1] * j + vmap[1, 2] * k + vmap[1, 3]
            z = vmap[2, 0] * i + vmap[2, 1] * j + vmap[2, 2] * k + vmap[2, 3]
            fv, fdx, fdy, fdz = _trilinear(field, x, y, z)
            f[i, j, k] = fv
            gf[i, j, k, 0] = fdx
            gf[i, j, k, 1] = fdy
            gf[i, j, k, 2] = fdz
            if -0.5 <= x <= sx - 0.5 and -0.5 <= y <= sy - 0.5 and -0.5 <= z <= sz - 0.5:
                mv, mdx, mdy, mdz = _trilinear(mag, x, y, z)
            else:
                mv, mdx, mdy, mdz = 0.0, 0.0, 0.0, 0.0
            u[i, j, k] = mv
            gu[i, j, k, 0] = mdx
            gu[i, j, k, 1] = mdy
            gu[i, j, k, 2] = mdz


# Parallel loops and their single-threaded twins (as in fieldfix._unwarp_kernels): small grids
# and busy machines run faster on one thread than with threads waiting for each other.
@kernel(parallel=True)
def _sample_pair_parallel(mag, field, vmap, u, f, gu, gf):  # pragma: no cover - compiled
    for i in prange(u.shape[0]):
        _sample_row(mag, field, vmap, u, f, gu, gf, i)


@kernel()
def _sample_pair_serial(mag, field, vmap, u, f, gu, gf):  # pragma: no cover - compiled
    for i in range(u.shape[0]):
        _sample_row(mag, field, vmap, u, f, gu, gf, i)


#: Grids with at least this many voxels use the parallel loops when ``parallel`` is None.
PARALLEL_VOXELS = 1 << 18


def use_parallel(parallel, size) -> bool:
    return bool(size >= PARALLEL_VOXELS) if parallel is None else bool(parallel)


def _check_source(array, name):
    array = np.ascontiguousarray(array, np.float64)
    if array.ndim != 3 or min(array.shape) < 2:
        raise ValueError(f"{name} must be 3D with at least 2 voxels per axis, got shape {array.shape}")
    return array


def sample_pair(mag, field, vmap, shape, parallel=None):
    """Sample `mag` and `field` at ``vmap @ (i, j, k, 1)`` for every voxel of `shape` (numba).

    Returns ``u, f, gu, gf``: values (shape) and derivatives along the source voxel axes
    (shape + (3,)), all float64. `parallel`: True, False or None (by size).
    """
    mag = _check_source(mag, "mag")
    field = _check_source(field, "field")
    shape = tuple(int(n) for n in shape)
    u, f = np.empty(shape), np.empty(shape)
    gu, gf = np.empty(shape + (3,)), np.empty(shape + (3,))
    kernel = _sample_pair_parallel if use_parallel(parallel, u.size) else _sample_pair_serial
    kernel(mag, field, np.ascontiguousarray(vmap, np.float64), u, f, gu, gf)
    return u, f, gu, gf


def _trilinear_reference(vol, pos):
    """Plain-numpy trilinear value and derivatives at positions (3, N), edges clamped."""
    value = np.zeros(pos.shape[1])
    grad = np.zeros((3, pos.shape[1]))
    base, frac, live = [], [], []
    for a in range(3):
        n = vol.shape[a]
        p = np.clip(pos[a], 0.0, n - 1.0)
        b = np.minimum(np.floor(p).astype(int), n - 2)
        base.append(b)
        frac.append(p - b)
        live.append(((pos[a] > 0.0) & (pos[a] < n - 1.0)).astype(float))
    for corner in np.ndindex(2, 2, 2):
        sample = vol[base[0] + corner[0], base[1] + corner[1], base[2] + corner[2]]
        w = [frac[a] if corner[a] else 1.0 - frac[a] for a in range(3)]
        dw = [np.ones_like(frac[a]) if corner[a] else -np.ones_like(frac[a]) for a in range(3)]
        value += w[0] * w[1] * w[2] * sample
        grad[0] += dw[0] * w[1] * w[2] * sample
        grad[1] += w[0] * dw[1] * w[2] * sample
        grad[2] += w[0] * w[1] * dw[2] * sample
    return value, grad * np.array(live)


def sample_pair_reference(mag, field, vmap, shape):
    """Plain-numpy reference of :func:`sample_pair`."""
    mag, field = np.asarray(mag, float), np.asarray(field, float)
    ijk = np.indices(shape, dtype=float).reshape(3, -1)
    pos = np.asarray(vmap, float)[:, :3] @ ijk + np.asarray(vmap, float)[:, 3:4]
    fv, fg = _trilinear_reference(field, pos)
    mv, mg = _trilinear_reference(mag, pos)
    inside = np.all((pos >= -0.5) & (pos <= np.array(mag.shape)[:, None] - 0.5), axis=0)
    mv, mg = mv * inside, mg * inside
    return (mv.reshape(shape), fv.reshape(shape), mg.T.reshape(shape + (3,)), fg.T.reshape(shape + (3,)))


# ---------------------------------------------------------------------------------------------
# Forward model along lines and its adjoint
# ---------------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _edges(s, e):  # pragma: no cover - compiled
    n = s.shape[0]
    e[0] = -0.5 + 1.5 * s[0] - 0.5 * s[1]
    for k in range(1, n):
        e[k] = k - 0.5 + 0.5 * (s[k - 1] + s[k])
    e[n] = n - 0.5 + 1.5 * s[n - 1] - 0.5 * s[n - 2]


@njit(cache=True, inline="always")
def _distort_line(values, shift, out, line):  # pragma: no cover - compiled
    n = values.shape[1]
    e = np.empty(n + 1)
    _edges(shift[line], e)
    for j in range(n):
        out[line, j] = 0.0
    for j in range(n):
        lo, hi = e[j], e[j + 1]
        if hi < lo:
            lo, hi = hi, lo
        width = hi - lo
        v = values[line, j]
        if width < _MIN_WIDTH:
            cell = int(np.floor(lo + 0.5))
            if 0 <= cell < n:
                out[line, cell] += v
            continue
        density = v / width
        first = max(int(np.floor(lo + 0.5)), 0)
        last = min(int(np.floor(hi + 0.5)), n - 1)
        for cell in range(first, last + 1):
            a = max(lo, cell - 0.5)
            b = min(hi, cell + 0.5)
            if b > a:
                out[line, cell] += density * (b - a)


@kernel(parallel=True)
def _distort_lines_parallel(values, shift, out):  # pragma: no cover - compiled
    for line in prange(values.shape[0]):
        _distort_line(values, shift, out, line)


@kernel()
def _distort_lines_serial(values, shift, out):  # pragma: no cover - compiled
    for line in range(values.shape[0]):
        _distort_line(values, shift, out, line)


def distort_lines(values, shift, parallel=None):
    """Forward model along the last axis of (L, N) arrays (numba); returns float64 (L, N)."""
    values = np.ascontiguousarray(values, np.float64)
    shift = np.ascontiguousarray(shift, np.float64)
    if values.shape != shift.shape or values.ndim != 2 or values.shape[1] < 2:
        raise ValueError(f"values {values.shape} and shift {shift.shape} must be (lines, n >= 2)")
    out = np.empty(values.shape)
    kernel = _distort_lines_parallel if use_parallel(parallel, values.size) else _distort_lines_serial
    kernel(values, shift, out)
    return out


def _edges_reference(shift):
    n = shift.shape[1]
    first = 1.5 * shift[:, :1] - 0.5 * shift[:, 1:2]
    last = 1.5 * shift[:, -1:] - 0.5 * shift[:, -2:-1]
    middle = 0.5 * (shift[:, 1:] + shift[:, :-1])
    return np.arange(n + 1) - 0.5 + np.concatenate([first, middle, last], axis=1)


def _cumulative_reference(g, q):
    """Integral of the piecewise-constant line g (cells [m - 1/2, m + 1/2]) up to q, and g at q."""
    n = g.shape[1]
    cum = np.concatenate([np.zeros((g.shape[0], 1)), np.cumsum(g, axis=1)], axis=1)
    qc = np.clip(q, -0.5, n - 0.5)
    cell = np.clip(np.floor(qc + 0.5).astype(int), 0, n - 1)
    rows = np.arange(g.shape[0])[:, None]
    at = g[rows, cell] * ((q >= -0.5) & (q < n - 0.5))
    return cum[rows, cell] + g[rows, cell] * (qc - (cell - 0.5)), at


def distort_lines_reference(values, shift):
    """Plain-numpy reference of :func:`distort_lines`: the overlap of each mapped interval with each cell."""
    values = np.asarray(values, float)
    e = _edges_reference(np.asarray(shift, float))
    n = values.shape[1]
    lo, hi = np.minimum(e[:, :-1], e[:, 1:]), np.maximum(e[:, :-1], e[:, 1:])
    cells = np.arange(n)
    overlap = np.clip(np.minimum(hi[..., None], cells + 0.5) - np.maximum(lo[..., None], cells - 0.5), 0.0, None)
    width = hi - lo
    degenerate = width < _MIN_WIDTH
    share = overlap / np.where(degenerate, 1.0, width)[..., None]
    point = (np.floor(lo + 0.5)[..., None] == cells).astype(float)
    share = np.where(degenerate[..., None], point, share)
    return np.einsum("lj,ljc->lc", values, share)


@njit(cache=True, inline="always")
def _adjoint_line(values, shift, g, a_out, b_out, line):  # pragma: no cover - compiled
    n = values.shape[1]
    e = np.empty(n + 1)
    cum = np.empty(n + 1)
    de = np.zeros(n + 1)
    _edges(shift[line], e)
    cum[0] = 0.0
    for m in range(n):
        cum[m + 1] = cum[m] + g[line, m]
    for j in range(n):
        left, right = e[j], e[j + 1]
        gl, vl = _integral(g[line], cum, left, n)
        gr, vr = _integral(g[line], cum, right, n)
        width = right - left
        if abs(width) < _MIN_WIDTH:
            a_out[line, j] = vl
            continue
        mean = (gr - gl) / width
        a_out[line, j] = mean
        v = values[line, j]
        de[j + 1] += v * (vr - mean) / width
        de[j] += v * (mean - vl) / width
    for j in range(n):
        b_out[line, j] = 0.0
    b_out[line, 0] += 1.5 * de[0]
    b_out[line, 1] -= 0.5 * de[0]
    for k in range(1, n):
        b_out[line, k - 1] += 0.5 * de[k]
        b_out[line, k] += 0.5 * de[k]
    b_out[line, n - 1] += 1.5 * de[n]
    b_out[line, n - 2] -= 0.5 * de[n]


@kernel(parallel=True)
def _distort_adjoint_parallel(values, shift, g, a_out, b_out):  # pragma: no cover - compiled
    for line in prange(values.shape[0]):
        _adjoint_line(values, shift, g, a_out, b_out, line)


@kernel()
def _distort_adjoint_serial(values, shift, g, a_out, b_out):  # pragma: no cover - compiled
    for line in range(values.shape[0]):
        _adjoint_line(values, shift, g, a_out, b_out, line)


@njit(cache=True, inline="always")
def _integral(g, cum, q, n):  # pragma: no cover - compiled
    """Integral of the piecewise-constant line up to q, and its value at q (0 outside)."""
    qc = min(max(q, -0.5), n - 0.5)
    cell = int(np.floor(qc + 0.5))
    if cell > n - 1:
        cell = n - 1
    at = g[cell] if (-0.5 <= q < n - 0.5) else 0.0
    return cum[cell] + g[cell] * (qc - (cell - 0.5)), at


def distort_adjoint(values, shift, g, parallel=None):
    """``a = D(shift)^T g`` and ``b = d<g, D(shift) values>/d shift`` for (L, N) lines (numba)."""
    values = np.ascontiguousarray(values, np.float64)
    shift = np.ascontiguousarray(shift, np.float64)
    g = np.ascontiguousarray(g, np.float64)
    if not values.shape == shift.shape == g.shape or values.ndim != 2 or values.shape[1] < 2:
        raise ValueError("values, shift and g must be (lines, n >= 2) arrays of one shape")
    a, b = np.empty(values.shape), np.empty(values.shape)
    kernel = _distort_adjoint_parallel if use_parallel(parallel, values.size) else _distort_adjoint_serial
    kernel(values, shift, g, a, b)
    return a, b


def distort_adjoint_reference(values, shift, g):
    """Plain-numpy reference of :func:`distort_adjoint` (vectorised over lines)."""
    values, shift, g = (np.asarray(v, float) for v in (values, shift, g))
    e = _edges_reference(shift)
    big_g, at = _cumulative_reference(g, e)
    width = e[:, 1:] - e[:, :-1]
    degenerate = np.abs(width) < _MIN_WIDTH
    safe = np.where(degenerate, 1.0, width)
    mean = np.where(degenerate, at[:, :-1], (big_g[:, 1:] - big_g[:, :-1]) / safe)
    d_right = np.where(degenerate, 0.0, values * (at[:, 1:] - mean) / safe)
    d_left = np.where(degenerate, 0.0, values * (mean - at[:, :-1]) / safe)
    de = np.zeros(e.shape)
    de[:, 1:] += d_right
    de[:, :-1] += d_left
    b = np.zeros(shift.shape)
    b[:, 0] += 1.5 * de[:, 0]
    b[:, 1] -= 0.5 * de[:, 0]
    b[:, :-1] += 0.5 * de[:, 1:-1]
    b[:, 1:] += 0.5 * de[:, 1:-1]
    b[:, -1] += 1.5 * de[:, -1]
    b[:, -2] -= 0.5 * de[:, -1]
    return mean, b


# ---------------------------------------------------------------------------------------------
# Rigid-parameter gradient sums
# ---------------------------------------------------------------------------------------------

@njit(cache=True, inline="always")
def _pose_row(a, b, gu, gf, kappa, world, origin, partial, i):  # pragma: no cover - compiled
    ny, nz = a.shape[1], a.shape[2]
    acc = np.zeros(12)
    for j in range(ny):
        for k in range(nz):
            ai = a[i, j, k]
            bi = kappa * b[i, j, k]
            h0 = ai * gu[i, j, k, 0] + bi * gf[i, j, k, 0]
            h1 = ai * gu[i, j, k, 1] + bi * gf[i, j, k, 1]
            h2 = ai * gu[i, j, k, 2] + bi * gf[i, j, k, 2]
            z0 = world[0, 0] * i + world[0, 1] * j + world[0, 2] * k + world[0, 3] - origin[0]
            z1 = world[1, 0] * i + world[1, 1] * j + world[1, 2] * k + world[1, 3] - origin[1]
            z2 = world[2, 0] * i + world[2, 1] * j + world[2, 2] * k + world[2, 3] - origin[2]
            acc[0] += h0
            acc[1] += h1
            acc[2] += h2
            acc[3] += h0 * z0
            acc[4] += h0 * z1
            acc[5] += h0 * z2
            acc[6] += h1 * z0
            acc[7] += h1 * z1
            acc[8] += h1 * z2
            acc[9] += h2 * z0
            acc[10] += h2 * z1
            acc[11] += h2 * z2
    for c in range(12):
        partial[i, c] = acc[c]


@kernel(parallel=True)
def _pose_sums_parallel(a, b, gu, gf, kappa, world, origin, partial):  # pragma: no cover - compiled
    for i in prange(a.shape[0]):
        _pose_row(a, b, gu, gf, kappa, world, origin, partial, i)


@kernel()
def _pose_sums_serial(a, b, gu, gf, kappa, world, origin, partial):  # pragma: no cover - compiled
    for i in range(a.shape[0]):
        _pose_row(a, b, gu, gf, kappa, world, origin, partial, i)


def pose_sums(a, b, gu, gf, kappa, world, origin, parallel=None):
    """``sum h`` (3,) and ``sum h z^T`` (3, 3) with ``h = a gu + kappa b gf`` (numba).

    `world` is the target grid's 3x4 voxel-to-world map and ``z = world @ ijk - origin``.
    """
    a = np.ascontiguousarray(a, np.float64)
    partial = np.empty((a.shape[0], 12))
    kernel = _pose_sums_parallel if use_parallel(parallel, a.size) else _pose_sums_serial
    kernel(a, np.ascontiguousarray(b, np.float64), np.ascontiguousarray(gu, np.float64),
               np.ascontiguousarray(gf, np.float64), float(kappa), np.ascontiguousarray(world, np.float64),
               np.ascontiguousarray(origin, np.float64), partial)
    total = partial.sum(axis=0)
    return total[:3], total[3:].reshape(3, 3)


def pose_sums_reference(a, b, gu, gf, kappa, world, origin):
    """Plain-numpy reference of :func:`pose_sums`."""
    h = (np.asarray(a)[..., None] * gu + kappa * np.asarray(b)[..., None] * gf).reshape(-1, 3)
    ijk = np.indices(np.shape(a), dtype=float).reshape(3, -1)
    z = (np.asarray(world)[:, :3] @ ijk + np.asarray(world)[:, 3:4] - np.asarray(origin)[:, None]).T
    return h.sum(axis=0), h.T @ z
