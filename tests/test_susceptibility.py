"""Tests of fieldfix.susceptibility against analytic fields, a reference library and trade facts."""

import numpy as np
import pytest

from fieldfix import susceptibility as sus

GAMMA = sus.GAMMA_HZ_PER_T


def _fraction_inside(inside, shape, center, n_sub=5):
    """Partial-volume fraction of each voxel inside a shape given by ``inside(x, y, z)``."""
    offs = (np.arange(n_sub) + 0.5) / n_sub - 0.5
    idx = [np.arange(s, dtype=float) - c for s, c in zip(shape, center)]
    x, y, z = np.meshgrid(*idx, indexing="ij")
    acc = np.zeros(shape)
    for ox in offs:
        for oy in offs:
            for oz in offs:
                acc += inside(x + ox, y + oy, z + oz)
    return acc / n_sub**3


def test_gamma_matches_codata():
    # Proton gyromagnetic ratio / 2 pi = 42.577 MHz/T (CODATA, fact of the trade).
    assert GAMMA == pytest.approx(42.577478e6, rel=1e-6)


@pytest.mark.parametrize("b0_dir", [(0, 0, 1), (0.5, 0.0, 1.0)])
def test_sphere_matches_analytic(b0_dir):
    # Sphere in a uniform field, Lorentz-corrected: outside dchi/3 * B0 * (a/r)^3 * (3cos^2 th - 1),
    # inside 0 (Marques and Bowtell 2005, Concepts in Magnetic Resonance B 25:65; also Schenck 1996,
    # Medical Physics 23:815, for the outside dipole field).
    n, a, dchi, field_t, vox = 64, 10.0, 5.0, 3.0, 1.5
    c = (n - 1) / 2
    frac = _fraction_inside(lambda x, y, z: x * x + y * y + z * z <= a * a, (n, n, n), (c, c, c))
    chi = dchi * frac
    got = sus.field_from_susceptibility(chi, vox, field_t=field_t, b0_direction=b0_dir)
    b = np.asarray(b0_dir, float) / np.linalg.norm(b0_dir)
    idx = np.indices((n, n, n)).astype(float) - c
    r = np.sqrt((idx**2).sum(0))
    cos_t = np.tensordot(b, idx, axes=1) / np.maximum(r, 1e-9)
    scale = dchi * 1e-6 * GAMMA * field_t
    expect = np.where(r > a, scale / 3 * (a / np.maximum(r, 1e-9)) ** 3 * (3 * cos_t**2 - 1), 0.0)
    peak = 2 * scale / 3
    away = np.abs(r - a) > 2.0
    err = np.abs(got - expect)[away]
    assert err.max() < 0.02 * peak
    # and inside really is ~0, outside really reaches the analytic peak at the poles
    assert np.abs(got[r < a - 2]).max() < 0.02 * peak
    assert got[away & (r > a)].max() > 0.4 * peak


@pytest.mark.parametrize("alpha_deg", [0.0, 35.0, 90.0])
def test_infinite_cylinder_matches_analytic(alpha_deg):
    # Infinite cylinder at angle alpha to B0, Lorentz-corrected (e.g. Chu, Xu, Balschi and
    # Springer 1990, Magnetic Resonance in Medicine 13:239; Yablonskiy and Haacke 1994, MRM 32:749):
    #   inside  dchi/6 * B0 * (3cos^2 alpha - 1)
    #   outside dchi/2 * B0 * sin^2 alpha * (a/rho)^2 * cos(2 phi)
    # The cylinder runs along grid axis 2 through a periodic box (no padding along it); B0 is tilted
    # in the axis0-axis2 plane, phi is measured from axis 0.
    n, nz, a, dchi, field_t = 64, 4, 8.0, -9.4, 7.0
    alpha = np.deg2rad(alpha_deg)
    b = (np.sin(alpha), 0.0, np.cos(alpha))
    c = (n - 1) / 2
    frac = _fraction_inside(lambda x, y, z: x * x + y * y <= a * a, (n, n, nz), (c, c, 0))
    got = sus.field_from_susceptibility(
        dchi * frac, 2.0, field_t=field_t, b0_direction=b, padding=(64, 64, 0)
    )
    scale = dchi * 1e-6 * GAMMA * field_t
    x, y = np.meshgrid(np.arange(n) - c, np.arange(n) - c, indexing="ij")
    rho = np.hypot(x, y)
    phi = np.arctan2(y, x)
    inside_val = scale / 6 * (3 * np.cos(alpha) ** 2 - 1)
    outside = scale / 2 * np.sin(alpha) ** 2 * (a / np.maximum(rho, 1e-9)) ** 2 * np.cos(2 * phi)
    expect = np.where(rho < a, inside_val, outside)
    # Our k=0 convention gives zero mean over the periodic (padded) cell; the analytic field has mean
    # inside_val * (area fraction), the outside term averaging to zero over a square cell.
    expect = expect - inside_val * np.pi * a * a / (128 * 128)
    peak = abs(scale) / 2
    away = np.abs(rho - a) > 2.0
    for k in range(nz):
        assert np.abs(got[:, :, k] - expect)[away].max() < 0.02 * peak


