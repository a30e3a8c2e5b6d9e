"""Small numerical solvers shared by the field-map modules."""

from __future__ import annotations

from typing import Callable

import numpy as np


def conjugate_gradient(apply_a: Callable[[np.ndarray], np.ndarray], b: np.ndarray, x0: np.ndarray,
                       precond: Callable[[np.ndarray], np.ndarray], *, rtol: float, maxiter: int):
    """Preconditioned conjugate gradients for a symmetric positive (semi-)definite operator.

    Stops when ``|b - A x| <= rtol * |b|`` (``|b|`` taken as 1 when zero), when the
    preconditioned residual vanishes, or after `maxiter` iterations (Hestenes and Stiefel
    1952, J. Res. Natl. Bur. Stand.).

    Returns
    -------
    x : ndarray
    iterations : int
        Iterations carried out.

    Examples
    --------
    >>> a = np.array([[4.0, 1.0], [1.0, 3.0]])
    >>> x, _ = conjugate_gradient(lambda v: a @ v, np.array([1.0, 2.0]), np.zeros(2), lambda r: r,
    ...                           rtol=1e-12, maxiter=10)
    >>> np.allclose(a @ x, [1.0, 2.0])
    True
    """
    x = np.array(x0, dtype=np.float64, copy=True)
    r = b - apply_a(x)
    bnorm = float(np.linalg.norm(b)) or 1.0
    p = precond(r)
    if np.shares_memory(p, r):  # an identity preconditioner hands back r itself; p is updated in place
        p = p.copy()
    rz = float(np.vdot(r, p))
    iterations = 0
    # updates in place: besides x, r and p, one operator result and one preconditioned
    # residual exist at a time (full-size temporaries dominate the memory of large solves)
    while iterations < maxiter and np.linalg.norm(r) > rtol * bnorm and rz > 0:
        ap = apply_a(p)
        alpha = rz / float(np.vdot(p, ap))
        ap *= alpha
        r -= ap
        np.multiply(p, alpha, out=ap)
        x += ap
        del ap
        z = precond(r)
        rz_new = float(np.vdot(r, z))
        p *= rz_new / rz
        p += z
        del z
        rz = rz_new
        iterations += 1
    return x, iterations
