"""Numba kernels of the multigrid preconditioner for masked Laplace problems, with numpy twins.

Private module: used by :mod:`fieldfix._multigrid`.

The operator on a level is ``A = -L`` restricted to the *unknown* voxels, where ``L`` is
the 7-point Laplacian with per-axis coefficients ``c = 1 / h**2``: neighbours outside the
grid are absent (zero normal derivative at the box), known voxels hold zero (Dirichlet).
So at an unknown voxel ``(A x)_i = d_i x_i - sum_j c_j x_j`` with ``d_i`` the sum of the
coefficients of its in-grid neighbours, and every array keeps 0 at known voxels.

* ``apply_nb``: ``out = A x``.
* ``residual_nb``: ``r = b - A x``.
* ``gauss_seidel_nb``: one red-black Gauss-Seidel half-sweep (voxels whose index sum has
  the given parity), in place.
* ``restrict_nb``: coarse right-hand side, the sum over the 2x2x2 children (the
  transpose of ``prolong_add_nb``).
* ``prolong_add_nb``: add each coarse value, times a weight, to its children (piecewise
  constant).

The kernels work on arrays padded by one voxel on every side (zeros in the vectors,
False in the unknown mask), so that the inner loops need no test at the grid edge.

The ``*_reference`` functions compute the same with plain numpy; the tests compare them.
"""

from __future__ import annotations

import numpy as np
from numba import njit

from ._kernel import kernel

__all__ = ["apply_nb", "residual_nb", "gauss_seidel_nb", "restrict_nb", "prolong_add_nb", "apply_reference",
           "gauss_seidel_reference", "restrict_reference", "prolong_add_reference"]


@njit(cache=True, inline="always")
def _diagonal(n, c, i):  # pragma: no cover - compiled
    """Coefficient sum of the in-grid neighbours along one axis of padded index i (1..n)."""
    return c * (2.0 - (i == 1) - (i == n))


@njit(cache=True, inline="always")
def _row(x, c0, c1, c2, i, j, k, dij):  # pragma: no cover - compiled
    """``(A x)[i, j, k]``: the diagonal (`dij` its i, j part) times the voxel minus its six neighbours."""
    acc = (c0 * (x[i - 1, j, k] + x[i + 1, j, k]) + c1 * (x[i, j - 1, k] + x[i, j + 1, k])
           + c2 * (x[i, j, k - 1] + x[i, j, k + 1]))
    return (dij + _diagonal(x.shape[2] - 2, c2, k)) * x[i, j, k] - acc


@kernel()
def residual_nb(x, b, unknown, c0, c1, c2, out):  # pragma: no cover - compiled
    """``out = b - A x`` at unknown voxels, 0 elsewhere (padded arrays, see `gauss_seidel_nb`)."""
    p0, p1, p2 = x.shape
    for i in range(1, p0 - 1):
        for j in range(1, p1 - 1):
            dij = _diagonal(p0 - 2, c0, i) + _diagonal(p1 - 2, c1, j)
            for k in range(1, p2 - 1):
                out[i, j, k] = b[i, j, k] - _row(x, c0, c1, c2, i, j, k, dij) if unknown[i, j, k] else 0.0


@kernel()
def apply_nb(x, unknown, c0, c1, c2, out):  # pragma: no cover - compiled
    """``out = A x`` at unknown voxels, 0 elsewhere (padded arrays)."""
    p0, p1, p2 = x.shape
    for i in range(1, p0 - 1):
        for j in range(1, p1 - 1):
            dij = _diagonal(p0 - 2, c0, i) + _diagonal(p1 - 2, c1, j)
            for k in range(1, p2 - 1):
                out[i, j, k] = _row(x, c0, c1, c2, i, j, k, dij) if unknown[i, j, k] else 0.0


@kernel()
def gauss_seidel_nb(x, b, unknown, c0, c1, c2, parity):  # pragma: no cover - compiled
    """Red-black Gauss-Seidel half-sweep over unknown voxels with ``(i + j + k) % 2 == parity``.

    All arrays are padded by one voxel on every side: the padding holds zeros in `x`
    and False in `unknown`, so a neighbour beyond the grid adds nothing to the sum, while
    the diagonal counts in-grid neighbours only (zero normal derivative at the box).
    Index sums are taken in the unpadded grid.
    """
    p0, p1, p2 = x.shape
    for i in range(1, p0 - 1):
        for j in range(1, p1 - 1):
            dij = _diagonal(p0 - 2, c0, i) + _diagonal(p1 - 2, c1, j)
            for k in range(1 + (i + j + parity) % 2, p2 - 1, 2):
                if unknown[i, j, k]:
                    acc = (c0 * (x[i - 1, j, k] + x[i + 1, j, k]) + c1 * (x[i, j - 1, k] + x[i, j + 1, k])
                           + c2 * (x[i, j, k - 1] + x[i, j, k + 1]))
                    x[i, j, k] = (b[i, j, k] + acc) / (dij + _diagonal(p2 - 2, c2, k))


