"""Numba kernels of field estimation from reversed phase-encode pairs, each beside a numpy reference.

Private module: the public entry points are in :mod:`fieldfix.pairs`.

All line kernels work on 3D arrays whose *last* axis is the phase-encode (PE) line
(callers pass ``np.moveaxis(a, pe_axis, -1)`` views, so no copy is made); they run in
parallel over the first axis.

* ``warp_lines``: cubic B-spline interpolation of prefiltered lines at ``y + shift(y)``,
  with its analytic derivative along the line, times the Jacobian ``1 + d shift/dy``.
  Positions more than half a voxel outside the line give zero, as in
  :mod:`fieldfix.unwarp`; within half a voxel the edge value is used (derivative zero).
* ``accumulate_gradient``: the analytic gradient of the squared-difference cost with
  respect to the field and to its derivative along the PE axis (chain rule through the
  interpolated value and the Jacobian).
* ``rigid_pull`` / ``rigid_pull_adjoint``: trilinear resampling at ``M x + o`` (voxel
  units, positions clamped to the grid as ``scipy.ndimage`` mode ``'nearest'``) and its
  exact transpose (a splat), for the rigid motion between polarities.
* ``restore_lines``: the joint least-squares restoration of Andersson, Skare & Ashburner
  2003 (NeuroImage 20(2), from memory) line by line, with a band-limited forward model:
  the undistorted line is a cubic B-spline, each distorted sample integrates it through
  the Keys 1981 cubic-convolution kernel (IEEE Trans. Acoust. Speech Signal Process.
  29(6), from memory) placed at the sample in distorted coordinates (exact Gauss
  quadrature, :func:`forward_matrix`); weighted normal equations of all images plus a
  scale-free second-difference penalty, solved by a banded Cholesky factorisation.

The ``*_reference`` functions compute the same with plain numpy (and scipy.ndimage);
tests/test_pairs_kernels.py compares them against the kernels.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from ._kernel import kernel
from ._unwarp_kernels import mirror_index as _mirror

__all__ = [
    "warp_lines", "warp_lines_reference",
    "accumulate_gradient", "accumulate_gradient_reference",
    "rigid_pull", "rigid_pull_adjoint", "rigid_pull_reference", "rigid_pull_adjoint_reference",
    "restore_lines", "restore_lines_reference", "forward_matrix", "forward_matrix_reference",
    "keys_reference", "bspline3_reference", "line_map_reference", "KEYS_RADIUS",
]


@kernel(parallel=True)
def _warp_kernel(coef, shift, dshift, corrected, value, dvalue):  # pragma: no cover - compiled
    n_a, n_b, n = coef.shape
    for a in prange(n_a):
        for b in range(n_b):
            for j in range(n):
                pos = j + shift[a, b, j]
                v = 0.0
                dv = 0.0
                if pos >= -0.5 and pos <= n - 0.5:
                    clipped = pos < 0.0 or pos > n - 1.0
                    p = min(max(pos, 0.0), n - 1.0)
                    base = int(np.floor(p))
                    f = p - base
                    f2 = f * f
                    f3 = f2 * f
                    w0 = (1.0 - f) ** 3 / 6.0
                    w1 = (4.0 - 6.0 * f2 + 3.0 * f3) / 6.0
                    w2 = (1.0 + 3.0 * f + 3.0 * f2 - 3.0 * f3) / 6.0
                    w3 = f3 / 6.0
                    c0 = coef[a, b, _mirror(base - 1, n)]
                    c1 = coef[a, b, _mirror(base, n)]
                    c2 = coef[a, b, _mirror(base + 1, n)]
                    c3 = coef[a, b, _mirror(base + 2, n)]
                    v = w0 * c0 + w1 * c1 + w2 * c2 + w3 * c3
                    if not clipped:
                        d0 = -0.5 * (1.0 - f) ** 2
                        d1 = -2.0 * f + 1.5 * f2
                        d2 = 0.5 + f - 1.5 * f2
                        d3 = 0.5 * f2
                        dv = d0 * c0 + d1 * c1 + d2 * c2 + d3 * c3
                value[a, b, j] = v
                dvalue[a, b, j] = dv
                corrected[a, b, j] = v * (1.0 + dshift[a, b, j])


def warp_lines(coef: np.ndarray, shift: np.ndarray, dshift: np.ndarray):
    """Pull prefiltered lines back along the last axis, with derivative and Jacobian (numba).

    Parameters
    ----------
    coef : (A, B, N) float64
        Cubic B-spline coefficients of the distorted image along the last axis
        (``scipy.ndimage.spline_filter1d(order=3, mode='mirror')``).
    shift, dshift : (A, B, N) float64
        Shift in voxels and its derivative ``d shift / d y`` along the last axis.

    Returns
    -------
    corrected, value, dvalue : (A, B, N) float64
        ``value * (1 + dshift)``, the interpolated value at ``y + shift`` and its
        derivative with respect to the position.
    """
    out = [np.empty(coef.shape, np.float64) for _ in range(3)]
    _warp_kernel(coef, shift, dshift, out[0], out[1], out[2])
    return out[0], out[1], out[2]


def _bspline_weights(f: np.ndarray):
    f2, f3 = f * f, f * f * f
    w = np.stack([(1 - f) ** 3 / 6, (4 - 6 * f2 + 3 * f3) / 6, (1 + 3 * f + 3 * f2 - 3 * f3) / 6, f3 / 6], -1)
    d = np.stack([-0.5 * (1 - f) ** 2, -2 * f + 1.5 * f2, 0.5 + f - 1.5 * f2, 0.5 * f2], -1)
    return w, d


def warp_lines_reference(coef, shift, dshift):
    """Plain-numpy reference of :func:`warp_lines` (vectorised taps, mirror boundary)."""
    n = coef.shape[-1]
    pos = np.arange(n) + np.asarray(shift, np.float64)
    inside = (pos >= -0.5) & (pos <= n - 0.5)
    clipped = (pos < 0) | (pos > n - 1)
    p = np.clip(pos, 0.0, n - 1.0)
    base = np.floor(p).astype(np.int64)
    w, d = _bspline_weights(p - base)
    taps = base[..., None] + np.arange(-1, 3)
    period = max(2 * (n - 1), 1)
    taps = np.abs(taps) % period
    taps = np.where(taps >= n, period - taps, taps) if n > 1 else np.zeros_like(taps)
    values = np.take_along_axis(coef, taps.reshape(coef.shape[:-1] + (n * 4,)), axis=-1).reshape(taps.shape)
    v = np.where(inside, (w * values).sum(-1), 0.0)
    dv = np.where(inside & ~clipped, (d * values).sum(-1), 0.0)
    return v * (1.0 + dshift), v, dv


@kernel(parallel=True)
def _accumulate_kernel(residual, dshift, value, dvalue, factor, g_field, g_deriv):  # pragma: no cover
    n_a, n_b, n = residual.shape
    for a in prange(n_a):
        for b in range(n_b):
            for j in range(n):
                r = factor * residual[a, b, j]
                g_field[a, b, j] += r * (1.0 + dshift[a, b, j]) * dvalue[a, b, j]
                g_deriv[a, b, j] += r * value[a, b, j]


def accumulate_gradient(residual, dshift, value, dvalue, factor: float, g_field, g_deriv) -> None:
    """Add one image's share of the cost gradient (numba, in place).

    With ``C = v(y + s) (1 + ds)``, ``s = factor * b`` and ``ds = factor * db``, a cost
    term ``sum residual * dC`` contributes ``factor * residual * (1 + ds) * v'`` to the
    gradient with respect to ``b`` (`g_field`) and ``factor * residual * v`` to that
    with respect to ``db`` (`g_deriv`, the derivative of the field along the line).
    """
    _accumulate_kernel(residual, dshift, value, dvalue, float(factor), g_field, g_deriv)


def accumulate_gradient_reference(residual, dshift, value, dvalue, factor, g_field, g_deriv) -> None:
    """Plain-numpy reference of :func:`accumulate_gradient`."""
    g_field += factor * residual * (1.0 + dshift) * dvalue
    g_deriv += factor * residual * value


@njit(cache=True, inline="always")
def _corner(p, n):  # pragma: no cover - compiled
    p = min(max(p, 0.0), n - 1.0)
    i = min(int(np.floor(p)), max(n - 2, 0))
    return i, p - i


@njit(cache=True, inline="always")
def _cell(matrix, offset, x, y, z, shape):  # pragma: no cover - compiled
    """The trilinear cell of voxel (x, y, z) mapped by ``matrix @ x + offset`` into a grid of
    `shape`: its lower and upper corner indices and the fractions along each axis (clamped)."""
    n0, n1, n2 = shape
    i, f = _corner(matrix[0, 0] * x + matrix[0, 1] * y + matrix[0, 2] * z + offset[0], n0)
    j, g = _corner(matrix[1, 0] * x + matrix[1, 1] * y + matrix[1, 2] * z + offset[1], n1)
    k, h = _corner(matrix[2, 0] * x + matrix[2, 1] * y + matrix[2, 2] * z + offset[2], n2)
    return i, j, k, min(i + 1, n0 - 1), min(j + 1, n1 - 1), min(k + 1, n2 - 1), f, g, h


@kernel(parallel=True)
def _pull_kernel(volume, matrix, offset, out):  # pragma: no cover - compiled
    for x in prange(volume.shape[0]):
        for y in range(volume.shape[1]):
            for z in range(volume.shape[2]):
                i, j, k, i1, j1, k1, f, g, h = _cell(matrix, offset, x, y, z, volume.shape)
                out[x, y, z] = ((1 - f) * ((1 - g) * ((1 - h) * volume[i, j, k] + h * volume[i, j, k1])
                                           + g * ((1 - h) * volume[i, j1, k] + h * volume[i, j1, k1]))
                                + f * ((1 - g) * ((1 - h) * volume[i1, j, k] + h * volume[i1, j, k1])
                                       + g * ((1 - h) * volume[i1, j1, k] + h * volume[i1, j1, k1])))


@kernel()
def _pull_adjoint_kernel(grad, matrix, offset, out):  # pragma: no cover - compiled
    for x in range(grad.shape[0]):
        for y in range(grad.shape[1]):
            for z in range(grad.shape[2]):
                i, j, k, i1, j1, k1, f, g, h = _cell(matrix, offset, x, y, z, grad.shape)
                v = grad[x, y, z]
                out[i, j, k] += (1 - f) * (1 - g) * (1 - h) * v
                out[i, j, k1] += (1 - f) * (1 - g) * h * v
                out[i, j1, k] += (1 - f) * g * (1 - h) * v
                out[i, j1, k1] += (1 - f) * g * h * v
                out[i1, j, k] += f * (1 - g) * (1 - h) * v
                out[i1, j, k1] += f * (1 - g) * h * v
                out[i1, j1, k] += f * g * (1 - h) * v
                out[i1, j1, k1] += f * g * h * v


def rigid_pull(volume: np.ndarray, matrix: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """Trilinear resampling ``out[x] = volume[matrix @ x + offset]`` (voxel units, numba).

    Positions are clamped to the grid (``scipy.ndimage`` mode ``'nearest'``).
    """
    out = np.empty(volume.shape, np.float64)
    _pull_kernel(np.ascontiguousarray(volume, np.float64), np.ascontiguousarray(matrix, np.float64),
                 np.ascontiguousarray(offset, np.float64), out)
    return out


def rigid_pull_adjoint(grad: np.ndarray, matrix: np.ndarray, offset: np.ndarray) -> np.ndarray:
    """Transpose of :func:`rigid_pull`: splat `grad` back onto the source grid (numba, serial)."""
    out = np.zeros(grad.shape, np.float64)
    _pull_adjoint_kernel(np.ascontiguousarray(grad, np.float64), np.ascontiguousarray(matrix, np.float64),
                         np.ascontiguousarray(offset, np.float64), out)
    return out


def rigid_pull_reference(volume, matrix, offset):
    """Reference of :func:`rigid_pull`: ``scipy.ndimage.affine_transform(order=1, mode='nearest')``."""
    from scipy import ndimage

    return ndimage.affine_transform(np.asarray(volume, np.float64), matrix, offset=offset, order=1, mode="nearest")


def rigid_pull_adjoint_reference(grad, matrix, offset):
    """Reference of :func:`rigid_pull_adjoint`: the dense transpose of the resampling, column by column."""
    size = grad.size
    columns = np.empty((size, size))
    for v in range(size):
        unit = np.zeros(size)
        unit[v] = 1.0
        columns[:, v] = rigid_pull_reference(unit.reshape(grad.shape), matrix, offset).ravel()
    return (columns.T @ np.asarray(grad, np.float64).ravel()).reshape(grad.shape)


# ---------------------------------------------------------------------------------------------
# Joint restoration
# ---------------------------------------------------------------------------------------------

#: Radius (voxels) of the band-limiting kernel of the restoration's forward model (Keys cubic convolution).
KEYS_RADIUS = 2
#: Four-point Gauss-Legendre rule on [0, 1]: exact for polynomials up to degree 7.
_GAUSS_X = np.array([0.5 - 0.4305681557970263, 0.5 - 0.1699905217924281, 0.5 + 0.1699905217924281,
                     0.5 + 0.4305681557970263])
_GAUSS_W = np.array([0.1739274225687269, 0.3260725774312731, 0.3260725774312731, 0.1739274225687269])
#: Tikhonov ridge (relative to the mean data curvature) that keeps every line solvable.
RESTORE_RIDGE = 1e-9


@njit(cache=True, inline="always")
def _keys(t):  # pragma: no cover - compiled
    """Keys 1981 cubic convolution kernel (a = -1/2), support [-2, 2]."""
    a = abs(t)
    if a < 1.0:
        return (1.5 * a - 2.5) * a * a + 1.0
    if a < 2.0:
        return ((-0.5 * a + 2.5) * a - 4.0) * a + 2.0
    return 0.0


@njit(cache=True, inline="always")
def _bspline3(t):  # pragma: no cover - compiled
    a = abs(t)
    if a < 1.0:
        return 2.0 / 3.0 - a * a + 0.5 * a * a * a
    if a < 2.0:
        return (2.0 - a) ** 3 / 6.0
    return 0.0


@kernel()
def _line_nodes(shift, xnode, wnode):  # pragma: no cover - compiled
    """Nodes of the piecewise-linear map w(x) = x + s(x) on [-1/2, n - 1/2] (ends extrapolated)."""
    n = shift.shape[0]
    xnode[0] = -0.5
    wnode[0] = -0.5 + shift[0] - 0.5 * (shift[1] - shift[0])
    for k in range(n):
        xnode[k + 1] = k
        wnode[k + 1] = k + shift[k]
    xnode[n + 1] = n - 0.5
    wnode[n + 1] = n - 0.5 + shift[n - 1] + 0.5 * (shift[n - 1] - shift[n - 2])


@kernel()
def _mark_folded(xnode, wnode, floor, bad):  # pragma: no cover - compiled
    """Rows whose kernel reaches a segment with slope <= floor (folded or compressed beyond recovery)."""
    n = bad.shape[0]
    bad[:] = False
    for i in range(n + 1):
        w0 = wnode[i]
        w1 = wnode[i + 1]
        if (w1 - w0) / (xnode[i + 1] - xnode[i]) > floor:
            continue
        lo = min(w0, w1) - KEYS_RADIUS
        hi = max(w0, w1) + KEYS_RADIUS
        for j in range(max(int(np.floor(lo)), 0), min(int(np.ceil(hi)), n - 1) + 1):
            if lo < j < hi:
                bad[j] = True


@kernel()
def _quadrature_piece(a, b, x0, w0, slope, n, bad, any_bad, amat, first, last, along_x, along_w):  # pragma: no cover
    """Add the exact integrals over [a, b] (both kernels polynomial there) to the rows of `amat`."""
    for g in range(4):
        x = a + (b - a) * _GAUSS_X[g]
        h = (b - a) * _GAUSS_W[g]
        w = w0 + slope * (x - x0)
        base = int(np.floor(x))
        f = x - base
        f2 = f * f
        f3 = f2 * f
        taps = ((1.0 - f) ** 3 / 6.0, (4.0 - 6.0 * f2 + 3.0 * f3) / 6.0, (1.0 + 3.0 * f + 3.0 * f2 - 3.0 * f3) / 6.0,
                f3 / 6.0)
        if 1 <= base <= n - 3:  # all four taps inside the line
            cols = (base - 1, base, base + 1, base + 2)
            low = base - 1
            high = base + 2
        else:
            cols = (_mirror(base - 1, n), _mirror(base, n), _mirror(base + 1, n), _mirror(base + 2, n))
            low = min(min(cols[0], cols[1]), min(cols[2], cols[3]))
            high = max(max(cols[0], cols[1]), max(cols[2], cols[3]))
        centre = int(np.floor(w))
        u = w - centre  # rows centre - 1 .. centre + 2 sit at kernel arguments -1 - u, -u, 1 - u, 2 - u
        v = 1.0 - u
        kerns = (((-0.5 * (1.0 + u) + 2.5) * (1.0 + u) - 4.0) * (1.0 + u) + 2.0, (1.5 * u - 2.5) * u * u + 1.0,
                 (1.5 * v - 2.5) * v * v + 1.0, ((-0.5 * (1.0 + v) + 2.5) * (1.0 + v) - 4.0) * (1.0 + v) + 2.0)
        if any_bad or centre < 1 or centre > n - 3:
            for r in range(4):
                j = centre - 1 + r
                if j < 0 or j >= n or bad[j]:
                    continue
                _add_to_row(amat, j, h * kerns[r], slope, cols, taps, low, high, first, last, along_x, along_w)
        else:  # all four rows inside the line and none left out
            for r in range(4):
                _add_to_row(amat, centre - 1 + r, h * kerns[r], slope, cols, taps, low, high, first, last, along_x,
                            along_w)


@njit(cache=True, inline="always")
def _add_to_row(amat, j, hk, slope, cols, taps, low, high, first, last, along_x, along_w):  # pragma: no cover
    weight = abs(hk)
    along_x[j] += weight
    along_w[j] += weight * slope
    for t in range(4):
        amat[j, cols[t]] += hk * taps[t]
    first[j] = min(first[j], low)
    last[j] = max(last[j], high)


@kernel()
def _forward_rows(shift, floor, amat, first, last, jac, bad, xnode, wnode, along_x, along_w):  # pragma: no cover
    """Rows of the forward model of one line into `amat` (zero on entry); row Jacobians into `jac`.

    ``amat[j, k] = integral over x of beta3(x - k) * keys(j - w(x))`` with ``w(x) = x + s(x)``
    piecewise linear (nodes at the voxel centres, ends extrapolated), ``x`` over the field of
    view [-1/2, n - 1/2], spline coefficients mirrored at the ends. Every piece between integer
    ``x`` and integer ``w`` is polynomial in ``x`` (degree 6), so the four-point Gauss rule is exact.
    Rows reached by a segment with slope <= `floor` are flagged in `bad` and left empty.
    """
    n = shift.shape[0]
    _line_nodes(shift, xnode, wnode)
    _mark_folded(xnode, wnode, floor, bad)
    any_bad = False
    for j in range(n):
        any_bad |= bad[j]
    along_x[:] = 0.0
    along_w[:] = 0.0
    first[:] = n  # empty rows keep first = n, last = -1
    last[:] = -1
    for i in range(n + 1):
        x0 = xnode[i]
        x1 = xnode[i + 1]
        w0 = wnode[i]
        slope = (wnode[i + 1] - w0) / (x1 - x0)
        if slope <= floor:
            continue
        a = x0
        m_last = int(np.ceil(wnode[i + 1])) - 1
        for m in range(int(np.floor(w0)) + 1, m_last + 2):
            b = x1 if m > m_last else min(x0 + (m - w0) / slope, x1)
            if b > a:
                _quadrature_piece(a, b, x0, w0, slope, n, bad, any_bad, amat, first, last, along_x, along_w)
                a = b
    for j in range(n):
        jac[j] = along_w[j] / along_x[j] if along_x[j] > 0.0 else 0.0


@kernel()
def _accumulate_normal(amat, first, last, jac, y, normal, rhs):  # pragma: no cover - compiled
    """Add one image's weighted normal equations (weights jac**2) and clear the used parts of `amat`."""
    band = 0
    for j in range(amat.shape[0]):
        lo = first[j]
        hi = last[j]
        if hi < 0:
            continue
        weight = jac[j] * jac[j]
        band = max(band, hi - lo)
        for a in range(lo, hi + 1):
            va = weight * amat[j, a]
            if va == 0.0:
                continue
            rhs[a] += va * y[j]
            for b in range(lo, a + 1):
                normal[a, b] += va * amat[j, b]
        amat[j, lo:hi + 1] = 0.0
    return band


