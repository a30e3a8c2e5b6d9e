"""Tests of fieldfix.phase: unit detection and conversion, conjugate-product differences, masks.

External references: numpy's complex angle for the phase difference; the phase conventions
(radians, degrees, 12-bit counts stored as 0..4095 or rescaled to -4096..4094) are common
practice, no source.
"""

import numpy as np
import pytest
import scipy.ndimage as ndi

from fieldfix.errors import UnitError
from fieldfix.fieldmap import b0_from_echoes
from fieldfix.phase import (
    complex_from_polar,
    complex_from_real_imag,
    detect_phase_units,
    magnitude_mask,
    phase_difference,
    phase_to_radians,
    phase_units,
)
from fieldfix.simulate.gradient_echo import ellipsoid_magnitude, head_field_hz, simulate_gradient_echo

TWO_PI = 2 * np.pi


def _as_convention(phase_rad, name):
    """Store radians in (-pi, pi] the way each convention does."""
    if name == "rad":
        return phase_rad.copy()
    if name == "deg":
        return np.degrees(phase_rad)
    if name == "counts4096":  # 0..4095
        return np.mod(np.round(phase_rad / TWO_PI * 4096), 4096)
    if name == "counts8192":  # -4096..4094 in steps of 2 (12-bit counts rescaled by 2, offset -4096)
        return (np.mod(np.round(phase_rad / TWO_PI * 4096) + 2048, 4096) - 2048) * 2
    raise AssertionError(name)


@pytest.mark.parametrize("name", ["rad", "deg", "counts4096", "counts8192"])
def test_detects_each_convention(name):
    rng = np.random.default_rng(0)
    phase = rng.uniform(-np.pi, np.pi, (10, 10, 10))
    stored = _as_convention(phase, name)
    unit = detect_phase_units(stored)
    assert unit.name == name
    assert "detected" in unit.reason
    back = phase_to_radians(stored, unit)
    err = np.angle(np.exp(1j * (back - phase)))
    tol = 1e-12 if name in ("rad", "deg") else TWO_PI / 4096  # quantisation step
    assert np.max(np.abs(err)) <= tol


def test_conventions_give_the_same_field():
    shape, tes = (32, 32, 20), (4.92e-3, 7.38e-3)
    d = simulate_gradient_echo(head_field_hz(shape, amplitude_hz=350.0), tes, snr=40.0, rng=5)
    fields = {}
    for name in ["rad", "deg", "counts4096", "counts8192"]:
        echoes = []
        for z in d.echoes:
            stored = _as_convention(np.angle(z), name)
            unit = detect_phase_units(stored)
            assert unit.name == name
            echoes.append(complex_from_polar(np.abs(z), phase_to_radians(stored, unit)))
        res = b0_from_echoes(echoes, tes, mask=d.object_mask, voxel_size_mm=(3, 3, 3))
        fields[name] = res.raw_b0_hz[d.object_mask]
    np.testing.assert_allclose(fields["deg"], fields["rad"], atol=1e-9)
    # 4096-level quantisation moves each echo phase by at most pi/4096
    bound = 2 * (np.pi / 4096) / (TWO_PI * (tes[1] - tes[0]))
    assert np.max(np.abs(fields["counts4096"] - fields["rad"])) <= bound + 1e-9
    assert np.max(np.abs(fields["counts8192"] - fields["rad"])) <= bound + 1e-9


def test_ambiguous_or_unknown_units_are_refused():
    with pytest.raises(UnitError, match="cannot tell"):
        detect_phase_units(np.linspace(-1.0, 1.0, 100))  # fits radians but covers a third
    with pytest.raises(UnitError, match="ambiguous"):
        detect_phase_units(np.array([-2048.0, 2050.0] * 10))  # just over 4096: fits both count ranges
    with pytest.raises(UnitError, match="cannot tell"):
        detect_phase_units(np.array([0.0, 20000.0]))
    with pytest.raises(UnitError, match="unknown phase unit"):
        phase_units("grad")
    # an explicit override always works
    np.testing.assert_allclose(phase_to_radians(np.array([0.5]), "rad"), [0.5])
    assert phase_units("degrees").name == "deg"


def test_phase_difference_is_conjugate_product():
    rng = np.random.default_rng(2)
    p1 = rng.uniform(-np.pi, np.pi, 1000)
    p2 = rng.uniform(-np.pi, np.pi, 1000)
    m1 = rng.uniform(0.5, 2.0, 1000)
    m2 = rng.uniform(0.5, 2.0, 1000)
    dphi, weight = phase_difference(complex_from_polar(m1, p1), complex_from_polar(m2, p2))
    # reference: numpy's angle of exp(i*(p2-p1)), i.e. the wrapped difference
    np.testing.assert_allclose(np.exp(1j * dphi), np.exp(1j * (p2 - p1)), atol=1e-12)
    assert np.all(np.abs(dphi) <= np.pi)
    np.testing.assert_allclose(weight, m1 * m2)
    z = complex_from_real_imag(np.array([1.0, 0.0]), np.array([0.0, 2.0]))
    np.testing.assert_allclose(np.angle(z), [0.0, np.pi / 2])


def test_magnitude_mask_finds_the_object():
    shape = (40, 40, 30)
    mag = ellipsoid_magnitude(shape)
    rng = np.random.default_rng(4)
    noisy = np.abs(mag + 0.05 * (rng.standard_normal(shape) + 1j * rng.standard_normal(shape)))
    noisy[5, 5, 5] = 3.0  # an isolated bright speck is dropped
    m = magnitude_mask(noisy)
    truth = mag > 0
    dice = 2 * np.sum(m & truth) / (m.sum() + truth.sum())
    assert dice > 0.97
    assert not m[5, 5, 5]
    # enclosed holes are filled
    holed = noisy.copy()
    holed[18:22, 18:22, 13:17] = 0.0
    assert magnitude_mask(holed)[20, 20, 15]
    eroded = magnitude_mask(noisy, erode_voxels=2)
    assert eroded.sum() < m.sum() and np.all(eroded <= ndi.binary_dilation(m))


def test_hole_filling_matches_scipy_binary_fill_holes():
    # External reference: scipy.ndimage.binary_fill_holes on a mask with enclosed and open holes
    rng = np.random.default_rng(6)
    shape = (30, 28, 26)
    grid = np.indices(shape)
    ball = (((grid - 14) / 11.0) ** 2).sum(axis=0) < 1
    mag = np.where(ball & (rng.random(shape) > 0.08), 100.0, 1.0)
    mag[14:18, 0:20, 12:15] = 1.0  # a channel open to the edge: not a hole
    ours = magnitude_mask(mag, min_piece_fraction=0.0)
    raw = magnitude_mask(mag, min_piece_fraction=0.0, fill_holes=False)
    assert np.array_equal(ours, ndi.binary_fill_holes(raw))
    assert ours.sum() > raw.sum()


def test_otsu_threshold_matches_scikit_image():
    # Outside reference: skimage.filters.threshold_otsu (Otsu 1979, 256 bins).
    from skimage.filters import threshold_otsu

    from fieldfix.phase import otsu_threshold

    rng = np.random.default_rng(3)
    for values in (np.r_[rng.normal(10, 2, 5000), rng.normal(60, 8, 3000)], rng.gamma(2.0, 3.0, 10000),
                   np.r_[np.zeros(100), np.full(50, 7.0)]):
        assert otsu_threshold(values) == pytest.approx(threshold_otsu(values), rel=1e-12)