def test_kernel_handles_anisotropic_and_oblique_grids():
    # The same physical sphere sampled on an anisotropic grid (1 x 1 x 2 mm) and on a grid rotated by
    # 30 degrees in its affine must give the same field at matching world points.
    a = 9.0  # mm
    # isotropic reference, 1 mm
    n = 48
    c = (n - 1) / 2
    frac = _fraction_inside(lambda x, y, z: x * x + y * y + z * z <= a * a, (n, n, n), (c, c, c))
    iso = sus.field_from_susceptibility(frac, 1.0, field_t=3.0)
    # anisotropic: 2 mm along axis 2
    nz = 24
    cz = (nz - 1) / 2
    frac_an = _fraction_inside(
        lambda x, y, z: x * x + y * y + (2 * z) ** 2 <= a * a, (n, n, nz), (c, c, cz), n_sub=6
    )
    an = sus.field_from_susceptibility(frac_an, (1.0, 1.0, 2.0), field_t=3.0)
    # world point (0, 0, 14 mm) on the B0 axis: iso index c + 14 (c is half-integer -> average)
    iso_line = iso[int(c), int(c), :]
    an_line = an[int(c), int(c), :]
    z_iso = np.arange(n) - c
    z_an = (np.arange(nz) - cz) * 2.0
    sel = np.abs(z_an) > a + 3
    interp = np.interp(z_an[sel], z_iso, iso_line)
    peak = 2 / 3 * 1e-6 * GAMMA * 3.0
    assert np.abs(interp - an_line[sel]).max() < 0.03 * peak
    # oblique: rotating both the affine and B0 by the same rotation leaves a sphere's field unchanged
    th = np.deg2rad(30)
    rot = np.array([[np.cos(th), -np.sin(th), 0], [np.sin(th), np.cos(th), 0], [0, 0, 1]])
    b_world = rot @ np.array([1.0, 0.0, 0.0])
    obl = sus.field_from_susceptibility(frac, rot, field_t=3.0, b0_direction=b_world)
    straight = sus.field_from_susceptibility(frac, np.eye(3), field_t=3.0, b0_direction=(1, 0, 0))
    np.testing.assert_allclose(obl, straight, atol=1e-6 * peak * 1e3)