@kernel()
def _add_penalty(normal, penalty):  # pragma: no cover - compiled
    """Scale-free second-difference penalty on the coefficients, plus a tiny ridge; returns the scale."""
    n = normal.shape[0]
    scale = 0.0
    for i in range(n):
        scale += normal[i, i]
    scale /= n
    if scale <= 0.0:
        return 0.0
    p = penalty * scale
    for r in range(1, n - 1):  # (c[r-1] - 2 c[r] + c[r+1])^2, lower triangle
        normal[r - 1, r - 1] += p
        normal[r, r] += 4.0 * p
        normal[r + 1, r + 1] += p
        normal[r, r - 1] -= 2.0 * p
        normal[r + 1, r] -= 2.0 * p
        normal[r + 1, r - 1] += p
    for i in range(n):
        normal[i, i] += RESTORE_RIDGE * scale
    return scale


@njit(cache=True, inline="always")
def _band_cholesky_solve(mat, rhs, band):  # pragma: no cover - compiled
    """Solve mat x = rhs (symmetric positive definite, half-bandwidth `band`) in place in rhs."""
    n = mat.shape[0]
    for i in range(n):
        start = max(0, i - band)
        for j in range(start, i + 1):
            acc = mat[i, j]
            for k in range(max(start, j - band), j):
                acc -= mat[i, k] * mat[j, k]
            if i == j:
                mat[i, i] = np.sqrt(max(acc, 1e-300))
            else:
                mat[i, j] = acc / mat[j, j]
    for i in range(n):  # forward: L z = rhs
        acc = rhs[i]
        for k in range(max(0, i - band), i):
            acc -= mat[i, k] * rhs[k]
        rhs[i] = acc / mat[i, i]
    for i in range(n - 1, -1, -1):  # backward: L^T x = z
        acc = rhs[i]
        for k in range(i + 1, min(n, i + band + 1)):
            acc -= mat[k, i] * rhs[k]
        rhs[i] = acc / mat[i, i]


