"""Rigid (6-parameter) motion for the pairs module: matrices, resampling, same-contrast registration.

Private and deliberately small (an alignment module is being written elsewhere; the two will
be unified later). Parameters are ``(tx, ty, tz, rx, ry, rz)``: translations in mm along the
voxel axes scaled to mm, rotations in degrees about those axes through the grid centre,
applied as ``R = Rz @ Ry @ Rx`` (the convention of :mod:`fieldfix.simulate.epi`).

A parameter vector ``p`` defines the *pull* mapping ``T_p(X) = R (X - c) + c + t`` (mm), and
``pull(volume, p)(x) = volume(T_p x)``. Registration finds the ``p`` minimising
``sum (pull(moving, p) - fixed)^2`` by Gauss-Newton (Levenberg damping) with the Jacobian
by central differences of the six parameters, coarse to fine (subsample 2, then 1); the
plain least-squares criterion assumes the two volumes share their contrast (common
practice, no source).

Examples
--------
>>> import numpy as np
>>> m, o = pull_mapping(np.zeros(6), (2.0, 2.0, 2.0), (8, 8, 8))
>>> np.allclose(m, np.eye(3)) and np.allclose(o, 0.0)
True
"""

from __future__ import annotations

import numpy as np

from . import _pairs_kernels as kernels

__all__ = ["rotation_matrix", "pull_mapping", "invert_mapping", "pull", "register_rigid"]

_STEPS = np.array([0.05, 0.05, 0.05, 0.05, 0.05, 0.05])  # mm and degrees: finite-difference steps


def rotation_matrix(rotation_deg) -> np.ndarray:
    """``Rz @ Ry @ Rx`` for rotations in degrees about the x, y and z axes.

    Examples
    --------
    >>> np.round(rotation_matrix([0, 0, 90]) @ [1.0, 0, 0], 6).tolist()
    [0.0, 1.0, 0.0]
    """
    rx, ry, rz = np.deg2rad(np.asarray(rotation_deg, float))
    cx, sx, cy, sy, cz, sz = np.cos(rx), np.sin(rx), np.cos(ry), np.sin(ry), np.cos(rz), np.sin(rz)
    rot_x = np.array([[1, 0, 0], [0, cx, -sx], [0, sx, cx]])
    rot_y = np.array([[cy, 0, sy], [0, 1, 0], [-sy, 0, cy]])
    rot_z = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1]])
    return rot_z @ rot_y @ rot_x


def pull_mapping(params_mm_deg, voxel_mm, shape) -> tuple[np.ndarray, np.ndarray]:
    """Voxel-unit matrix and offset of ``T_p``: ``x' = matrix @ x + offset``.

    Examples
    --------
    >>> m, o = pull_mapping([2.0, 0, 0, 0, 0, 0], (2.0, 1.0, 1.0), (4, 4, 4))
    >>> o.tolist()
    [1.0, 0.0, 0.0]
    """
    p = np.asarray(params_mm_deg, float)
    vox = np.asarray(voxel_mm, float)
    centre = vox * (np.asarray(shape, float) - 1.0) / 2.0
    rot = rotation_matrix(p[3:])
    matrix = rot * vox[None, :] / vox[:, None]  # V^-1 R V
    offset = (centre - rot @ centre + p[:3]) / vox
    return matrix, offset


def invert_mapping(matrix: np.ndarray, offset: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The inverse mapping of ``x' = matrix @ x + offset``."""
    inverse = np.linalg.inv(matrix)
    return inverse, -inverse @ offset


def pull(volume: np.ndarray, params_mm_deg, voxel_mm, *, inverse: bool = False) -> np.ndarray:
    """``volume(T_p x)`` by trilinear interpolation (edge values outside); ``T_p^-1`` if `inverse`."""
    matrix, offset = pull_mapping(params_mm_deg, voxel_mm, np.shape(volume))
    if inverse:
        matrix, offset = invert_mapping(matrix, offset)
    return kernels.rigid_pull(volume, matrix, offset)


def _gauss_newton(fixed, moving, voxel_mm, params, weight, iterations):
    damping = 1e-3
    residual = (pull(moving, params, voxel_mm) - fixed) * weight
    cost = float((residual ** 2).sum())
    for _ in range(iterations):
        columns = []
        for a in range(6):
            step = np.zeros(6)
            step[a] = _STEPS[a]
            plus = pull(moving, params + step, voxel_mm)
            minus = pull(moving, params - step, voxel_mm)
            columns.append(((plus - minus) * weight / (2.0 * _STEPS[a])).ravel())
        jac = np.stack(columns, axis=1)
        normal = jac.T @ jac
        grad = jac.T @ residual.ravel()
        while True:
            update = -np.linalg.solve(normal + damping * np.diag(np.diag(normal) + 1e-12), grad)
            trial = params + update
            trial_residual = (pull(moving, trial, voxel_mm) - fixed) * weight
            trial_cost = float((trial_residual ** 2).sum())
            if trial_cost <= cost or damping > 1e6:
                break
            damping *= 10.0
        if trial_cost > cost:
            break
        params, residual, cost, damping = trial, trial_residual, trial_cost, max(damping / 10.0, 1e-6)
        if np.all(np.abs(update) < 1e-3):  # below a thousandth of a mm / degree
            break
    return params


def _halve(volume: np.ndarray) -> np.ndarray:
    from scipy import ndimage

    smooth = ndimage.gaussian_filter(np.asarray(volume, float), 0.85)
    return smooth[::2, ::2, ::2]


def register_rigid(fixed: np.ndarray, moving: np.ndarray, voxel_mm, *, mask: np.ndarray | None = None,
                   iterations: int = 20, start=None) -> np.ndarray:
    """Rigid parameters ``p`` (mm, deg) such that ``pull(moving, p) ~ fixed`` (least squares).

    Parameters
    ----------
    fixed, moving : (X, Y, Z) arrays of the same contrast on one grid
    voxel_mm : 3 floats
    mask : bool array, optional
        Voxels of `fixed` that count (default all).
    iterations : int
        Gauss-Newton iterations per resolution.
    start : 6 floats, optional
        Starting parameters.

    Returns
    -------
    (6,) float64: translation (mm) and rotation (deg)

    Examples
    --------
    >>> import numpy as np
    >>> g = np.indices((16, 16, 16)).astype(float)
    >>> blob = np.exp(-((g[0] - 7.5) ** 2 + (g[1] - 8) ** 2 + (g[2] - 7) ** 2) / 12)
    >>> moved = pull(blob, [0.6, 0, 0, 0, 0, 0], (1, 1, 1), inverse=True)
    >>> np.round(register_rigid(blob, moved, (1, 1, 1))[:3], 2).tolist()
    [0.6, 0.0, 0.0]
    """
    fixed = np.asarray(fixed, float)
    moving = np.asarray(moving, float)
    vox = np.asarray(voxel_mm, float)
    weight = np.ones(fixed.shape) if mask is None else np.asarray(mask, float)
    params = np.zeros(6) if start is None else np.asarray(start, float).copy()
    if min(fixed.shape) >= 16:
        params = _gauss_newton(_halve(fixed), _halve(moving), 2 * vox, params, _halve(weight), iterations)
    return _gauss_newton(fixed, moving, vox, params, weight, iterations)
