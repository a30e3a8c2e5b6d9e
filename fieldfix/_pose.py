"""Rigid poses with the distortion in the loop: the cost, its exact gradient and the optimiser.

Private module shared by :mod:`fieldfix.align` (field map to run) and :mod:`fieldfix.motion`
(volumes of a run against its reference volume).

A *problem* compares a target image (a distorted EPI volume on its grid) with a source anatomy
(an undistorted magnitude and its field, in Hz, on their own grid) placed by a rigid pose. At each
pose the source is sampled on the target grid through the pose, shifted along the phase-encode axis
by its own (moved) field with the signal-conserving forward model and compared with the target.
The gradient with respect to the six parameters is exact for the discrete cost: the chain runs
through the trilinear sampling, the overlap rule of the forward model
(:func:`fieldfix._align_kernels.distort_adjoint`) and the rigid map.

Target grids are *working grids*: the run's voxel axes permuted so that the phase-encode axis is
the last one (forward-model lines are contiguous); the permutation is folded into the affine.

Conventions (the public modules repeat them): parameters are ``translation_mm`` (world x, y, z)
and ``rotation_deg`` (about world x, y, z through ``centre_mm``, applied x first, then y, then z:
``R = Rz @ Ry @ Rx``, right-handed); the pose maps a point of the source (moving) head in its world
coordinates to the same point in the target world: ``y = R (x - c) + c + t``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage, optimize

from . import _align_kernels as kernels
from .errors import GeometryError, InputError

#: Rotations are optimised as arc lengths on this radius (mm), so one unit of every parameter
#: moves the head by about a millimetre (the radius of Power et al. 2012's framewise displacement).
ARC_RADIUS_MM = 50.0
COSTS = ("ngf", "ssd")


def rotation_matrix(rotation_rad) -> np.ndarray:
    """``Rz @ Ry @ Rx`` for angles (rad) about x, y, z (right-handed)."""
    rx, ry, rz = (float(v) for v in rotation_rad)
    cx, sx, cy, sy, cz, sz = np.cos(rx), np.sin(rx), np.cos(ry), np.sin(ry), np.cos(rz), np.sin(rz)
    rot_x = np.array([[1.0, 0, 0], [0, cx, -sx], [0, sx, cx]])
    rot_y = np.array([[cy, 0, sy], [0, 1.0, 0], [-sy, 0, cy]])
    rot_z = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1.0]])
    return rot_z @ rot_y @ rot_x


def rotation_derivatives(rotation_rad) -> list[np.ndarray]:
    """d R / d angle for each of the three angles of :func:`rotation_matrix`."""
    rx, ry, rz = (float(v) for v in rotation_rad)
    cx, sx, cy, sy, cz, sz = np.cos(rx), np.sin(rx), np.cos(ry), np.sin(ry), np.cos(rz), np.sin(rz)
    rot_x = np.array([[1.0, 0, 0], [0, cx, -sx], [0, sx, cx]])
    rot_y = np.array([[cy, 0, sy], [0, 1.0, 0], [-sy, 0, cy]])
    rot_z = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1.0]])
    d_x = np.array([[0.0, 0, 0], [0, -sx, -cx], [0, cx, -sx]])
    d_y = np.array([[-sy, 0, cy], [0, 0.0, 0], [-cy, 0, -sy]])
    d_z = np.array([[-sz, -cz, 0], [cz, -sz, 0], [0, 0, 0.0]])
    return [rot_z @ rot_y @ d_x, rot_z @ d_y @ rot_x, d_z @ rot_y @ rot_x]


def pose_matrix(translation_mm, rotation_rad, centre_mm) -> np.ndarray:
    """4x4 world map ``y = R (x - c) + c + t``."""
    rot = rotation_matrix(rotation_rad)
    centre = np.asarray(centre_mm, float)
    matrix = np.eye(4)
    matrix[:3, :3] = rot
    matrix[:3, 3] = centre + np.asarray(translation_mm, float) - rot @ centre
    return matrix


def pose_parameters(matrix, centre_mm) -> tuple[np.ndarray, np.ndarray]:
    """Inverse of :func:`pose_matrix`: (translation mm, angles rad) of a rigid 4x4 matrix."""
    rot = np.asarray(matrix, float)[:3, :3]
    ry = np.arcsin(np.clip(-rot[2, 0], -1.0, 1.0))
    rx = np.arctan2(rot[2, 1], rot[2, 2])
    rz = np.arctan2(rot[1, 0], rot[0, 0])
    centre = np.asarray(centre_mm, float)
    translation = np.asarray(matrix, float)[:3, 3] - centre + rot @ centre
    return translation, np.array([rx, ry, rz])


# ---------------------------------------------------------------------------------------------
# Grids
# ---------------------------------------------------------------------------------------------

def working_order(pe_axis: int) -> tuple[int, int, int]:
    """Voxel-axis permutation that puts the phase-encode axis last."""
    return tuple(a for a in range(3) if a != pe_axis) + (pe_axis,)


def permuted_affine(affine, order) -> np.ndarray:
    """Affine of a volume whose axes were transposed by `order`."""
    out = np.array(affine, float)
    out[:, :3] = np.asarray(affine, float)[:, list(order)]
    return out


def level_grid(shape, affine, factor: int) -> tuple[tuple[int, ...], np.ndarray]:
    """Grid of `factor`-voxel blocks: shape rounded up, voxel centres at the blocks' centres."""
    factor = int(factor)
    coarse = tuple(int(-(-n // factor)) for n in shape)
    out = np.array(affine, float)
    out[:3, :3] = np.asarray(affine, float)[:3, :3] * factor
    out[:3, 3] = np.asarray(affine, float)[:3, 3] + np.asarray(affine, float)[:3, :3] @ np.full(3, (factor - 1) / 2)
    return coarse, out


def block_mean(volume: np.ndarray, factor: int) -> np.ndarray:
    """Mean over `factor`-voxel blocks (the volume padded with zeros to whole blocks)."""
    volume = np.asarray(volume, np.float64)
    if factor == 1:
        return np.ascontiguousarray(volume)
    coarse = [int(-(-n // factor)) for n in volume.shape]
    padded = np.zeros([c * factor for c in coarse])
    padded[tuple(slice(0, n) for n in volume.shape)] = volume
    return padded.reshape(coarse[0], factor, coarse[1], factor, coarse[2], factor).mean(axis=(1, 3, 5))


def smoothed_for(volume: np.ndarray, affine, voxel_mm: float) -> np.ndarray:
    """Gaussian-smooth `volume` so that its resolution is about `voxel_mm` (FWHM, per axis)."""
    own = np.sqrt((np.asarray(affine, float)[:3, :3] ** 2).sum(axis=0))
    fwhm = np.sqrt(np.maximum(voxel_mm**2 - own**2, 0.0))
    sigma = fwhm / 2.3548 / own
    if not np.any(sigma > 0.05):
        return np.ascontiguousarray(volume, np.float64)
    return ndimage.gaussian_filter(np.asarray(volume, np.float64), sigma, mode="nearest")


# ---------------------------------------------------------------------------------------------
# Costs on the target grid
# ---------------------------------------------------------------------------------------------

def _forward_diff(image, spacing):
    grads = []
    for a in range(3):
        g = np.zeros_like(image)
        index = [slice(None)] * 3
        index[a] = slice(0, -1)
        g[tuple(index)] = np.diff(image, axis=a) / spacing[a]
        grads.append(g)
    return grads


def _forward_diff_adjoint(fields, spacing):
    out = np.zeros_like(fields[0])
    for a in range(3):
        w = fields[a].copy()
        index = [slice(None)] * 3
        index[a] = -1
        w[tuple(index)] = 0.0
        out -= w / spacing[a]
        shifted = [slice(None)] * 3
        shifted[a] = slice(1, None)
        source = [slice(None)] * 3
        source[a] = slice(0, -1)
        out[tuple(shifted)] += w[tuple(source)] / spacing[a]
    return out


@dataclass(frozen=True)
class NGFCost:
    """Normalised gradient fields (Haber and Modersitzki 2006, Intensity gradient based
    registration and fusion of multi-modal images, MICCAI 2006, LNCS 4191:726; from memory).

    ``C = 1 - mean( (grad d . n_e)^2 / (|grad d|^2 + eps_d^2) )`` with
    ``n_e = grad e / sqrt(|grad e|^2 + eps_e^2)``: 0 where every edge of the prediction ``d`` is
    parallel or antiparallel to the target's, so contrast inversions cost nothing. Forward
    differences in mm; the edge parameters are fixed per level (a fraction of the mean
    gradient magnitude), so the cost is a fixed function of ``d``.
    """

    target_normal: tuple
    eps_d: float
    spacing: tuple

    def __call__(self, d):
        grad = _forward_diff(d, self.spacing)
        q = sum(g * n for g, n in zip(grad, self.target_normal))
        denominator = sum(g * g for g in grad) + self.eps_d**2
        ratio = q / denominator
        size = d.size
        cost = 1.0 - float(np.sum(q * ratio)) / size
        w = [(-2.0 / size) * (ratio * n - ratio * ratio * g) for g, n in zip(grad, self.target_normal)]
        return cost, _forward_diff_adjoint(w, self.spacing)


def make_ngf(target, spacing, prediction, edge_fraction: float) -> NGFCost:
    grad_e = _forward_diff(target, spacing)
    mag_e = np.sqrt(sum(g * g for g in grad_e))
    eps_e = edge_fraction * max(float(mag_e.mean()), 1e-12)
    normal = tuple(g / np.sqrt(mag_e**2 + eps_e**2) for g in grad_e)
    mag_d = np.sqrt(sum(g * g for g in _forward_diff(prediction, spacing)))
    eps_d = edge_fraction * max(float(mag_d.mean()), 1e-12)
    return NGFCost(normal, eps_d, tuple(spacing))


@dataclass(frozen=True)
class SSDCost:
    """Weighted sum of squared differences, normalised: ``sum(w (d - e)^2) / sum(w e^2)``."""

    target: np.ndarray
    weight: np.ndarray
    scale: float

    def __call__(self, d):
        r = self.weight * (d - self.target)
        return float(np.sum(r * (d - self.target))) * self.scale, (2.0 * self.scale) * r


def make_ssd(target, weight=None) -> SSDCost:
    weight = np.ones_like(target) if weight is None else np.asarray(weight, float)
    energy = float(np.sum(weight * target * target))
    return SSDCost(target, weight, 1.0 / max(energy, 1e-300))


# ---------------------------------------------------------------------------------------------
# The problem at one level
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Problem:
    """Source anatomy and field, target image on a working grid, and the cost, at one level.

    ``kappa`` is the shift along the working grid's last axis, in its voxels, per Hz.
    """

    source: np.ndarray
    field_hz: np.ndarray
    source_affine: np.ndarray
    target_shape: tuple
    target_affine: np.ndarray
    kappa: float
    centre_mm: np.ndarray
    cost: object = None

    def vmap(self, params) -> np.ndarray:
        """Target voxel -> source voxel map (3x4) at `params` (t mm, angles rad)."""
        inverse = np.linalg.inv(pose_matrix(params[:3], params[3:], self.centre_mm))
        return (np.linalg.inv(self.source_affine) @ inverse @ self.target_affine)[:3]

    def predict(self, params):
        """Forward-distorted source on the target grid, and the pieces the gradient needs."""
        u, f, gu, gf = kernels.sample_pair(self.source, self.field_hz, self.vmap(params), self.target_shape)
        n = self.target_shape[2]
        shift = self.kappa * f
        d = kernels.distort_lines(u.reshape(-1, n), shift.reshape(-1, n)).reshape(self.target_shape)
        return d, (u, shift, gu, gf)

    def evaluate(self, params):
        """Cost and its gradient with respect to (t mm, angles rad)."""
        d, (u, shift, gu, gf) = self.predict(params)
        cost, g = self.cost(d)
        n = self.target_shape[2]
        a, b = kernels.distort_adjoint(u.reshape(-1, n), shift.reshape(-1, n), g.reshape(-1, n))
        sum_h, outer = kernels.pose_sums(a.reshape(self.target_shape), b.reshape(self.target_shape), gu, gf,
                                         self.kappa, self.target_affine[:3], self.centre_mm + params[:3])
        to_world = np.linalg.inv(self.source_affine[:3, :3]).T
        sum_h, outer = to_world @ sum_h, to_world @ outer
        rot = rotation_matrix(params[3:])
        grad = np.empty(6)
        grad[:3] = -rot @ sum_h
        for k, d_rot in enumerate(rotation_derivatives(params[3:])):
            grad[3 + k] = float(np.sum(d_rot.T * outer))
        return cost, grad

    def coverage(self, params) -> float:
        """Fraction of target voxels whose source position lies inside the source grid."""
        ijk = np.indices(self.target_shape, dtype=float).reshape(3, -1)
        vmap = self.vmap(params)
        pos = vmap[:, :3] @ ijk + vmap[:, 3:4]
        upper = np.array(self.source.shape, float)[:, None] - 0.5
        return float(np.all((pos >= -0.5) & (pos <= upper), axis=0).mean())


# ---------------------------------------------------------------------------------------------
# Optimiser with a documented convergence rule
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class StopRule:
    """Stop when every translation step < `step_mm` and every rotation step < `step_deg` between
    two iterations, or the cost changes by less than `relative_cost` of its value; at most
    `max_iterations` iterations. Also converged: L-BFGS's own stationarity test, or, when its
    line search finds no descent, a coordinate pattern search ends where no step of that size
    along any parameter lowers the cost (see `_pattern_search`)."""

    step_mm: float = 0.01
    step_deg: float = 0.01
    relative_cost: float = 1e-7
    max_iterations: int = 100


@dataclass(frozen=True)
class PyramidSearch:
    """A coarse-to-fine pose search and its convergence rule, shared by the public options
    (:class:`fieldfix.align.AlignOptions`, :class:`fieldfix.motion.MotionOptions`).

    Attributes
    ----------
    levels : tuple of int, block sizes of the resolution pyramid, coarse to fine
    max_iterations : int, cost evaluations (or Gauss-Newton passes) per level
    step_mm, step_deg, relative_cost : float, the :class:`StopRule` on the finest level; on a
        level of `factor`-voxel blocks the steps are scaled by the factor
    """

    levels: tuple = (4, 2, 1)
    max_iterations: int = 60
    step_mm: float = 0.01
    step_deg: float = 0.01
    relative_cost: float = 1e-7

    def rule(self, factor: int) -> StopRule:
        """The stop rule on a level of `factor`-voxel blocks."""
        return StopRule(self.step_mm * factor, self.step_deg * factor, self.relative_cost,
                        self.max_iterations)


@dataclass(frozen=True)
class Solution:
    params: np.ndarray
    cost: float
    iterations: int
    converged: bool
    last_step_mm: float


def _scaled(params):
    return np.concatenate([params[:3], params[3:] * ARC_RADIUS_MM])


def _unscaled(x):
    return np.concatenate([x[:3], x[3:] / ARC_RADIUS_MM])


def minimise(problem: Problem, start, rule: StopRule) -> Solution:
    """L-BFGS (scipy) on the exact gradient, stopped by `rule` (see :class:`StopRule`)."""
    state = {"x": _scaled(np.asarray(start, float)), "cost": None, "iterations": 0, "converged": False,
             "step": np.inf}

    def fun(x):
        cost, grad = problem.evaluate(_unscaled(x))
        return cost, np.concatenate([grad[:3], grad[3:] / ARC_RADIUS_MM])

    def callback(intermediate_result):
        x, cost = intermediate_result.x, float(intermediate_result.fun)
        step = np.abs(x - state["x"])
        state["iterations"] += 1
        state["step"] = float(step.max())
        small = (step[:3].max() < rule.step_mm
                 and np.rad2deg(step[3:].max() / ARC_RADIUS_MM) < rule.step_deg)
        flat = state["cost"] is not None and abs(state["cost"] - cost) <= rule.relative_cost * abs(cost)
        state["x"], state["cost"] = x.copy(), cost
        if small or flat:
            state["converged"] = True
            raise StopIteration

    result = optimize.minimize(fun, state["x"], jac=True, method="L-BFGS-B", callback=callback,
                               options={"maxiter": rule.max_iterations, "ftol": 1e-15, "gtol": 1e-12,
                                        "maxcor": 10})
    params, cost = _unscaled(np.asarray(result.x, float)), float(result.fun)
    converged = state["converged"] or (result.status == 0 and state["iterations"] < rule.max_iterations)
    iterations = state["iterations"]
    if not converged and result.status == 2:  # the line search found no descent: a kinked cost
        params, cost, rounds, converged = _pattern_search(problem, params, cost, rule)
        iterations += rounds
    return Solution(params, cost, iterations, bool(converged), state["step"])


def _pattern_search(problem, params, cost, rule: StopRule, first_scale: float = 16.0):
    """Coordinate pattern search, for where L-BFGS's line search stops without a descent.

    Trilinear sampling makes the cost kinked where samples fall on grid nodes (a volume against
    itself, or near it). Steps of ``first_scale`` times (`step_mm`, `step_deg`) along each
    parameter are tried in both directions, an improvement is kept, and the step is halved when
    none improves; converged when no step of (`step_mm`, `step_deg`) lowers the cost by more
    than `relative_cost` of itself. Returns (params, cost, rounds, converged).
    """
    scale, rounds = first_scale, 0
    while rounds < rule.max_iterations:
        rounds += 1
        improved = False
        for n in range(6):
            size = scale * (rule.step_mm if n < 3 else np.deg2rad(rule.step_deg))
            for sign in (1.0, -1.0):
                trial = params.copy()
                trial[n] += sign * size
                value = problem.evaluate(trial)[0]
                if value < cost - rule.relative_cost * abs(cost):
                    params, cost, improved = trial, value, True
                    break
        if not improved:
            if scale <= 1.0:
                return params, cost, rounds, True
            scale /= 2.0
    return params, cost, rounds, False


# ---------------------------------------------------------------------------------------------
# Gauss-Newton for least-squares pose costs
# ---------------------------------------------------------------------------------------------

def rotation_increment(omega_rad) -> np.ndarray:
    """Rotation by the vector `omega_rad` (axis times angle, rad; Rodrigues' formula)."""
    omega = np.asarray(omega_rad, float)
    angle = float(np.linalg.norm(omega))
    if angle < 1e-15:
        return np.eye(3)
    k = omega / angle
    cross = np.array([[0.0, -k[2], k[1]], [k[2], 0.0, -k[0]], [-k[1], k[0], 0.0]])
    return np.eye(3) + np.sin(angle) * cross + (1.0 - np.cos(angle)) * cross @ cross


@dataclass(frozen=True)
class RigidState:
    """A pose during Gauss-Newton: ``y = R (x - c) + c + t`` (translation mm, rotation matrix)."""

    translation_mm: np.ndarray
    rotation: np.ndarray

    def step(self, delta) -> "RigidState":
        """Translation plus ``delta[:3]``; rotation by ``delta[3:]`` (rad, about world axes) after ``R``."""
        return RigidState(self.translation_mm + delta[:3], rotation_increment(delta[3:]) @ self.rotation)


@dataclass(frozen=True)
class GaussNewtonResult:
    state: RigidState
    cost: float
    cost_start: float
    passes: int
    converged: bool


def gauss_newton(normal, start: RigidState, rule: StopRule, damping: float = 1e-4) -> GaussNewtonResult:
    """Minimise a least-squares pose cost by Gauss-Newton with Levenberg-Marquardt damping.

    `normal(state)` returns ``(cost, gradient (6,), matrix (6, 6))``: the cost, its gradient
    and the Gauss-Newton matrix ``J^T J`` with respect to a step (translation mm, then small
    rotations in rad about world x, y, z applied after the current rotation). A step solves
    ``(M + lambda diag(M)) d = -g``; it is kept when the cost does not rise (then lambda / 10),
    otherwise lambda * 10 and the step is solved again. Converged when the next step would move
    no translation by `rule.step_mm` and no rotation by `rule.step_deg` or more (that step is
    not taken: the result is the last pose evaluated), or when a kept step changed the cost by
    less than `rule.relative_cost` of itself. At most `rule.max_iterations` evaluations.
    """
    state, (cost, grad, matrix) = start, normal(start)
    cost_start, passes, lam = cost, 1, damping
    while passes < rule.max_iterations:
        diagonal = np.maximum(np.diag(matrix), 1e-12 * max(float(np.max(np.diag(matrix))), 1e-300))
        try:
            delta = np.linalg.solve(matrix + lam * np.diag(diagonal), -grad)
        except np.linalg.LinAlgError:
            delta = -grad / diagonal
        if np.abs(delta[:3]).max() < rule.step_mm and np.rad2deg(np.abs(delta[3:]).max()) < rule.step_deg:
            return GaussNewtonResult(state, cost, cost_start, passes, True)
        trial = state.step(delta)
        trial_cost, trial_grad, trial_matrix = normal(trial)
        passes += 1
        if trial_cost <= cost:
            flat = cost - trial_cost <= rule.relative_cost * abs(cost)
            state, cost, grad, matrix = trial, trial_cost, trial_grad, trial_matrix
            lam = max(lam / 10.0, 1e-9)
            if flat:
                return GaussNewtonResult(state, cost, cost_start, passes, True)
        else:
            lam *= 10.0
    return GaussNewtonResult(state, cost, cost_start, passes, False)


def checked_volume(array, name: str) -> np.ndarray:
    """`array` as a float64 3D volume, refused (naming `name`) unless finite and at least 2 voxels wide."""
    values = np.asarray(array, dtype=np.float64)
    if values.ndim != 3:
        raise InputError(f"{name} must be a 3D volume, got {values.ndim} dimensions")
    if min(values.shape) < 2:
        raise InputError(f"{name} needs at least 2 voxels along every axis, got shape {values.shape}")
    if not np.isfinite(values).all():
        raise InputError(f"{name} contains NaN or infinite values")
    return values


def checked_affine(affine, name: str) -> np.ndarray:
    """`affine` as a float64 4x4 matrix, refused (naming `name`) unless finite and invertible."""
    affine = np.asarray(affine, dtype=np.float64)
    if affine.shape != (4, 4) or not np.isfinite(affine).all() or abs(np.linalg.det(affine[:3, :3])) < 1e-9:
        raise GeometryError(f"{name} must be a finite, invertible 4x4 voxel-to-world matrix")
    return affine


def require_anatomy(values: np.ndarray, name: str) -> None:
    """Refuse an all-zero or constant volume: there is nothing to register."""
    if not np.any(values != 0):
        raise InputError(f"{name} is all zeros: there is no anatomy to align")
    if float(values.max() - values.min()) <= 1e-12 * max(abs(float(values.max())), 1.0):
        raise InputError(f"{name} is constant: there are no edges to align")