#: Lines per task of the restoration kernel (scratch arrays are allocated once per task).
_RESTORE_CHUNK = 64


@kernel(parallel=True)
def _restore_kernel(images, shifts, penalty, floor, output_rows, out):  # pragma: no cover - compiled
    n_img, n_outer, n, n_inner = images.shape
    n_lines = n_outer * n_inner
    n_tasks = (n_lines + _RESTORE_CHUNK - 1) // _RESTORE_CHUNK
    for task in prange(n_tasks):
        normal = np.zeros((n, n))
        amat = np.zeros((n, n))
        rhs = np.empty(n)
        first = np.empty(n, np.int64)
        last = np.empty(n, np.int64)
        jac = np.empty(n)
        bad = np.empty(n, np.bool_)
        xnode = np.empty(n + 2)
        wnode = np.empty(n + 2)
        along_x = np.empty(n)
        along_w = np.empty(n)
        shift = np.empty(n)
        values = np.empty(n)
        for line in range(task * _RESTORE_CHUNK, min(n_lines, (task + 1) * _RESTORE_CHUNK)):
            a = line // n_inner
            b = line - a * n_inner
            rhs[:] = 0.0
            band = 2
            for m in range(n_img):
                for k in range(n):
                    shift[k] = shifts[m, a, k, b]
                    values[k] = images[m, a, k, b]
                _forward_rows(shift, floor, amat, first, last, jac, bad, xnode, wnode, along_x, along_w)
                band = max(band, _accumulate_normal(amat, first, last, jac, values, normal, rhs))
            if _add_penalty(normal, penalty) > 0.0:
                _band_cholesky_solve(normal, rhs, band)
                for k in range(n):
                    acc = 0.0
                    for c in range(max(0, k - 4), min(n, k + 5)):
                        acc += output_rows[k, c] * rhs[c]
                    out[a, k, b] = acc
            else:
                for k in range(n):
                    out[a, k, b] = 0.0
            for i in range(n):  # clear the band for the next line
                normal[i, max(0, i - band):i + 1] = 0.0


