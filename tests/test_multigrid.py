"""Tests of the multigrid harmonic extension (fieldfix._multigrid and its numba kernels).

External references: scipy.sparse.linalg.spsolve on the same discrete Laplace problem
(built independently here with scipy.sparse); harmonic functions (analytic) whose 7-point
discrete Laplacian vanishes exactly (x^2 - y^2 and linear terms).
"""

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from fieldfix import _multigrid as mg
from fieldfix import _multigrid_kernels as K
from fieldfix.fieldmap import extend_harmonic

COEF = (0.25, 1.0 / 9.0, 1.0 / 2.25)  # 2 mm, 3 mm, 1.5 mm voxels


def _pad(a, value=0):
    return np.ascontiguousarray(np.pad(a, 1, constant_values=value))


@pytest.fixture(scope="module")
def case():
    rng = np.random.default_rng(0)
    shape = (9, 8, 7)
    unknown = rng.random(shape) > 0.3
    x = np.where(unknown, rng.standard_normal(shape), 0.0)
    b = np.where(unknown, rng.standard_normal(shape), 0.0)
    return unknown, x, b


def test_operator_and_residual_kernels_match_reference(case):
    unknown, x, b = case
    out = np.empty(_pad(x).shape)
    K.apply_nb(_pad(x), _pad(unknown, False), *COEF, out)
    reference = K.apply_reference(x, unknown, COEF)
    np.testing.assert_allclose(out[1:-1, 1:-1, 1:-1], reference, atol=1e-12)
    K.residual_nb(_pad(x), _pad(b), _pad(unknown, False), *COEF, out)
    np.testing.assert_allclose(out[1:-1, 1:-1, 1:-1], np.where(unknown, b - reference, 0.0), atol=1e-12)


@pytest.mark.parametrize("parity", [0, 1])
def test_gauss_seidel_kernel_matches_reference(case, parity):
    unknown, x, b = case
    padded = _pad(x)
    K.gauss_seidel_nb(padded, _pad(b), _pad(unknown, False), *COEF, parity)
    np.testing.assert_allclose(padded[1:-1, 1:-1, 1:-1], K.gauss_seidel_reference(x, b, unknown, COEF, parity),
                               atol=1e-12)


def test_restriction_is_the_transpose_of_prolongation(case):
    unknown, x, _ = case
    coarse_unknown = mg._coarser(unknown)
    rng = np.random.default_rng(1)
    e = rng.standard_normal(coarse_unknown.shape)
    fine = np.zeros(x.shape)
    padded = _pad(fine)
    K.prolong_add_nb(_pad(e), _pad(coarse_unknown, False), padded, 1.5)
    np.testing.assert_allclose(padded[1:-1, 1:-1, 1:-1], K.prolong_add_reference(e, coarse_unknown, fine, 1.5))
    rc = np.empty(_pad(e).shape)
    K.restrict_nb(_pad(x), _pad(coarse_unknown, False), rc)
    np.testing.assert_allclose(rc[1:-1, 1:-1, 1:-1], K.restrict_reference(x, coarse_unknown), atol=1e-12)
    # <P e, x> == <e, P^T x>
    assert np.vdot(K.prolong_add_reference(e, coarse_unknown, fine), x) == pytest.approx(
        np.vdot(e, K.restrict_reference(x, coarse_unknown)))


def test_v_cycle_is_symmetric_and_positive():
    # conjugate gradients needs a symmetric positive definite preconditioner
    rng = np.random.default_rng(2)
    shape = (40, 36, 30)
    grid = np.indices(shape)
    known = ((grid - np.array(shape)[:, None, None, None] / 2) ** 2 / 60.0).sum(axis=0) < 1.0
    levels = mg.hierarchy(~known, COEF)
    assert len(levels) >= 3
    u = _pad(rng.standard_normal(shape) * ~known).astype(np.float32)
    v = _pad(rng.standard_normal(shape) * ~known).astype(np.float32)
    mu, mv = mg.v_cycle(levels, u), mg.v_cycle(levels, v)
    assert float(np.vdot(v.astype(float), mu)) == pytest.approx(float(np.vdot(u.astype(float), mv)), rel=1e-4)
    assert float(np.vdot(u.astype(float), mu)) > 0


def _sparse_reference(values, known, coef):
    """The same problem assembled with scipy.sparse and solved directly."""
    shape = known.shape
    index = np.arange(known.size).reshape(shape)
    rows, cols, data = [], [], []
    diag = np.zeros(known.size)
    for axis in range(3):
        lo = [slice(None)] * 3
        hi = [slice(None)] * 3
        lo[axis], hi[axis] = slice(0, -1), slice(1, None)
        a, b = index[tuple(lo)].ravel(), index[tuple(hi)].ravel()
        np.add.at(diag, a, coef[axis])
        np.add.at(diag, b, coef[axis])
        rows += [a, b]
        cols += [b, a]
        data += [np.full(a.size, -coef[axis])] * 2
    lap = sp.csr_matrix((np.concatenate(data), (np.concatenate(rows), np.concatenate(cols))),
                        shape=(known.size,) * 2) + sp.diags(diag)
    unknown = ~known.ravel()
    f = np.where(known, values, 0.0).ravel()
    rhs = -(lap[unknown][:, ~unknown] @ f[~unknown])
    out = f.copy()
    out[unknown] = spla.spsolve(lap[unknown][:, unknown].tocsc(), rhs)
    return out.reshape(shape)


