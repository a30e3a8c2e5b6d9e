"""Tests of fieldfix.unwrap and its numba kernels.

External references: skimage.restoration.unwrap_phase (Herraez et al. 2002, Applied Optics,
and Abdul-Rahman et al. 2007, Applied Optics, implemented independently in scikit-image);
analytic phase maps whose unwrapped form is known.
"""

import numpy as np
import pytest
from skimage.restoration import unwrap_phase

from fieldfix import _unwrap_kernels as K
from fieldfix.phase import phase_difference
from fieldfix.simulate.gradient_echo import head_field_hz, simulate_gradient_echo
from fieldfix.unwrap import unwrap, unwrap_laplacian, unwrap_quality, wrap_phase

TWO_PI = 2 * np.pi


def _quadratic_phase(shape=(40, 40, 24), scale=1.0):
    a0, a1, a2 = np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij")
    c = [(n - 1) / 2 for n in shape]
    truth = scale * ((a0 - c[0]) ** 2 / 40 + (a1 - c[1]) ** 2 / 60 - (a2 - c[2]) ** 2 / 50 + 0.2 * a1) - 3.0
    mask = ((a0 - c[0]) / (0.45 * shape[0])) ** 2 + ((a1 - c[1]) / (0.45 * shape[1])) ** 2 \
        + ((a2 - c[2]) / (0.45 * shape[2])) ** 2 < 1
    return truth, mask


def _global_multiple_only(diff_rad, mask):
    """True when diff is one and the same multiple of 2*pi over the whole mask."""
    k = diff_rad[mask] / TWO_PI
    return bool(np.allclose(k, np.round(k), atol=1e-6) and np.unique(np.round(k)).size == 1)


# ---------------------------------------------------------------------------------------------
# kernels against their plain references
# ---------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def small_case():
    rng = np.random.default_rng(3)
    truth, _ = _quadratic_phase((12, 10, 9), scale=3.0)
    phase = wrap_phase(truth + 0.4 * rng.standard_normal(truth.shape))
    mask = rng.random(truth.shape) > 0.15
    return phase, mask


def test_second_difference_kernel_matches_reference(small_case):
    phase, mask = small_case
    nb = K.second_difference_nb(phase, mask, K.DIRECTIONS)
    ref = K.second_difference_reference(phase, mask)
    assert np.array_equal(np.isinf(nb), np.isinf(ref))
    fin = np.isfinite(ref)
    np.testing.assert_allclose(nb[fin], ref[fin], rtol=1e-12, atol=1e-12)


def test_compact_second_difference_matches_reference(small_case):
    phase, mask = small_case
    ids, n = K.voxel_ids_nb(mask)
    rids, rn = K.voxel_ids_reference(mask)
    assert n == rn and np.array_equal(ids, rids)
    nb = K.second_difference_compact_nb(phase, mask, ids, n, K.DIRECTIONS)
    ref = K.second_difference_reference(phase, mask)[mask]
    assert np.array_equal(np.isinf(nb), np.isinf(ref))
    np.testing.assert_allclose(nb[np.isfinite(ref)], ref[np.isfinite(ref)], rtol=1e-12)


def test_sorted_edges_kernel_matches_reference(small_case):
    phase, mask = small_case
    d = K.second_difference_reference(phase, mask)
    ids, n = K.voxel_ids_reference(mask)
    first, second, step = K.unpack_edges(K.sorted_edges_nb(phase, mask, ids.astype(np.int32), d[mask], K.N_KEYS))
    rfirst, rsecond, rstep = K.unpack_edges(K.sorted_edges_reference(phase, mask, d))
    assert set(np.unique(step).tolist()) == {-1, 0, 1}
    assert first.size == rfirst.size
    # the same edges with the same steps; keys may differ only where float rounding
    # straddles a bin edge, which moves an edge among its neighbours in the order
    assert np.mean((first == rfirst) & (second == rsecond)) > 0.95
    got = {(int(x), int(y)): int(z) for x, y, z in zip(first, second, step)}
    want = {(int(x), int(y)): int(z) for x, y, z in zip(rfirst, rsecond, rstep)}
    assert got == want


def test_prepare_kernel_matches_reference():
    rng = np.random.default_rng(1)
    p = rng.uniform(-20, 20, (6, 7, 8))
    p[0, 0, 0] = np.nan
    m = rng.random(p.shape) > 0.3
    for keep in (False, True):
        out, mm = K.prepare_nb(p, m, keep)
        rout, rmm = K.prepare_reference(p, m, keep)
        assert np.array_equal(mm, rmm)
        np.testing.assert_allclose(out, rout, atol=1e-12)
    assert np.isnan(out[0, 0, 0])


def test_merge_kernel_matches_herraez_group_lists(small_case):
    phase, mask = small_case
    d = K.second_difference_reference(phase, mask)
    edges = K.sorted_edges_reference(phase, mask, d)
    n = int(mask.sum())
    k_nb, roots_nb = K.merge_nb(edges, n)
    k_ref, groups_ref = K.merge_reference(*K.unpack_edges(edges), n)
    # same partition into groups
    pairs = {(int(r), int(g)) for r, g in zip(roots_nb, groups_ref)}
    assert len(pairs) == len(set(roots_nb.tolist())) == len(set(groups_ref.tolist()))
    # within each group the multiples agree up to one constant
    for root in np.unique(roots_nb):
        members = roots_nb == root
        diff = k_nb[members] - k_ref[members]
        assert np.unique(diff).size == 1


