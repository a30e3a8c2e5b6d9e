"""The numba kernels, spline model and rigid alignment of fieldfix.pairs against references outside them."""

import numpy as np
import pytest
from scipy import interpolate, ndimage

from fieldfix import _pairs_kernels as kernels
from fieldfix import _pairs_model as model
from fieldfix import _pairs_rigid as rigid
from fieldfix.unwarp import distort


def _smooth_random(shape, seed, sigma=2.0):
    return ndimage.gaussian_filter(np.random.default_rng(seed).random(shape), sigma)


def test_warp_kernel_matches_numpy_reference_and_scipy_map_coordinates():
    rng = np.random.default_rng(0)
    image = rng.random((5, 6, 20))
    coef = ndimage.spline_filter1d(image, 3, axis=-1, mode="mirror")
    shift = rng.normal(0.0, 3.0, image.shape)
    dshift = rng.normal(0.0, 0.2, image.shape)
    ours = kernels.warp_lines(coef, shift, dshift)
    reference = kernels.warp_lines_reference(coef, shift, dshift)
    for a, b in zip(ours, reference):
        assert np.allclose(a, b, atol=1e-12)
    # Reference library: scipy.ndimage.map_coordinates (cubic spline, mirror) at the same positions.
    position = np.arange(20) + shift
    inside = (position >= 0) & (position <= 19)
    i, j, _ = np.indices(image.shape)
    expected = ndimage.map_coordinates(image, [i, j, np.clip(position, 0, 19)], order=3, mode="mirror")
    assert np.allclose(ours[1][inside], expected[inside], atol=1e-10)
    assert np.all(ours[1][(position < -0.5) | (position > 19.5)] == 0.0)
    assert np.allclose(ours[0], ours[1] * (1 + dshift))
    # The derivative is the analytic one: central differences of the value agree.
    step = 1e-6
    moved = kernels.warp_lines(coef, shift + step, dshift)[1]
    assert np.allclose(((moved - ours[1]) / step)[inside], ours[2][inside], atol=1e-4)


def test_accumulate_kernel_matches_reference():
    rng = np.random.default_rng(1)
    arrays = [rng.normal(size=(4, 5, 7)) for _ in range(4)]
    g1, g2 = np.zeros((4, 5, 7)), np.zeros((4, 5, 7))
    r1, r2 = np.zeros((4, 5, 7)), np.zeros((4, 5, 7))
    kernels.accumulate_gradient(*arrays, 0.04, g1, g2)
    kernels.accumulate_gradient_reference(*arrays, 0.04, r1, r2)
    assert np.allclose(g1, r1) and np.allclose(g2, r2) and np.abs(g1).max() > 0


def test_rigid_pull_matches_scipy_and_its_adjoint_is_the_transpose():
    rng = np.random.default_rng(2)
    matrix, offset = rigid.pull_mapping([0.7, -0.4, 0.3, 2.0, -1.0, 3.0], (2.0, 2.5, 3.0), (7, 8, 9))
    volume = rng.random((7, 8, 9))
    # Reference library: scipy.ndimage.affine_transform, order 1, mode 'nearest'.
    assert np.allclose(kernels.rigid_pull(volume, matrix, offset),
                       kernels.rigid_pull_reference(volume, matrix, offset), atol=1e-12)
    small = rng.random((4, 5, 3))
    m_small, o_small = rigid.pull_mapping([0.3, 0.2, -0.1, 4.0, 0.0, -3.0], (1.0, 1.0, 1.0), small.shape)
    assert np.allclose(kernels.rigid_pull_adjoint(small, m_small, o_small),
                       kernels.rigid_pull_adjoint_reference(small, m_small, o_small), atol=1e-12)
    # Dot-product test on the larger grid: <A x, y> = <x, A^T y>.
    other = rng.random(volume.shape)
    left = float((kernels.rigid_pull(volume, matrix, offset) * other).sum())
    right = float((volume * kernels.rigid_pull_adjoint(other, matrix, offset)).sum())
    assert left == pytest.approx(right, rel=1e-12)


def _line_edges(shift):
    first = shift[:, :1] - 0.5 * (shift[:, 1:2] - shift[:, :1])
    last = shift[:, -1:] + 0.5 * (shift[:, -1:] - shift[:, -2:-1])
    edges = np.arange(shift.shape[1] + 1) - 0.5 + np.concatenate(
        [first, 0.5 * (shift[:, 1:] + shift[:, :-1]), last], axis=1)
    return edges[:, :-1], edges[:, 1:]