def test_extension_equals_a_direct_sparse_solve():
    rng = np.random.default_rng(3)
    shape = (22, 20, 17)
    grid = np.indices(shape).astype(float)
    r2 = ((grid[0] - 10) / 6) ** 2 + ((grid[1] - 9) / 5) ** 2 + ((grid[2] - 8) / 4) ** 2
    mask = r2 < 1
    field = 30 * np.sin(grid[0] / 4) + 5 * grid[1] + rng.normal(0, 1, shape)
    vs = (2.0, 3.0, 1.5)
    reference = _sparse_reference(field, mask, tuple(1 / np.array(vs) ** 2))
    ours = extend_harmonic(np.where(mask, field, 0.0), mask, voxel_size_mm=vs, rtol=1e-10)
    np.testing.assert_allclose(ours, reference, atol=1e-6 * np.abs(reference).max())


def test_harmonic_field_is_reproduced_exactly_outside_the_mask():
    # mask = an inner object plus the outer shell of the grid: a Dirichlet problem in
    # between, whose solution for a discrete-harmonic field is that field itself
    vs = (1.2, 1.2, 1.5)
    shape = (40, 44, 30)
    g = np.indices(shape).astype(float) * np.array(vs)[:, None, None, None]
    f = (g[0] - 20) ** 2 - (g[1] - 25) ** 2 + 4.0 * g[2] - 2.0 * g[0]
    r2 = ((g[0] - 24) / 10) ** 2 + ((g[1] - 26) / 12) ** 2 + ((g[2] - 22) / 9) ** 2
    mask = r2 < 1
    shell = np.ones(shape, bool)
    shell[1:-1, 1:-1, 1:-1] = False
    known = mask | shell
    out = extend_harmonic(np.where(known, f, 0.0), known, voxel_size_mm=vs, rtol=1e-10)
    assert np.abs(out - f)[~known].max() < 1e-7 * np.abs(f).max()
    # a linear field along an axis with zero normal derivative through the other walls:
    # f = 3 z between known end planes z = 0 and z = last, Neumann walls in x and y
    lin = 3.0 * g[2]
    ends = np.zeros(shape, bool)
    ends[..., 0] = ends[..., -1] = True
    out = extend_harmonic(np.where(ends | mask, lin, 0.0), ends | mask, voxel_size_mm=vs, rtol=1e-10)
    assert np.abs(out - lin).max() < 1e-7 * np.abs(lin).max()


def test_single_precision_iterations_agree_with_double():
    # Outside reference: an analytic harmonic function, x^2 - y^2 + 3z, known outside a ball
    # and recovered inside it; float32 vectors (rtol >= SINGLE_PRECISION_RTOL) reach the
    # same accuracy in the same number of iterations as float64 at that tolerance.
    from fieldfix._multigrid import SINGLE_PRECISION_RTOL, harmonic_fill

    z, y, x = np.mgrid[:24, :24, :24].astype(float)
    f = x**2 - y**2 + 3 * z
    hole = (x - 11.5) ** 2 + (y - 12) ** 2 + (z - 12.5) ** 2 < 49
    single, n_single = harmonic_fill(np.where(hole, 0.0, f), ~hole, (1.0, 1.0, 1.0),
                                     rtol=SINGLE_PRECISION_RTOL, maxiter=100)
    double, n_double = harmonic_fill(np.where(hole, 0.0, f), ~hole, (1.0, 1.0, 1.0),
                                     rtol=0.999 * SINGLE_PRECISION_RTOL, maxiter=100)
    assert single.dtype == np.float64 and abs(n_single - n_double) <= 1
    assert np.abs(single - f)[hole].max() < 1e-2 * np.abs(f).max()
    assert np.abs(single - double).max() < 1e-3 * np.abs(f).max()
    assert np.array_equal(single[~hole], f[~hole])


def test_conjugate_gradient_vector_kernels_match_reference():
    rng = np.random.default_rng(12)
    x, r, p, ap = (rng.standard_normal(1000).astype(np.float32) for _ in range(4))
    assert K.dot_nb(p, ap) == pytest.approx(K.dot_reference(p, ap), rel=1e-12)
    want_x, want_r, want_rr = K.cg_step_reference(x, r, p, ap, 0.37)
    rr = K.cg_step_nb(x, r, p, ap, np.float32(0.37))
    np.testing.assert_allclose(x, want_x, rtol=1e-6)
    np.testing.assert_allclose(r, want_r, rtol=1e-6, atol=1e-6)
    assert rr == pytest.approx(want_rr, rel=1e-6)