def test_one_call_kernel_matches_the_plain_pipeline(small_case):
    phase, mask = small_case
    wrapped, inside, multiple, n_regions = K.unwrap_quality_nb(phase, mask, K.DIRECTIONS, K.N_KEYS)
    rw, rin = K.prepare_reference(phase, mask, True)
    np.testing.assert_allclose(wrapped, rw, atol=1e-12)
    d = K.second_difference_reference(rw, rin)
    k_ref, groups = K.merge_reference(*K.unpack_edges(K.sorted_edges_reference(rw, rin, d)), int(rin.sum()))
    assert n_regions == np.unique(groups).size
    # unwrapped differences agree within each group
    got = multiple[rin]
    for g in np.unique(groups):
        assert np.unique(got[groups == g] - k_ref[groups == g]).size == 1
    assert np.all(multiple[~rin] == 0)


def test_apply_multiple_kernel_matches_reference(small_case):
    phase, mask = small_case
    k = np.random.default_rng(5).integers(-3, 4, phase.shape).astype(np.int32)
    ref_phase, ref_k, ref_n = K.apply_multiple_reference(phase, mask, k, 2)
    got_phase, got_k = phase.copy(), k.copy()
    n = K.apply_multiple_nb(got_phase, mask, got_k, 2)
    assert n == ref_n
    assert np.array_equal(got_k, ref_k)
    np.testing.assert_allclose(got_phase, ref_phase, atol=1e-12)


# ---------------------------------------------------------------------------------------------
# accuracy
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("method", [unwrap_quality, unwrap_laplacian], ids=["quality", "laplacian"])
def test_clean_phase_equals_skimage_up_to_global_multiple(method):
    truth, mask = _quadratic_phase()
    wrapped = wrap_phase(truth)
    res = method(wrapped, mask)
    ref = unwrap_phase(np.ma.array(wrapped, mask=~mask)).data
    assert _global_multiple_only(res.phase - ref, mask)
    assert _global_multiple_only(res.phase - truth, mask)
    if method is unwrap_quality:  # whole box, no mask
        ours_all = unwrap_quality(wrapped)
        assert _global_multiple_only(ours_all.phase - unwrap_phase(wrapped), np.ones(mask.shape, bool))
    # congruent: differs from the input by whole multiples of 2*pi
    k = (res.phase - wrapped) / TWO_PI
    np.testing.assert_allclose(k, np.round(k), atol=1e-9)


def test_global_offset_rule_and_changed_count():
    truth, mask = _quadratic_phase()
    truth = truth - np.median(truth[mask])  # the rule puts the median in [-pi, pi)
    wrapped = wrap_phase(truth)
    res = unwrap(wrapped, mask)
    np.testing.assert_allclose(res.phase[mask], truth[mask], atol=1e-9)
    assert res.n_changed == int(np.count_nonzero(np.round((truth - wrapped) / TWO_PI)[mask]))
    assert res.n_changed > 0 and res.n_regions == 1
    np.testing.assert_array_equal(res.phase[~mask], wrapped[~mask])


def _count_2pi_errors(unwrapped, target, mask):
    k = np.round((unwrapped - target) / TWO_PI)[mask]
    values, counts = np.unique(k, return_counts=True)
    return int(np.count_nonzero(k != values[np.argmax(counts)]))


def test_noisy_quality_no_worse_than_skimage():
    # SNR 5 to 10; the correct unwrap of each noisy phase is truth + wrap(noisy - truth)
    shape, tes = (48, 48, 32), (5e-3, 15e-3)
    field = head_field_hz(shape, amplitude_hz=500.0)
    ours_total = sk_total = 0
    for snr, seed in [(5, 0), (5, 1), (7, 2), (10, 3)]:
        d = simulate_gradient_echo(field, tes, snr=snr, rng=seed)
        dphi, _ = phase_difference(d.echoes[0], d.echoes[1])
        true_dphi = TWO_PI * d.b0_hz * (tes[1] - tes[0])
        target = true_dphi + wrap_phase(dphi - true_dphi)
        m = d.object_mask
        ours_total += _count_2pi_errors(unwrap_quality(dphi, m).phase, target, m)
        sk = unwrap_phase(np.ma.array(dphi, mask=~m)).data
        sk_total += _count_2pi_errors(sk, target, m)
    assert ours_total <= sk_total


def test_disconnected_regions_get_consistent_offsets():
    # two separate blobs on one smooth ramp: the linear-fit rule must place the second
    a0, a1, a2 = np.mgrid[:24, :40, :16].astype(float)
    truth = 0.9 * a1 + 0.3 * a0 - 12.0
    blob1 = (a0 - 12) ** 2 + (a1 - 9) ** 2 + (a2 - 8) ** 2 < 36
    blob2 = (a0 - 12) ** 2 + (a1 - 31) ** 2 + (a2 - 8) ** 2 < 25
    mask = blob1 | blob2
    res = unwrap_quality(wrap_phase(truth), mask)
    assert res.n_regions == 2
    assert _global_multiple_only(res.phase - truth, mask)
    lap = unwrap_laplacian(wrap_phase(truth), mask)
    assert lap.n_regions == 2
    assert _global_multiple_only(lap.phase - truth, mask)


def test_two_dimensional_input():
    a0, a1 = np.mgrid[:50, :60].astype(float)
    truth = 0.02 * (a0 - 25) ** 2 + 0.3 * a1
    res = unwrap_quality(wrap_phase(truth))
    assert res.phase.shape == truth.shape
    assert _global_multiple_only(res.phase - unwrap_phase(wrap_phase(truth)), np.ones(truth.shape, bool))


def test_bad_method_and_shape():
    with pytest.raises(ValueError):
        unwrap(np.zeros((4, 4, 4)), method="magic")
    with pytest.raises(ValueError):
        unwrap_quality(np.zeros(5))
