"""Geometric multigrid for Laplace's equation outside a mask (the harmonic extension).

Private module: :func:`fieldfix.fieldmap.extend_harmonic` calls :func:`harmonic_fill`.

The unknowns are the voxels outside the mask; the mask holds the given field (Dirichlet)
and the edge of the grid has zero normal derivative (see
:mod:`fieldfix._multigrid_kernels` for the operator). The system is solved by conjugate
gradients (:func:`fieldfix._solvers.conjugate_gradient`) preconditioned by one
multigrid V-cycle (Briggs, Henson and McCormick 2000, "A Multigrid Tutorial", SIAM):

* coarsening by 2 along every axis; a coarse voxel is unknown when all its children are
  (so the coarse problems keep a Dirichlet boundary where the fine one has one);
* piecewise-constant prolongation ``P``, restriction ``P^T``, and the Galerkin coarse
  operator ``P^T A P``, which for a 7-point Laplacian is again a 7-point Laplacian with
  four times the coefficients (one coefficient per fine face pair, four pairs per
  coarse face); partial blocks at odd grid edges are treated as full ones, which keeps
  the operator symmetric positive definite and only changes the preconditioner;
* red-black Gauss-Seidel smoothing, red then black before the coarse correction and
  black then red after it, so that the V-cycle is a symmetric operator, as conjugate
  gradients require; the coarsest level gets many such sweeps.

The preconditioner works in float32 (it only needs to be a good approximate inverse);
the conjugate-gradient vectors are float64 for tolerances below ``SINGLE_PRECISION_RTOL``
and float32 from it on (dot products always summed in float64), which halves the memory and
the memory traffic of the field-map extension (tolerance 1e-4 there).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import _multigrid_kernels as _k
from ._solvers import conjugate_gradient

#: Stop coarsening when a level has at most this many voxels or an axis shorter than 3.
COARSEST_VOXELS = 4096
#: Symmetric Gauss-Seidel sweeps on the coarsest level.
COARSEST_SWEEPS = 24
#: From this relative tolerance on, the conjugate-gradient vectors are float32 too.
SINGLE_PRECISION_RTOL = 1e-5


#: Weight of the coarse-grid correction: piecewise-constant prolongation underestimates
#: smooth errors, and a fixed over-correction (a constant, so the V-cycle stays symmetric)
#: recovers much of that (chosen by trial on head-sized masks: iterations drop by half).
CORRECTION_WEIGHT = 1.6


@dataclass(frozen=True)
class _Level:
    unknown: np.ndarray  # bool, padded by one voxel (False), C-contiguous
    coef: tuple  # per-axis coefficients (float)


def _pad(a: np.ndarray, value=0) -> np.ndarray:
    return np.ascontiguousarray(np.pad(a, 1, constant_values=value))


def _coarser(unknown: np.ndarray) -> np.ndarray:
    """Coarse voxel unknown when all its (existing) children are (unpadded in and out)."""
    pad = [(0, n % 2) for n in unknown.shape]
    u = np.pad(unknown, pad, constant_values=True)
    s = u.shape
    return u.reshape(s[0] // 2, 2, s[1] // 2, 2, s[2] // 2, 2).all(axis=(1, 3, 5))


def hierarchy(unknown: np.ndarray, coef) -> list[_Level]:
    """Levels from fine to coarse (see the module docstring); masks padded by one voxel."""
    current = np.asarray(unknown, bool)
    levels = [_Level(_pad(current, False), tuple(float(c) for c in coef))]
    while current.size > COARSEST_VOXELS and min(current.shape) >= 3:
        current = _coarser(current)
        if not current.any():
            break
        levels.append(_Level(_pad(current, False), tuple(4.0 * c for c in levels[-1].coef)))
    return levels


def _smooth(level: _Level, x, b, order):
    for parity in order:
        _k.gauss_seidel_nb(x, b, level.unknown, *level.coef, parity)


def v_cycle(levels: list[_Level], b: np.ndarray, depth: int = 0) -> np.ndarray:
    """One symmetric V-cycle from a zero start: an approximate ``A^-1 b`` (float32, padded)."""
    level = levels[depth]
    x = np.zeros(b.shape, np.float32)
    if depth == len(levels) - 1:
        for _ in range(COARSEST_SWEEPS):
            _smooth(level, x, b, (0, 1))
        for _ in range(COARSEST_SWEEPS):
            _smooth(level, x, b, (1, 0))
        return x
    _smooth(level, x, b, (0, 1))
    r = np.zeros(b.shape, np.float32)  # the padding must hold zeros too
    _k.residual_nb(x, b, level.unknown, *level.coef, r)
    coarse = levels[depth + 1]
    rc = np.zeros(coarse.unknown.shape, np.float32)
    _k.restrict_nb(r, coarse.unknown, rc)
    del r
    _k.prolong_add_nb(v_cycle(levels, rc, depth + 1), coarse.unknown, x, CORRECTION_WEIGHT)
    _smooth(level, x, b, (1, 0))
    return x


def _pcg_single(levels: list[_Level], b: np.ndarray, *, rtol: float, maxiter: int):
    """Conjugate gradients with float32 vectors (dot products summed in float64), V-cycle preconditioned.

    The same iteration as :func:`fieldfix._solvers.conjugate_gradient` from a zero start,
    for tolerances that single precision reaches: half the memory and memory traffic of
    float64 vectors, no conversions around the float32 preconditioner, and the vector
    updates fused into numba passes.
    """
    fine = levels[0]
    x = np.zeros_like(b)
    r = b  # the residual of the zero start, updated in place
    flat = [v.reshape(-1) for v in (x, r)]
    bnorm = np.sqrt(_k.dot_nb(flat[1], flat[1])) or 1.0
    p = v_cycle(levels, r)
    rz = _k.dot_nb(flat[1], p.reshape(-1))
    rr = bnorm * bnorm
    iterations = 0
    ap = np.zeros_like(b)
    while iterations < maxiter and np.sqrt(rr) > rtol * bnorm and rz > 0:
        _k.apply_nb(p, fine.unknown, *fine.coef, ap)
        alpha = rz / _k.dot_nb(p.reshape(-1), ap.reshape(-1))
        rr = _k.cg_step_nb(flat[0], flat[1], p.reshape(-1), ap.reshape(-1), np.float32(alpha))
        z = v_cycle(levels, r)
        rz_new = _k.dot_nb(flat[1], z.reshape(-1))
        p *= np.float32(rz_new / rz)
        p += z
        del z
        rz = rz_new
        iterations += 1
    return x, iterations


def harmonic_fill(values: np.ndarray, known: np.ndarray, coef, *, rtol: float, maxiter: int):
    """Solve Laplace's equation on the voxels outside `known`, `values` fixed on it.

    Returns ``(field, iterations)``: float64, equal to `values` on `known`.
    """
    known = np.asarray(known, bool)
    levels = hierarchy(~known, coef)
    fine = levels[0]
    inner = (slice(1, -1),) * 3
    # right-hand side: the known neighbours' values moved over, b = -A(boundary) on the unknowns
    boundary = _pad(np.where(known, values, 0.0))
    b = np.zeros(boundary.shape)  # kernels write the interior only: the padding stays 0
    _k.apply_nb(boundary, _pad(np.ones(known.shape, bool), False), *fine.coef, b)
    del boundary
    b *= -1.0
    b[~fine.unknown] = 0.0

    if rtol >= SINGLE_PRECISION_RTOL:
        single = b.astype(np.float32)
        del b
        x, iterations = _pcg_single(levels, single, rtol=rtol, maxiter=maxiter)
    else:
        def apply_a(x):
            out = np.zeros(x.shape)
            _k.apply_nb(x, fine.unknown, *fine.coef, out)
            return out

        def precond(r):
            return v_cycle(levels, r.astype(np.float32)).astype(np.float64)

        x, iterations = conjugate_gradient(apply_a, b, np.zeros(b.shape), precond, rtol=rtol, maxiter=maxiter)
        del b
    field = x[inner].astype(np.float64)
    field[known] = np.asarray(values)[known]
    return np.ascontiguousarray(field), iterations