@kernel()
def _forward_matrix_kernel(shift, floor, amat, jac, bad):  # pragma: no cover - compiled
    n = shift.shape[0]
    first = np.empty(n, np.int64)
    last = np.empty(n, np.int64)
    _forward_rows(shift, floor, amat, first, last, jac, bad, np.empty(n + 2), np.empty(n + 2), np.empty(n),
                  np.empty(n))


def forward_matrix(shift_line: np.ndarray, floor: float):
    """Dense forward matrix of one line (numba), its row Jacobians and the rows left out.

    Parameters
    ----------
    shift_line : (N,) float64
        Shift in voxels at the N undistorted voxel centres (N >= 2).
    floor : float
        Segments of ``w(x) = x + s(x)`` with slope at or below it are folded; rows they reach
        are left out.

    Returns
    -------
    amat : (N, N) float64
        ``amat[j, k]``: distorted sample ``j`` per unit cubic B-spline coefficient ``k`` of the
        undistorted image, ``integral beta3(x - k) keys(j - w(x)) dx``.
    jac : (N,) float64
        Local Jacobian of each row (kernel-weighted mean slope of ``w`` over the row's support).
    left_out : (N,) bool
    """
    shift_line = np.ascontiguousarray(shift_line, np.float64)
    n = shift_line.shape[0]
    amat, jac, bad = np.zeros((n, n)), np.empty(n), np.empty(n, bool)
    _forward_matrix_kernel(shift_line, float(floor), amat, jac, bad)
    return amat, jac, bad


