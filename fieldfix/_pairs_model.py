"""The field model and the cost of :mod:`fieldfix.pairs`: cubic B-splines, pyramid levels, cost, gradient.

Private module. The field is a tensor-product cubic B-spline on a control grid of knot
spacing ``h`` (mm): ``b(x) = sum_m c_m beta3((x0 - t0)/h) beta3((x1 - t1)/h) beta3((x2 - t2)/h)``,
so the field and its derivatives on a voxel grid are separable products of small 1D
matrices (``B``, ``B'``, ``B''`` per axis) with the coefficients, and their transposes give
the gradient with respect to the coefficients.

Cost of one level (images normalised to a signal mean of 1, so the terms are
dimensionless apart from the weights)::

    E(c) = (1 / V) sum_groups sum_x rho(C_g(x) - M(x))  +  (1 / V) sum_x [lam S(b) + mu (lap b)^2](x)

``C_g = g_g I_g(y + s_g(y)) (1 + d s_g / d y)`` is group g's image unwarped with its own
shift ``s_g = sign * echo_spacing * n_pe_lines * b`` (voxels) and Jacobian, ``M`` the mean of
the ``C_g``, V the number of voxels, ``rho`` the squared difference or the Cauchy loss
``s^2 log(1 + r^2/s^2)``, ``S`` the bending energy
``sum_a (d2 b/dxa2)^2 + 2 sum_{a<b} (d2 b/dxa dxb)^2`` and ``lap b`` the Laplacian, both in
Hz/mm^2, so ``lam`` and ``mu`` are in mm^4/Hz^2. Derivatives of the field come from the
spline itself (analytic), the Jacobian ``1 + d s / d y`` from the derivative of the field. This is the least-squares formulation with a smooth field and Jacobian
modulation of Andersson, Skare & Ashburner 2003 (NeuroImage 20(2):870-888, from memory),
with the symmetric treatment of both polarities of Holland, Kuperman & Dale 2010
(NeuroImage 50(1):175-183, from memory); the bending energy stands in for the
hyperelastic regulariser of Ruthotto et al. 2012 (Phys Med Biol 57(18):5715, from memory),
which adds a barrier against folding that this model does not have.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from . import _pairs_kernels as kernels
from . import _pairs_rigid as rigid

__all__ = ["bspline", "knots_mm", "basis", "separable", "Level", "make_level", "Objective", "refit"]


def bspline(t: np.ndarray, derivative: int = 0) -> np.ndarray:
    """Cubic B-spline ``beta3(t)`` (support |t| < 2) or its first or second derivative.

    Examples
    --------
    >>> bspline(np.array([0.0, 1.0, 2.0])).tolist()
    [0.6666666666666666, 0.16666666666666666, 0.0]
    """
    t = np.asarray(t, float)
    a = np.abs(t)
    inner, outer = a < 1, (a >= 1) & (a < 2)
    if derivative == 0:
        return np.where(inner, 2 / 3 - a ** 2 + a ** 3 / 2, np.where(outer, (2 - a) ** 3 / 6, 0.0))
    if derivative == 1:
        return np.sign(t) * np.where(inner, -2 * a + 1.5 * a ** 2, np.where(outer, -0.5 * (2 - a) ** 2, 0.0))
    if derivative == 2:
        return np.where(inner, -2 + 3 * a, np.where(outer, 2 - a, 0.0))
    raise ValueError("derivative must be 0, 1 or 2")


def knots_mm(length_mm: float, spacing_mm: float) -> np.ndarray:
    """Knot positions covering ``[0, length_mm]`` with one spare knot beyond each end."""
    count = int(np.ceil(length_mm / spacing_mm - 1e-9)) + 3
    return spacing_mm * (np.arange(count) - 1.0)


def basis(positions_mm: np.ndarray, knots: np.ndarray, derivative: int = 0) -> np.ndarray:
    """(positions, knots) matrix of ``d^k/dx^k beta3((x - t) / h)`` in units of mm^-k."""
    h = float(knots[1] - knots[0])
    t = (np.asarray(positions_mm, float)[:, None] - knots[None, :]) / h
    return bspline(t, derivative) / h ** derivative


def contract(values: np.ndarray, matrix: np.ndarray, axis: int) -> np.ndarray:
    """Apply `matrix` along one axis: ``out[..., i, ...] = sum_a matrix[i, a] values[..., a, ...]``."""
    return np.moveaxis(np.tensordot(matrix, values, axes=(1, axis)), 0, axis)


def separable(values: np.ndarray, matrices) -> np.ndarray:
    """Apply one matrix per axis: ``out[i,j,k] = sum m0[i,a] m1[j,b] m2[k,c] values[a,b,c]``."""
    out = np.tensordot(matrices[0], values, axes=(1, 0))
    out = np.tensordot(out, matrices[1], axes=(1, 1))
    return np.tensordot(out, matrices[2], axes=(1, 1))


@dataclass
class Level:
    """One resolution: smoothed, block-averaged group images and the spline matrices there.

    ``coefs[g]`` holds group g's image prefiltered for cubic interpolation along its PE
    axis; ``positions_mm[a]`` the level's voxel centres along axis a (mm from voxel 0 of the
    input grid); ``factor[g]`` group g's shift in level voxels per Hz.
    """

    images: list
    coefs: list
    axes: tuple
    factor: tuple
    subsample: tuple
    voxel_mm: np.ndarray
    positions_mm: list
    knots: list
    mats: dict


def _block_mean(volume: np.ndarray, factors) -> np.ndarray:
    shape = [n // f for n, f in zip(volume.shape, factors)]
    cropped = volume[: shape[0] * factors[0], : shape[1] * factors[1], : shape[2] * factors[2]]
    return cropped.reshape(shape[0], factors[0], shape[1], factors[1], shape[2], factors[2]).mean(axis=(1, 3, 5))


def make_level(images, axes, shift_per_hz, voxel_mm, subsample: int, fwhm_vox: float, knot_spacing_vox: float):
    """Build a :class:`Level` from full-resolution group images (normalised).

    Smoothing: Gaussian of `fwhm_vox` input voxels; subsampling: block means of `subsample`
    voxels per axis (fewer on axes shorter than 8 blocks); knots every `knot_spacing_vox`
    input voxels along each axis.
    """
    shape = images[0].shape
    factors = tuple(max(1, min(int(subsample), n // 8)) for n in shape)
    sigma = fwhm_vox / (2.0 * np.sqrt(2.0 * np.log(2.0)))
    level_images = []
    for image in images:
        smooth = ndimage.gaussian_filter(image, sigma, mode="nearest") if sigma > 0 else image
        level_images.append(_block_mean(smooth, factors))
    vox = np.asarray(voxel_mm, float) * factors
    level_shape = level_images[0].shape
    positions = [(f * np.arange(n) + (f - 1) / 2.0) * v for n, f, v in zip(level_shape, factors, voxel_mm)]
    knots = [knots_mm((n - 1) * v, knot_spacing_vox * v) for n, v in zip(shape, voxel_mm)]
    mats = {d: [basis(p, k, d) for p, k in zip(positions, knots)] for d in (0, 1, 2)}
    coefs = [ndimage.spline_filter1d(im, order=3, axis=a, mode="mirror") for im, a in zip(level_images, axes)]
    factor = tuple(s / factors[a] for s, a in zip(shift_per_hz, axes))
    return Level(level_images, coefs, tuple(axes), factor, factors, vox, positions, knots, mats)


def refit(coefficients: np.ndarray, old_knots, new_knots, positions) -> np.ndarray:
    """Least-squares coefficients on `new_knots` of the field given on `old_knots`, at `positions`."""
    old = [basis(p, k) for p, k in zip(positions, old_knots)]
    field = separable(coefficients, old)
    return separable(field, [np.linalg.pinv(basis(p, k)) for p, k in zip(positions, new_knots)])


def field_on(coefficients: np.ndarray, knots, positions, derivative_axis: int | None = None) -> np.ndarray:
    """The field (Hz) or its derivative along one axis (Hz/mm) at the grid of `positions`."""
    mats = [basis(p, k, 1 if a == derivative_axis else 0) for a, (p, k) in enumerate(zip(positions, knots))]
    return separable(coefficients, mats)


def _penalty_terms(mats, bending_weight: float, laplacian_weight: float):
    """(weight, per-axis matrices) terms whose sum K gives the penalty ``c . K c`` (K symmetric).

    Bending: ``sum_a (b_aa)^2 + 2 sum_{a<b} (b_ab)^2``; Laplacian: ``(sum_a b_aa)^2``, i.e.
    ``sum_{a,b} b_aa b_bb``, each summed over the level's voxels.
    """
    terms = []
    for a in range(3):
        for b in range(3):
            if bending_weight:
                orders = [0, 0, 0]
                orders[a] += 1
                orders[b] += 1
                terms.append((bending_weight, [mats[o][i].T @ mats[o][i] for i, o in enumerate(orders)]))
            if laplacian_weight:
                left = [mats[2][i] if i == a else mats[0][i] for i in range(3)]
                right = [mats[2][i] if i == b else mats[0][i] for i in range(3)]
                terms.append((laplacian_weight, [l.T @ r for l, r in zip(left, right)]))
    return terms


class Objective:
    """Cost and analytic gradient of one level (see the module docstring).

    Parameters
    ----------
    level : Level
    bending_weight : float, mm^4/Hz^2
    motion : list of (matrix, offset) or None per group
        Rigid pull mapping applied to group g's corrected image before the comparison.
    offsets_hz : list of arrays or None per group
        Fixed field offset of group g (its field moved with the head), on the level grid.
    """

    def __init__(self, level: Level, bending_weight: float, motion=None, offsets_hz=None,
                 laplacian_weight: float = 0.0, robust_scale: float | None = None):
        self.level = level
        self.robust = None if not robust_scale else float(robust_scale)
        n = len(level.images)
        self.motion = motion or [None] * n
        self.offsets = offsets_hz or [None] * n
        self.shape = tuple(len(k) for k in level.knots)
        self.size = level.images[0].size
        self.evaluations = 0
        m0, m1, m2 = level.mats[0], level.mats[1], level.mats[2]
        self._penalty = _penalty_terms(level.mats, float(bending_weight), float(laplacian_weight))
        self._field = m0
        self._deriv = {a: [m1[i] if i == a else m0[i] for i in range(3)] for a in set(level.axes)}
        self._m2 = m2

    def corrected(self, coefficients: np.ndarray):
        """Per group: corrected image (level grid, after motion), and the kernel by-products."""
        field, deriv = self._synthesis(coefficients.reshape(self.shape))
        out = []
        for g, (coef, axis, factor) in enumerate(zip(self.level.coefs, self.level.axes, self.level.factor)):
            b = field if self.offsets[g] is None else field + self.offsets[g]
            db = deriv[axis] * self.level.voxel_mm[axis]
            if self.offsets[g] is not None:
                db = db + np.gradient(self.offsets[g], axis=axis)
            shift = np.ascontiguousarray(np.moveaxis(factor * b, axis, -1))
            dshift = np.ascontiguousarray(np.moveaxis(factor * db, axis, -1))
            moved = np.moveaxis(coef, axis, -1)
            corr, value, dvalue = kernels.warp_lines(np.ascontiguousarray(moved), shift, dshift)
            image = np.moveaxis(corr, -1, axis)
            if self.motion[g] is not None:
                image = kernels.rigid_pull(image, *self.motion[g])
            out.append((image, dshift, value, dvalue))
        return out

    def _synthesis(self, c: np.ndarray):
        """Field (Hz) and its derivatives along the PE axes (Hz/mm) on the level grid.

        With one PE axis the contractions along the two other axes are shared.
        """
        if len(self._deriv) != 1:
            return separable(c, self._field), {a: separable(c, mats) for a, mats in self._deriv.items()}
        (axis,) = self._deriv
        shared = c
        for a in range(3):
            if a != axis:
                shared = contract(shared, self._field[a], a)
        return contract(shared, self._field[axis], axis), {axis: contract(shared, self._deriv[axis][axis], axis)}

    def _adjoint(self, g_field: np.ndarray, g_deriv: dict) -> np.ndarray:
        """Transpose of :meth:`_synthesis` (the derivative terms scaled by the PE voxel size)."""
        vox = self.level.voxel_mm
        if len(self._deriv) != 1:
            grad = separable(g_field, [m.T for m in self._field])
            for a, mats in self._deriv.items():
                grad += vox[a] * separable(g_deriv[a], [m.T for m in mats])
            return grad
        (axis,) = self._deriv
        total = contract(g_field, self._field[axis].T, axis)
        total += vox[axis] * contract(g_deriv[axis], self._deriv[axis][axis].T, axis)
        for a in range(3):
            if a != axis:
                total = contract(total, self._field[a].T, a)
        return total

    def penalty(self, c: np.ndarray):
        """Weighted penalty (mean over voxels) and its gradient with respect to the coefficients."""
        grad = np.zeros_like(c)
        for weight, grams in self._penalty:
            grad += weight * separable(c, grams)
        return float((c * grad).sum()) / self.size, 2.0 * grad / self.size

    def _data(self, parts, mean):
        """Data term and its gradient with respect to each corrected image.

        Least squares: ``rho(r) = r^2``. Robust (``robust_scale`` s): the Cauchy loss
        ``rho(r) = s^2 log(1 + r^2 / s^2)``, which caps the pull of voxels the model cannot
        match (folds, ringing). The gradient through the mean image is kept: with
        ``psi = rho'``, image g receives ``psi(r_g) - mean_h psi(r_h)``.
        """
        residuals = [p[0] - mean for p in parts]
        if self.robust is None:
            data = sum(float((r ** 2).sum()) for r in residuals) / self.size
            psi = [2.0 * r / self.size for r in residuals]
        else:
            s2 = self.robust ** 2
            data = sum(float((s2 * np.log1p(r ** 2 / s2)).sum()) for r in residuals) / self.size
            psi = [2.0 * r / (1.0 + r ** 2 / s2) / self.size for r in residuals]
        average = sum(psi) / len(psi)
        return data, [p - average for p in psi]

    def __call__(self, coefficients: np.ndarray):
        self.evaluations += 1
        c = coefficients.reshape(self.shape)
        parts = self.corrected(coefficients)
        mean = sum(p[0] for p in parts) / len(parts)
        g_field = np.zeros(self.level.images[0].shape)
        g_deriv = {a: np.zeros_like(g_field) for a in self._deriv}
        data, influence = self._data(parts, mean)
        for g, (image, dshift, value, dvalue) in enumerate(parts):
            grad_image = influence[g]
            if self.motion[g] is not None:
                grad_image = kernels.rigid_pull_adjoint(grad_image, *self.motion[g])
            axis = self.level.axes[g]
            kernels.accumulate_gradient(np.ascontiguousarray(np.moveaxis(grad_image, axis, -1)), dshift, value,
                                        dvalue, self.level.factor[g], np.moveaxis(g_field, axis, -1),
                                        np.moveaxis(g_deriv[axis], axis, -1))
        grad = self._adjoint(g_field, g_deriv)
        bend, bend_grad = self.penalty(c)
        return data + bend, (grad + bend_grad).ravel()


def group_field_offsets(coefficients, level: Level, motion_params):
    """Per group: field offset ``b(T^-1 y) - b(y)`` on the level grid for a moved group (None if still)."""
    field = separable(coefficients, level.mats[0])
    out = []
    for params in motion_params:
        if params is None or not np.any(params):
            out.append(None)
            continue
        moved = rigid.pull(field, params, level.voxel_mm, inverse=True)
        out.append(moved - field)
    return out
