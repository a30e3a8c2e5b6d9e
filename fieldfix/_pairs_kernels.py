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
  2003 (NeuroImage 20(2), from memory) line by line: the normal matrix of the
  signal-conserving forward models of all images plus a small first-difference
  penalty, solved by a banded Cholesky factorisation.

The ``*_reference`` functions compute the same with plain numpy (and scipy.ndimage);
tests/test_pairs_kernels.py compares them against the kernels.
"""

from __future__ import annotations

import numpy as np
from numba import njit, prange

__all__ = [
    "warp_lines", "warp_lines_reference",
    "accumulate_gradient", "accumulate_gradient_reference",
    "rigid_pull", "rigid_pull_adjoint", "rigid_pull_reference", "rigid_pull_adjoint_reference",
    "restore_lines", "restore_lines_reference", "forward_matrix_reference",
]

_MIN_WIDTH = 1e-9


@njit(cache=True, inline="always")
def _mirror(index, n):  # pragma: no cover - compiled
    if n == 1:
        return 0
    period = 2 * (n - 1)
    index = abs(index) % period
    if index >= n:
        index = period - index
    return index


@njit(cache=True, parallel=True)
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


@njit(cache=True, parallel=True)
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


@njit(cache=True, parallel=True)
def _pull_kernel(volume, matrix, offset, out):  # pragma: no cover - compiled
    n0, n1, n2 = volume.shape
    for x in prange(n0):
        for y in range(n1):
            for z in range(n2):
                p0 = matrix[0, 0] * x + matrix[0, 1] * y + matrix[0, 2] * z + offset[0]
                p1 = matrix[1, 0] * x + matrix[1, 1] * y + matrix[1, 2] * z + offset[1]
                p2 = matrix[2, 0] * x + matrix[2, 1] * y + matrix[2, 2] * z + offset[2]
                i, f = _corner(p0, n0)
                j, g = _corner(p1, n1)
                k, h = _corner(p2, n2)
                i1, j1, k1 = min(i + 1, n0 - 1), min(j + 1, n1 - 1), min(k + 1, n2 - 1)
                out[x, y, z] = ((1 - f) * ((1 - g) * ((1 - h) * volume[i, j, k] + h * volume[i, j, k1])
                                           + g * ((1 - h) * volume[i, j1, k] + h * volume[i, j1, k1]))
                                + f * ((1 - g) * ((1 - h) * volume[i1, j, k] + h * volume[i1, j, k1])
                                       + g * ((1 - h) * volume[i1, j1, k] + h * volume[i1, j1, k1])))


@njit(cache=True)
def _pull_adjoint_kernel(grad, matrix, offset, out):  # pragma: no cover - compiled
    n0, n1, n2 = grad.shape
    for x in range(n0):
        for y in range(n1):
            for z in range(n2):
                p0 = matrix[0, 0] * x + matrix[0, 1] * y + matrix[0, 2] * z + offset[0]
                p1 = matrix[1, 0] * x + matrix[1, 1] * y + matrix[1, 2] * z + offset[1]
                p2 = matrix[2, 0] * x + matrix[2, 1] * y + matrix[2, 2] * z + offset[2]
                i, f = _corner(p0, n0)
                j, g = _corner(p1, n1)
                k, h = _corner(p2, n2)
                i1, j1, k1 = min(i + 1, n0 - 1), min(j + 1, n1 - 1), min(k + 1, n2 - 1)
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


@njit(cache=True, inline="always")
def _fill_forward(lo_line, hi_line, amat):  # pragma: no cover - compiled
    """amat[i, j] = fraction of source voxel j's signal landing in cell i (as splat_lines)."""
    n = lo_line.shape[0]
    for j in range(n):
        lo = lo_line[j]
        hi = hi_line[j]
        if hi < lo:
            lo, hi = hi, lo
        width = hi - lo
        if width < _MIN_WIDTH:
            cell = int(np.floor(lo + 0.5))
            if 0 <= cell < n:
                amat[cell, j] += 1.0
            continue
        first = max(int(np.floor(lo + 0.5)), 0)
        last = min(int(np.floor(hi + 0.5)), n - 1)
        for cell in range(first, last + 1):
            a = max(lo, cell - 0.5)
            b = min(hi, cell + 0.5)
            if b > a:
                amat[cell, j] += (b - a) / width


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