def test_restore_kernel_matches_dense_reference_and_inverts_the_forward_model():
    rng = np.random.default_rng(3)
    n, lines = 30, 4
    truth = rng.random((lines, n))
    images, los, his = [], [], []
    for sign in (1, -1):
        shift = sign * 2.5 * np.sin(np.arange(n) / 4.0)[None, :] * np.ones((lines, 1))
        images.append(distort(truth[:, None, :], shift[:, None, :], 2)[:, 0, :])
        lo, hi = _line_edges(shift)
        los.append(lo)
        his.append(hi)
    args = np.array(images), np.array(los), np.array(his)
    ours = kernels.restore_lines(*args, 1e-4)
    assert np.allclose(ours, kernels.restore_lines_reference(*args, 1e-4), atol=1e-9)
    assert np.abs(ours - truth).max() < 0.02
    # The dense forward matrix reproduces fieldfix.unwarp.distort line by line.
    amat = kernels.forward_matrix_reference(los[0][0], his[0][0])
    assert np.allclose(amat @ truth[0], images[0][0], atol=1e-12)


@pytest.mark.parametrize("derivative", [0, 1, 2])
def test_bspline_basis_matches_scipy_bspline(derivative):
    # Reference library: scipy.interpolate.BSpline.basis_element on uniform knots.
    t = np.linspace(-2.5, 2.5, 101)
    element = interpolate.BSpline.basis_element([-2, -1, 0, 1, 2], extrapolate=False)
    expected = np.nan_to_num(element.derivative(derivative)(t) if derivative else element(t))
    assert np.allclose(model.bspline(t, derivative), expected, atol=1e-12)


def test_separable_synthesis_equals_the_kronecker_product():
    rng = np.random.default_rng(4)
    coef = rng.normal(size=(4, 5, 3))
    mats = [rng.normal(size=(6, 4)), rng.normal(size=(7, 5)), rng.normal(size=(2, 3))]
    dense = np.kron(np.kron(mats[0], mats[1]), mats[2]) @ coef.ravel()
    assert np.allclose(model.separable(coef, mats).ravel(), dense)


@pytest.mark.parametrize("robust, axes", [(None, (1, 1, 0)), (0.2, (1, 1, 0)), (0.2, (1, 1, 1))])
def test_objective_gradient_matches_finite_differences(robust, axes):
    rng = np.random.default_rng(5)
    images = [_smooth_random((20, 24, 16), seed) for seed in (6, 7, 8)]
    level = model.make_level(images, axes, (0.04, -0.04, 0.03), np.array([2.5, 2.0, 3.0]), 1, 1.0, 4.0)
    params = np.array([0.5, -0.3, 0.2, 1.0, -0.5, 0.7])
    coef0 = rng.normal(0.0, 5.0, tuple(len(k) for k in level.knots))
    motion = [None, rigid.pull_mapping(params, level.voxel_mm, images[0].shape), None]
    offsets = model.group_field_offsets(coef0, level, [None, params, None])
    objective = model.Objective(level, 0.05, motion, offsets, laplacian_weight=0.02, robust_scale=robust)
    coef = rng.normal(0.0, 5.0, coef0.shape).ravel()
    _, grad = objective(coef)
    direction = rng.normal(size=coef.size)
    step = 1e-4
    numeric = (objective(coef + step * direction)[0] - objective(coef - step * direction)[0]) / (2 * step)
    assert float(grad @ direction) == pytest.approx(numeric, rel=1e-6)


def test_rigid_registration_recovers_a_motion_made_by_scipy():
    texture = _smooth_random((32, 32, 24), 0)
    volume = 10.0 * (texture - texture.mean())
    voxel = (2.0, 2.0, 2.5)
    truth = np.array([1.2, -0.8, 0.5, 2.0, -1.5, 3.0])
    matrix, offset = rigid.pull_mapping(truth, voxel, volume.shape)
    inverse = rigid.invert_mapping(matrix, offset)
    # The moving volume is made by scipy.ndimage.affine_transform (cubic), not by our resampler.
    moving = ndimage.affine_transform(volume, inverse[0], offset=inverse[1], order=3, mode="nearest")
    found = rigid.register_rigid(volume, moving, voxel)
    assert np.allclose(found[:3], truth[:3], atol=0.05)
    assert np.allclose(found[3:], truth[3:], atol=0.1)