def test_kernel_matches_direct_formula():
    # Compare the rfft-grid kernel against a direct evaluation on a full fftfreq grid (numpy); odd
    # axes, so that no Nyquist bin with an ambiguous sign occurs.
    shape = (7, 9, 11)
    vox = (1.0, 2.0, 0.5)
    b = np.array([0.3, -0.4, 0.8])
    b = b / np.linalg.norm(b)
    kern = sus.dipole_kernel(shape, vox, b, oversample=1)
    fx, fy, fz = np.meshgrid(*[np.fft.fftfreq(s, d) for s, d in zip(shape, vox)], indexing="ij")
    kb = fx * b[0] + fy * b[1] + fz * b[2]
    k2 = fx**2 + fy**2 + fz**2
    with np.errstate(invalid="ignore"):
        direct = np.where(k2 > 0, 1 / 3 - kb**2 / k2, 0.0)
    np.testing.assert_allclose(kern, direct[:, :, : shape[2] // 2 + 1], atol=1e-12)


def test_oversampled_kernel_equals_explicit_upsampling():
    # The folded kernel (oversample=2) must equal the plain numpy route it stands for: repeat every
    # voxel twice per axis, apply the continuous kernel on the fine grid, average 2x2x2 blocks back.
    rng = np.random.default_rng(0)
    chi = rng.normal(size=(10, 12, 8))
    b = (0.3, 0.5, 0.8)
    vox = (1.0, 1.2, 2.0)
    folded = sus.field_from_susceptibility(chi, vox, field_t=1.0, b0_direction=b, oversample=2,
                                           padding=0, reference_ppm=0.0)
    fine = np.repeat(np.repeat(np.repeat(chi, 2, 0), 2, 1), 2, 2)
    explicit = sus.field_from_susceptibility(
        fine, np.asarray(vox) / 2, field_t=1.0, b0_direction=b, oversample=1, padding=0,
        reference_ppm=0.0,
    )
    explicit = explicit.reshape(10, 2, 12, 2, 8, 2).mean(axis=(1, 3, 5))
    np.testing.assert_allclose(folded, explicit, atol=1e-4 * np.abs(explicit).max())


def test_pitch_direction():
    # Pitch tilts B0 away from the head's superior axis by exactly the pitch angle.
    for p in (0.0, 12.0, 30.0):
        b = sus.b0_direction_from_pitch(p)
        assert np.degrees(np.arccos(b[2])) == pytest.approx(p)
        assert b[0] == pytest.approx(0.0)
        assert b[1] <= 0  # top of head towards anterior -> B0 points posterior in head axes
    b = sus.b0_direction_from_pitch(0.0, 20.0)
    assert np.degrees(np.arccos(b[2])) == pytest.approx(20.0)
    assert b[1] == pytest.approx(0.0)


def test_shim_removes_pure_second_order_field_exactly():
    rng = np.random.default_rng(3)
    shape = (20, 22, 18)
    aff = np.diag([2.0, 2.0, 2.5, 1.0])
    aff[:3, 3] = (-20, -22, -20)
    mask = np.zeros(shape, bool)
    mask[3:17, 4:19, 2:15] = True
    idx = np.indices(shape).reshape(3, -1).T.astype(float)
    world = idx @ aff[:3, :3].T + aff[:3, 3]
    # arbitrary origin: a 2nd-order polynomial stays 2nd order whatever the centre
    basis = sus.shim_basis((world - np.array([5.0, -3.0, 7.0])) / 50.0, 2)
    field = (basis @ rng.normal(0, 50, 9)).reshape(shape)
    shimmed, coef = sus.shim_field(field, mask, aff, order=2)
    assert np.abs(shimmed).max() < 1e-3 * np.abs(field).max()
    # 1st-order shim cannot remove it, and leaves the 2nd-order part
    shimmed1, _ = sus.shim_field(field, mask, aff, order=1)
    assert np.abs(shimmed1[mask]).max() > 0.05 * np.abs(field).max()


def test_shim_matches_scipy_lstsq_and_leaves_higher_orders():
    # Against scipy.linalg.lstsq with the same basis; a 3rd-order term (x^3) is only partly removed.
    import scipy.linalg

    shape = (12, 12, 12)
    mask = np.ones(shape, bool)
    x = np.indices(shape)[0].astype(float) - 5.5
    field = x**3
    shimmed, coef = sus.shim_field(field, mask, order=2)
    world = np.indices(shape).reshape(3, -1).T.astype(float)
    b = sus.shim_basis((world - world.mean(0)) / 100.0, 2)
    ref, *_ = scipy.linalg.lstsq(b, field.ravel())
    np.testing.assert_allclose(coef, ref, rtol=1e-6, atol=1e-6)
    assert np.abs(shimmed).max() > 1.0


def test_labels_to_susceptibility():
    lab = np.array([[0, 1], [2, 1]])
    chi = sus.susceptibility_from_labels(lab, {0: 0.36, 1: -9.05, 2: -8.86})
    assert chi.tolist() == [[0.36, -9.05], [-8.86, -9.05]]
    with pytest.raises(ValueError, match="without a susceptibility"):
        sus.susceptibility_from_labels(lab, {0: 0.36, 1: -9.05})
    with pytest.raises(ValueError):
        sus.susceptibility_from_labels(np.array([0.5]), {0: 1.0})


@pytest.fixture(scope="module")
def head7t():
    hm = sus.head_model((64, 64, 64), 4.0)
    raw = sus.field_from_susceptibility(hm.chi_ppm, hm.affine, field_t=7.0)
    shimmed, _ = sus.shim_field(raw, hm.brain_mask, hm.affine, order=2)
    return hm, shimmed


def _world_to_index(aff, xyz):
    return tuple(np.round(np.linalg.solve(aff[:3, :3], np.asarray(xyz, float) - aff[:3, 3])).astype(int))


def test_head_model_anatomy(head7t):
    hm, _ = head7t
    L = sus.HEAD_LABELS
    present = set(np.unique(hm.labels).tolist())
    for name in ("scalp", "skull", "brain", "frontal_sinus", "sphenoid_sinus", "ethmoid_cells",
                 "ear_canal", "mastoid_cells"):
        assert L[name] in present, name
    brain_ml = hm.brain_mask.sum() * 64 / 1000
    assert 1000 < brain_ml < 1700  # adult brain volume 1.1-1.5 L (fact of the trade)
    # air cavities lie below the brain
    zc = np.indices(hm.labels.shape)[2]
    brain_z = zc[hm.brain_mask].min()
    for name in ("sphenoid_sinus", "ear_canal", "mastoid_cells", "ethmoid_cells"):
        assert zc[hm.labels == L[name]].max() <= brain_z + 1, name


def test_head_field_largest_next_to_cavities_with_dipole_signs(head7t):
    hm, f = head7t
    L = sus.HEAD_LABELS
    from scipy import ndimage

    cav = np.isin(hm.labels, [L["frontal_sinus"], L["sphenoid_sinus"], L["ethmoid_cells"],
                              L["ear_canal"], L["mastoid_cells"]])
    dist_mm = ndimage.distance_transform_edt(~cav) * 4.0
    brain = hm.brain_mask
    absf = np.abs(f)
    # the strongest offsets in the brain sit within 2 cm of a cavity
    top = absf[brain] >= np.percentile(absf[brain], 99.5)
    assert np.median(dist_mm[brain][top]) < 20.0
    near = brain & (dist_mm < 15)
    far = brain & (dist_mm > 50)
    assert absf[near].mean() > 5 * absf[far].mean()
    # hundreds of Hz at 7 T near the cavities (reported for human heads at 7 T)
    assert absf[near].max() > 200.0
    # sign pattern: air (chi above tissue) gives a positive offset above a cavity (along B0) and a
    # negative one beside it, like a positive dipole.  Sphenoid sinus centre (0, 24, -48) mm,
    # semi-axes (13, 12, 10): check brain right above and soft tissue at the side.
    above = _world_to_index(hm.affine, (0, 24, -48 + 10 + 8))
    side = _world_to_index(hm.affine, (13 + 6, 24, -48))
    assert f[above] > 50.0
    assert f[side] < -20.0


def test_field_scales_with_field_strength_and_pitch_changes_it():
    hm = sus.head_model((40, 48, 48), 5.0)
    f3 = sus.field_from_susceptibility(hm.chi_ppm, hm.affine, field_t=3.0)
    f7 = sus.field_from_susceptibility(hm.chi_ppm, hm.affine, field_t=7.0)
    np.testing.assert_allclose(f7, f3 * 7 / 3, rtol=1e-4, atol=1e-3)
    fp = sus.field_from_susceptibility(
        hm.chi_ppm, hm.affine, field_t=3.0, b0_direction=sus.b0_direction_from_pitch(20)
    )
    assert np.abs(fp - f3)[hm.brain_mask].max() > 10.0
