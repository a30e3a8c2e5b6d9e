"""Tests of fieldfix.fieldmap, fieldfix.workflows.fieldmap and the ``fieldfix fieldmap`` command.

External references: the field follows from the phase gained between two echo times,
b0 = dphi / (2 pi dTE), unaliased within +-1/(2 dTE) (common practice, no source); the proton
gyromagnetic ratio from scipy.constants (CODATA); harmonic functions (analytic) for the
extension; scipy.ndimage.gaussian_filter for the smoothing; the simulator's known field.
"""

import numpy as np
import pytest
import scipy.constants
import scipy.ndimage as ndi

from fieldfix.errors import UnitError
from fieldfix.fieldmap import (
    b0_from_echoes,
    b0_from_map,
    b0_from_phase_difference,
    extend_harmonic,
    field_to_hz,
    find_outliers,
    hz_to_units,
    smooth_masked,
    unaliased_range_hz,
)
from fieldfix.phase import phase_difference
from fieldfix.simulate.gradient_echo import head_field_hz, simulate_gradient_echo

TWO_PI = 2 * np.pi
SHAPE = (48, 48, 32)
VOXEL_MM = (3.0, 3.0, 3.0)


def test_snr30_several_wraps_rms_under_1hz_and_no_2pi_errors():
    # echo spacing 10 ms: unaliased range +-50 Hz; the field spans about 2.5 cycles
    tes = (5e-3, 15e-3)
    d = simulate_gradient_echo(head_field_hz(SHAPE, amplitude_hz=250.0), tes, snr=30.0, rng=0)
    dte = tes[1] - tes[0]
    assert np.ptp(d.b0_hz[d.object_mask]) * dte > 2.0  # several wraps
    res = b0_from_echoes(d.echoes, tes, voxel_size_mm=VOXEL_MM, smooth_fwhm_mm=4.0)  # automatic mask
    assert res.n_offset_changed > 1000
    eroded = ndi.binary_erosion(res.mask, iterations=2)
    err = (res.b0_hz - d.b0_hz)[eroded]
    assert np.sqrt(np.mean(err**2)) < 1.0
    # no voxel of the mask off by a multiple of 2 pi (i.e. of 1/dTE in Hz)
    cycles = np.round((res.raw_b0_hz - d.b0_hz)[res.mask] * dte)
    assert np.count_nonzero(cycles) == 0
    assert res.unaliased_range_hz == pytest.approx(50.0)


def test_three_echoes_unequal_spacing_recover_field_that_wraps_at_first_pair():
    tes = (2e-3, 5e-3, 6e-3)  # first pair: +-167 Hz; shortest spacing (5-6 ms): +-500 Hz
    d = simulate_gradient_echo(head_field_hz(SHAPE, amplitude_hz=450.0), tes, snr=40.0, rng=1)
    m = d.object_mask
    assert np.abs(d.b0_hz[m]).max() > unaliased_range_hz(tes[1] - tes[0])  # wraps at the first pair
    # the first pair alone (without spatial unwrapping) aliases
    dphi, _ = phase_difference(d.echoes[0], d.echoes[1])
    naive = dphi / (TWO_PI * (tes[1] - tes[0]))
    assert np.max(np.abs(naive - d.b0_hz)[m]) > 100.0
    res = b0_from_echoes(d.echoes, tes, mask=m, voxel_size_mm=VOXEL_MM)
    err = (res.raw_b0_hz - d.b0_hz)[ndi.binary_erosion(m, iterations=1)]
    assert np.max(np.abs(err)) < 15.0
    assert np.sqrt(np.mean(err**2)) < 3.0
    assert res.unaliased_range_hz == pytest.approx(500.0)
    # order of the echoes does not matter
    res2 = b0_from_echoes(d.echoes[::-1], tes[::-1], mask=m, voxel_size_mm=VOXEL_MM)
    np.testing.assert_allclose(res2.raw_b0_hz, res.raw_b0_hz, atol=1e-9)


def test_phase_difference_input_matches_echo_input():
    tes = (4.92e-3, 7.38e-3)
    d = simulate_gradient_echo(head_field_hz((32, 32, 20), amplitude_hz=300.0), tes, snr=50.0, rng=2)
    a = b0_from_echoes(d.echoes, tes, mask=d.object_mask)
    dphi, _ = phase_difference(d.echoes[0], d.echoes[1])
    b = b0_from_phase_difference(dphi, tes[1] - tes[0], magnitude=np.abs(d.echoes[0]), mask=d.object_mask)
    np.testing.assert_allclose(b.raw_b0_hz, a.raw_b0_hz, atol=1e-9)
    assert b.n_offset_changed == a.n_offset_changed