@kernel()
def restrict_nb(fine, unknown_coarse, coarse):  # pragma: no cover - compiled
    """``coarse[I] = sum of fine over the children of I`` where I is unknown, else 0 (padded)."""
    p0, p1, p2 = coarse.shape
    f0, f1, f2 = fine.shape
    for i in range(1, p0 - 1):
        for j in range(1, p1 - 1):
            for k in range(1, p2 - 1):
                acc = 0.0
                if unknown_coarse[i, j, k]:
                    for a in range(2 * i - 1, min(2 * i + 1, f0 - 1)):
                        for b in range(2 * j - 1, min(2 * j + 1, f1 - 1)):
                            for c in range(2 * k - 1, min(2 * k + 1, f2 - 1)):
                                acc += fine[a, b, c]
                coarse[i, j, k] = acc


@kernel()
def prolong_add_nb(coarse, unknown_coarse, fine, weight):  # pragma: no cover - compiled
    """``fine[i] += weight * coarse[parent(i)]`` where the coarse parent is unknown (padded)."""
    f0, f1, f2 = fine.shape
    for a in range(1, f0 - 1):
        for b in range(1, f1 - 1):
            for c in range(1, f2 - 1):
                i = (a + 1) // 2
                j = (b + 1) // 2
                k = (c + 1) // 2
                if unknown_coarse[i, j, k]:
                    fine[a, b, c] += weight * coarse[i, j, k]


# ------------------------------------------------------------------------------------------
# plain-numpy twins
# ------------------------------------------------------------------------------------------
@kernel()
def dot_nb(a, b):  # pragma: no cover - compiled
    """``a . b`` over flat float32 arrays, accumulated in float64."""
    acc = 0.0
    for i in range(a.size):
        acc += np.float64(a[i]) * np.float64(b[i])
    return acc


@kernel()
def cg_step_nb(x, r, p, ap, alpha):  # pragma: no cover - compiled
    """``x += alpha p`` and ``r -= alpha ap`` in one pass (flat float32); returns ``r . r`` (float64 sum)."""
    rr = 0.0
    for i in range(x.size):
        x[i] += alpha * p[i]
        ri = r[i] - alpha * ap[i]
        r[i] = ri
        rr += np.float64(ri) * np.float64(ri)
    return rr


def _pairs(ndim=3):
    for axis in range(ndim):
        lo = [slice(None)] * ndim
        hi = [slice(None)] * ndim
        lo[axis] = slice(0, -1)
        hi[axis] = slice(1, None)
        yield axis, tuple(lo), tuple(hi)


def apply_reference(x, unknown, coef):
    """Plain-numpy ``A x`` (see the module docstring)."""
    x = np.where(unknown, x, 0.0)
    out = np.zeros(x.shape)
    for axis, lo, hi in _pairs():
        c = coef[axis]
        out[lo] += c * (x[lo] - x[hi])
        out[hi] += c * (x[hi] - x[lo])
        # known neighbours hold 0, so the differences above already carry the Dirichlet terms
    return np.where(unknown, out, 0.0)


def gauss_seidel_reference(x, b, unknown, coef, parity):
    """Plain-numpy red-black half-sweep: all voxels of one parity at once (they do not touch)."""
    x = np.where(unknown, x, 0.0).astype(np.float64)
    acc = np.zeros(x.shape)
    d = np.zeros(x.shape)
    for axis, lo, hi in _pairs():
        c = coef[axis]
        acc[lo] += c * x[hi]
        acc[hi] += c * x[lo]
        d[lo] += c
        d[hi] += c
    colour = (np.indices(x.shape).sum(axis=0) % 2) == parity
    update = unknown & colour
    x[update] = (b[update] + acc[update]) / d[update]
    return x


def restrict_reference(fine, unknown_coarse):
    """Plain-numpy sum over 2x2x2 children (odd sizes padded with zeros)."""
    pad = [(0, n % 2) for n in fine.shape]
    f = np.pad(np.asarray(fine, np.float64), pad)
    s = f.reshape(f.shape[0] // 2, 2, f.shape[1] // 2, 2, f.shape[2] // 2, 2).sum(axis=(1, 3, 5))
    return np.where(unknown_coarse, s, 0.0)


def prolong_add_reference(coarse, unknown_coarse, fine, weight=1.0):
    """Plain-numpy piecewise-constant prolongation added to `fine` (unpadded; returns a new array)."""
    up = weight * np.where(unknown_coarse, coarse, 0.0)
    for axis in range(3):
        up = np.repeat(up, 2, axis=axis)
    return fine + up[: fine.shape[0], : fine.shape[1], : fine.shape[2]]


def dot_reference(a, b):
    """Plain-numpy twin of :func:`dot_nb`."""
    return float(np.dot(np.asarray(a, np.float64).ravel(), np.asarray(b, np.float64).ravel()))


def cg_step_reference(x, r, p, ap, alpha):
    """Plain-numpy twin of :func:`cg_step_nb`: the updated ``(x, r)`` and ``r . r``."""
    x = x + np.float32(alpha) * p
    r = r - np.float32(alpha) * ap
    return x, r, dot_reference(r, r)