def restore_lines(images: np.ndarray, shifts: np.ndarray, penalty: float, floor: float) -> np.ndarray:
    """Joint least-squares restoration of lines seen with several shift maps (numba).

    Parameters
    ----------
    images : (M, L, N) or (M, A, N, B) float64
        M distorted observations of lines of N voxels: L lines, or the A x B lines of volumes
        seen as ``(outer, n, inner)`` with the phase-encode axis in the middle (read in place).
    shifts : same shape as `images`, float64
        Shift in voxels of each observation at the undistorted voxel centres.
    penalty : float
        Dimensionless weight of the second-difference penalty on the spline coefficients,
        relative to the mean diagonal of the data term's normal matrix (> 0).
    floor : float
        Jacobian at or below which a segment counts as folded; rows it reaches are left out.

    Returns
    -------
    (L, N) or (A, N, B) float64
        ``A_0 c`` with ``c = argmin sum_m ||W_m^(1/2) (A_m c - y_m)||^2 + penalty * s * ||D2 c||^2``
        (``A_m`` from :func:`forward_matrix`, ``W_m`` the squared row Jacobians, ``s`` the mean
        diagonal of the data term, ``A_0`` the forward matrix without shift): the image an
        acquisition without field would have recorded.
    """
    images = np.ascontiguousarray(images, np.float64)
    shifts = np.ascontiguousarray(shifts, np.float64)
    if images.shape != shifts.shape or images.ndim not in (3, 4):
        raise ValueError(f"images {images.shape} and shifts {shifts.shape} must be one (M, L, N) or (M, A, N, B) shape")
    as_lines = images.ndim == 3
    if as_lines:
        images, shifts = images[..., None], shifts[..., None]
    n = images.shape[2]
    output_rows = forward_matrix(np.zeros(n), floor)[0]
    out = np.empty(images.shape[1:], np.float64)
    _restore_kernel(images, shifts, float(penalty), float(floor), output_rows, out)
    return out[..., 0] if as_lines else out


