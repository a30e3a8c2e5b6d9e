"""The numba kernels, spline model and rigid alignment of fieldfix.pairs against references outside them."""

import numpy as np
import pytest
from scipy import interpolate, ndimage

from fieldfix import _pairs_kernels as kernels
from fieldfix import _pairs_model as model
from fieldfix import _pairs_rigid as rigid


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


def _folding_line(n=24, amplitude=3.2):
    """Shift of one line whose map w = x + s(x) folds where the slope of s is below -0.9."""
    return amplitude * np.sin(np.arange(n) / 3.0)


def test_forward_matrix_matches_scipy_quad_and_leaves_out_folded_rows():
    # Outside reference: scipy.integrate.quad of the defining integral
    # A[j, k] = integral over the field of view of beta3(x - k) * keys(j - x - s(x)) dx (mirrored
    # coefficients), with s linear between voxel centres (numpy.interp).
    from scipy import integrate

    shift = _folding_line()
    n = shift.size
    amat, jac, left_out = kernels.forward_matrix(shift, 0.1)
    ref_amat, ref_jac, ref_left_out = kernels.forward_matrix_reference(shift, 0.1)
    assert np.allclose(amat, ref_amat, atol=1e-13) and np.allclose(jac, ref_jac, atol=1e-12)
    assert np.array_equal(left_out, ref_left_out) and 0 < left_out.sum() < n
    x_nodes, w_nodes = kernels.line_map_reference(shift)
    slope = np.diff(w_nodes) / np.diff(x_nodes)
    folded = [i for i in range(n + 1) if slope[i] <= 0.1]
    # a row is left out exactly when the kernel (radius 2) reaches a folded segment's image
    reached = [any(min(w_nodes[i:i + 2]) - 2 < j < max(w_nodes[i:i + 2]) + 2 for i in folded) for j in range(n)]
    assert left_out.tolist() == reached and not amat[left_out].any()
    copies = {k: [v for v in range(-3, n + 3) if kernels._mirror_reference(np.array(v), n) == k] for k in range(n)}
    for j in np.flatnonzero(~left_out)[::3]:
        for k in range(0, n, 2):
            def integrand(x, j=j, k=k):
                if any(x_nodes[i] <= x <= x_nodes[i + 1] for i in folded):
                    return 0.0  # folded segments are not part of the model
                w = np.interp(x, x_nodes, w_nodes)
                return sum(kernels.bspline3_reference(x - v) for v in copies[k]) * kernels.keys_reference(j - w)
            value = integrate.quad(integrand, -0.5, n - 0.5, points=list(range(n)), limit=500)[0]
            assert amat[j, k] == pytest.approx(value, abs=1e-7)


def test_forward_model_conserves_signal_and_its_row_jacobian_is_the_slope():
    # Analytic: the Keys kernel is a partition of unity (sum_j K(j - t) = 1) and the cubic B-spline
    # integrates to 1, so every interior coefficient's signal lands in full on the distorted samples;
    # for a linear shift s = a + g x the map is affine and each row's Jacobian is 1 + g.
    n = 40
    for gain in (-0.4, 0.0, 0.5):
        shift = 1.3 + gain * (np.arange(n) - n / 2)
        amat, jac, left_out = kernels.forward_matrix(shift, 0.1)
        assert not left_out.any()
        def w(x, gain=gain):
            return x + 1.3 + gain * (x - n / 2)

        # coefficients whose mirrored copies miss the field of view and whose image (plus the kernel) stays on it
        covered = [k for k in range(3, n - 3) if w(k - 2) - 2 >= 0 and w(k + 2) + 2 <= n - 1]
        assert len(covered) > 10
        assert np.allclose(amat[:, covered].sum(axis=0), 1.0, atol=1e-12)
        inner = [j for j in range(n) if amat[j].any() and 4 < j < n - 5]
        assert np.allclose(jac[inner], 1 + gain, atol=1e-12)


def test_restore_kernel_matches_scipy_lstsq_and_layouts_agree():
    # Outside reference: the stacked weighted system (data rows, penalty rows, ridge rows) solved by
    # scipy.linalg.lstsq (SVD), against our banded Cholesky solve of the normal equations.
    rng = np.random.default_rng(3)
    n, lines = 24, 6
    shift = np.stack([sign * (_folding_line(n)[None, :] + rng.normal(0.0, 0.3, (lines, 1))) for sign in (1, -1)])
    images = rng.random((2, lines, n))
    ours = kernels.restore_lines(images, shift, 3e-3, 0.1)
    assert np.allclose(ours, kernels.restore_lines_reference(images, shift, 3e-3, 0.1), atol=1e-10)
    # (M, A, N, B) volumes read in place give the same lines
    as_volume = [np.ascontiguousarray(a.reshape(2, 2, 3, n).transpose(0, 1, 3, 2)) for a in (images, shift)]
    volume = kernels.restore_lines(*as_volume, 3e-3, 0.1)
    assert np.allclose(volume.transpose(0, 2, 1).reshape(lines, n), ours, atol=1e-13)


def test_restoration_inverts_its_forward_model_is_linear_and_keeps_smooth_lines():
    rng = np.random.default_rng(4)
    n = 48
    y = np.arange(n)
    truth = np.exp(-((y - 22.0) / 7.0) ** 2) * (1 + 0.3 * np.cos(y / 2.0))
    output_rows = kernels.forward_matrix(np.zeros(n), 0.1)[0]
    coef = np.linalg.solve(output_rows, truth)
    shifts = np.stack([sign * 3.0 * np.sin(y / 6.0)[None, :] for sign in (1, -1)])  # Jacobians 0.5 .. 1.5
    images = np.stack([kernels.forward_matrix(s[0], 0.1)[0] @ coef for s in shifts])[:, None, :]
    restored = kernels.restore_lines(images, shifts, 3e-3, 0.1)[0]
    assert np.abs(restored - truth).max() < 2e-3
    # scale-free: the result is linear in the images, whatever the penalty
    noisy = images + rng.normal(0.0, 0.05, images.shape)
    for penalty in (1e-4, 3e-3, 0.1):
        once = kernels.restore_lines(noisy, shifts, penalty, 0.1)
        assert np.allclose(kernels.restore_lines(250.0 * noisy, shifts, penalty, 0.1), 250.0 * once, rtol=1e-10)
    # no field: a smooth line comes back unchanged
    still = np.stack([truth, truth])[:, None, :]
    assert np.abs(kernels.restore_lines(still, np.zeros_like(still), 3e-3, 0.1)[0] - truth).max() < 1e-4


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