@njit(cache=True, parallel=True)
def _restore_kernel(images, lo, hi, penalty, out):  # pragma: no cover - compiled
    n_img, n_lines, n = images.shape
    for line in prange(n_lines):
        normal = np.zeros((n, n))
        rhs = np.zeros(n)
        amat = np.empty((n, n))
        band = 1
        for m in range(n_img):
            amat[:, :] = 0.0
            _fill_forward(lo[m, line], hi[m, line], amat)
            for i in range(n):
                first = -1
                last = -1
                for j in range(n):
                    if amat[i, j] != 0.0:
                        if first < 0:
                            first = j
                        last = j
                if first < 0:
                    continue
                band = max(band, last - first)
                y = images[m, line, i]
                for j in range(first, last + 1):
                    aij = amat[i, j]
                    if aij == 0.0:
                        continue
                    rhs[j] += aij * y
                    for k in range(first, j + 1):
                        normal[j, k] += aij * amat[i, k]
        for j in range(n):  # first-difference penalty, lower triangle
            normal[j, j] += penalty * (2.0 if 0 < j < n - 1 else 1.0)
            if j > 0:
                normal[j, j - 1] -= penalty
        _band_cholesky_solve(normal, rhs, band)
        for j in range(n):
            out[line, j] = rhs[j]


def restore_lines(images: np.ndarray, lo: np.ndarray, hi: np.ndarray, penalty: float) -> np.ndarray:
    """Least-squares restoration of lines seen through several forward models (numba).

    Parameters
    ----------
    images : (M, L, N) float64
        M distorted observations of L lines of N voxels.
    lo, hi : (M, L, N) float64
        Distorted positions (voxel units) of each undistorted voxel's two edges, per image.
    penalty : float
        Weight of the first-difference penalty ``sum (u[j+1] - u[j])^2`` (> 0).

    Returns
    -------
    (L, N) float64
        ``argmin_u sum_m ||A_m u - y_m||^2 + penalty ||D u||^2`` per line, where ``A_m``
        is the signal-conserving forward model of :func:`fieldfix.unwarp.distort`.
    """
    out = np.empty(images.shape[1:], np.float64)
    _restore_kernel(np.ascontiguousarray(images, np.float64), np.ascontiguousarray(lo, np.float64),
                    np.ascontiguousarray(hi, np.float64), float(penalty), out)
    return out


def forward_matrix_reference(lo_line: np.ndarray, hi_line: np.ndarray) -> np.ndarray:
    """Dense forward matrix of one line from :func:`fieldfix._unwarp_kernels.splat_lines_reference`."""
    from ._unwarp_kernels import splat_lines_reference

    n = lo_line.shape[0]
    unit = np.eye(n)
    return splat_lines_reference(unit, np.tile(lo_line, (n, 1)), np.tile(hi_line, (n, 1))).T


def restore_lines_reference(images, lo, hi, penalty):
    """Plain-numpy reference of :func:`restore_lines` (dense normal equations, numpy.linalg.solve)."""
    n_img, n_lines, n = images.shape
    diff = np.diff(np.eye(n), axis=0)
    out = np.empty((n_lines, n))
    for line in range(n_lines):
        mats = [forward_matrix_reference(lo[m, line], hi[m, line]) for m in range(n_img)]
        normal = sum(a.T @ a for a in mats) + penalty * diff.T @ diff
        rhs = sum(a.T @ images[m, line] for m, a in enumerate(mats))
        out[line] = np.linalg.solve(normal, rhs)
    return out