# ---------------------------------------------------------------------------------------------
# Plain-numpy references of the restoration
# ---------------------------------------------------------------------------------------------


def keys_reference(t):
    """Keys 1981 cubic convolution kernel (a = -1/2), vectorised."""
    a = np.abs(np.asarray(t, np.float64))
    inner = (1.5 * a - 2.5) * a * a + 1.0
    outer = ((-0.5 * a + 2.5) * a - 4.0) * a + 2.0
    return np.where(a < 1, inner, np.where(a < 2, outer, 0.0))


def bspline3_reference(t):
    """Centred cubic B-spline, vectorised."""
    a = np.abs(np.asarray(t, np.float64))
    return np.where(a < 1, 2 / 3 - a * a + 0.5 * a ** 3, np.where(a < 2, (2 - a) ** 3 / 6, 0.0))


def line_map_reference(shift_line):
    """Nodes ``(x, w)`` of the piecewise-linear map ``w = x + s(x)`` on [-1/2, n - 1/2]."""
    s = np.asarray(shift_line, np.float64)
    n = s.size
    x = np.concatenate([[-0.5], np.arange(n, dtype=float), [n - 0.5]])
    ends = [s[0] - 0.5 * (s[1] - s[0])], [s[-1] + 0.5 * (s[-1] - s[-2])]
    return x, x + np.concatenate([ends[0], s, ends[1]])