def test_laplacian_method_also_recovers_the_field():
    tes = (5e-3, 15e-3)
    d = simulate_gradient_echo(head_field_hz((32, 32, 20), amplitude_hz=150.0), tes, snr=40.0, rng=3)
    res = b0_from_echoes(d.echoes, tes, mask=d.object_mask, unwrap_method="laplacian")
    cycles = np.round((res.raw_b0_hz - d.b0_hz)[d.object_mask] * (tes[1] - tes[0]))
    assert np.count_nonzero(cycles) == 0


def test_unit_conversions_use_codata_gamma():
    gamma_hz_per_t = scipy.constants.physical_constants["proton gyromag. ratio in MHz/T"][0] * 1e6
    # 1 ppm at 3 T is gamma * 3 T * 1e-6, about 127.7 Hz (from memory: 42.58 MHz/T)
    assert hz_to_units(gamma_hz_per_t * 3e-6, "ppm", field_strength_t=3.0) == pytest.approx(1.0)
    assert field_to_hz(1.0, "ppm", field_strength_t=3.0) == pytest.approx(127.74, abs=0.01)
    assert field_to_hz(TWO_PI * 25.0, "rad/s") == pytest.approx(25.0)
    assert hz_to_units(25.0, "rad/s") == pytest.approx(TWO_PI * 25.0)
    assert field_to_hz(1e-6, "T") == pytest.approx(gamma_hz_per_t * 1e-6)
    with pytest.raises(UnitError):
        hz_to_units(1.0, "ppm")
    with pytest.raises(UnitError):
        field_to_hz(1.0, "gauss")
    assert unaliased_range_hz(2.46e-3) == pytest.approx(1 / (2 * 2.46e-3))


def test_ready_map_in_rad_per_s():
    f = head_field_hz((20, 20, 12), amplitude_hz=80.0)
    res = b0_from_map(f * TWO_PI, "rad/s", extend=False)
    np.testing.assert_allclose(res.b0_hz, f, atol=1e-9)


def test_extension_is_harmonic():
    # f = x^2 - y^2 + 3z (in mm, anisotropic voxels) is harmonic; the discrete 7-point
    # Laplacian of a quadratic is exact, so filling a hole must give f back
    vs = (2.0, 3.0, 1.5)
    a0, a1, a2 = np.mgrid[:30, :30, :24].astype(float)
    f = (a0 * vs[0]) ** 2 - (a1 * vs[1]) ** 2 + 3 * a2 * vs[2]
    hole = (a0 - 15) ** 2 + (a1 - 15) ** 2 + (a2 - 12) ** 2 < 49
    out = extend_harmonic(np.where(hole, 0.0, f), ~hole, voxel_size_mm=vs, rtol=1e-10)
    np.testing.assert_allclose(out, f, atol=1e-5 * np.abs(f).max())
    # beyond an object the extension is smooth and bounded by the boundary values
    m = (a0 - 15) ** 2 + (a1 - 15) ** 2 + (a2 - 12) ** 2 < 81
    g = extend_harmonic(np.where(m, a0, 0.0), m)
    assert g[~m].min() >= a0[m].min() - 1e-6 and g[~m].max() <= a0[m].max() + 1e-6


def test_masked_smoothing_against_scipy():
    rng = np.random.default_rng(0)
    f = rng.standard_normal((20, 20, 20))
    full = np.ones(f.shape, bool)
    sigma = 6.0 / np.sqrt(8 * np.log(2)) / 2.0  # 6 mm FWHM on 2 mm voxels
    ref = ndi.gaussian_filter(f, sigma, mode="constant") / ndi.gaussian_filter(np.ones(f.shape), sigma,
                                                                                mode="constant")
    np.testing.assert_allclose(smooth_masked(f, full, fwhm_mm=6.0, voxel_size_mm=2.0), ref, atol=1e-12)
    # values outside the mask never leak in
    m = np.zeros(f.shape, bool)
    m[5:15, 5:15, 5:15] = True
    g = np.where(m, 7.0, 1e6)
    np.testing.assert_allclose(smooth_masked(g, m, fwhm_mm=6.0, voxel_size_mm=2.0)[m], 7.0)


def test_outliers_are_found_and_replaced():
    f = head_field_hz((24, 24, 16), amplitude_hz=60.0)
    spiky = f.copy()
    spots = [(5, 6, 7), (12, 12, 8), (18, 10, 4)]
    for s in spots:
        spiky[s] += 1 / 2.46e-3  # a 2 pi slip at dTE 2.46 ms
    m = np.ones(f.shape, bool)
    found = find_outliers(spiky, m)
    assert {tuple(int(i) for i in p) for p in np.argwhere(found)} == set(spots)
    res = b0_from_map(spiky, "Hz", reject_outliers=True, extend=False)
    for s in spots:
        assert abs(res.b0_hz[s] - f[s]) < 2.0