def _mirror_reference(k, n):
    period = 2 * (n - 1)
    k = np.abs(k) % period
    return np.where(k >= n, period - k, k)


def forward_matrix_reference(shift_line, floor):
    """Plain-numpy reference of :func:`forward_matrix` (vectorised Gauss rule on the same pieces)."""
    x_nodes, w_nodes = line_map_reference(shift_line)
    n = x_nodes.size - 2
    slope = np.diff(w_nodes) / np.diff(x_nodes)
    bad = np.zeros(n, bool)
    rows = np.arange(n)
    for i in np.flatnonzero(slope <= floor):
        lo, hi = sorted(w_nodes[i:i + 2])
        bad |= (rows > lo - KEYS_RADIUS) & (rows < hi + KEYS_RADIUS)
    pieces = []
    for i in np.flatnonzero(slope > floor):
        inner = np.arange(np.floor(w_nodes[i]) + 1, np.ceil(w_nodes[i + 1]))
        cuts = np.concatenate([[x_nodes[i]], np.clip(x_nodes[i] + (inner - w_nodes[i]) / slope[i], x_nodes[i],
                                                     x_nodes[i + 1]), [x_nodes[i + 1]]])
        pieces += [(a, b, i) for a, b in zip(cuts[:-1], cuts[1:]) if b > a]
    a, b, seg = (np.array(v) for v in zip(*pieces))
    x = a[:, None] + (b - a)[:, None] * _GAUSS_X
    h = ((b - a)[:, None] * _GAUSS_W).ravel()
    x = x.ravel()
    seg = np.repeat(seg, 4)
    w = w_nodes[seg] + slope[seg] * (x - x_nodes[seg])
    kern = keys_reference(rows[:, None] - w[None, :]) * ~bad[:, None]  # (rows, points)
    k = np.arange(-2, n + 2)
    spline = np.zeros((x.size, n))
    np.add.at(spline, (slice(None), _mirror_reference(k, n)), bspline3_reference(x[:, None] - k[None, :]))
    amat = (kern * h) @ spline
    weight = np.abs(kern) * h
    along_x = weight.sum(axis=1)
    jac = np.where(along_x > 0, (weight * slope[seg]).sum(axis=1) / np.where(along_x > 0, along_x, 1.0), 0.0)
    return amat, jac, bad


def restore_lines_reference(images, shifts, penalty, floor):
    """Reference of :func:`restore_lines`: the stacked weighted system solved by ``scipy.linalg.lstsq``.

    No normal equations: the rows ``sqrt(w) A_m``, the penalty rows ``sqrt(penalty * s) D2``
    and the ridge rows are stacked and solved by scipy's least-squares driver (SVD based).
    """
    from scipy import linalg

    n_img, n_lines, n = images.shape
    second = np.diff(np.eye(n), 2, axis=0)
    output_rows = forward_matrix_reference(np.zeros(n), floor)[0]
    out = np.empty((n_lines, n))
    for line in range(n_lines):
        blocks, targets, scale = [], [], 0.0
        for m in range(n_img):
            amat, jac, _ = forward_matrix_reference(shifts[m, line], floor)
            blocks.append(jac[:, None] * amat)
            targets.append(jac * images[m, line])
            scale += float(((jac[:, None] * amat) ** 2).sum())
        scale /= n
        if scale <= 0:
            out[line] = 0.0
            continue
        blocks += [np.sqrt(penalty * scale) * second, np.sqrt(RESTORE_RIDGE * scale) * np.eye(n)]
        targets += [np.zeros(n - 2), np.zeros(n)]
        coef = linalg.lstsq(np.vstack(blocks), np.concatenate(targets))[0]
        out[line] = output_rows @ coef
    return out
