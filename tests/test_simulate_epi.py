"""Physics checks of the EPI simulator, and of the shift model against it."""

import numpy as np
import pytest

from fieldfix.errors import GeometryError, InputError
from fieldfix.shift import resolve_timing, shift_vox_from_field
from fieldfix.simulate.epi import (
    epi_sidecar,
    fine_coordinates,
    simulate_epi,
    simulate_epi_run,
)
from fieldfix.unwarp import distort, shift_maps, unwarp_volume

CODES = ("i", "i-", "j", "j-", "k", "k-")


def _blob(shape, oversample, centre, sigma=1.5):
    grids = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    return np.exp(-sum((g - c) ** 2 for g, c in zip(grids, centre)) / (2 * sigma ** 2))


def _centroid(image, axis):
    weight = image ** 2
    return float((weight * np.indices(image.shape)[axis]).sum() / weight.sum())


def _block_mean(fine, shape, oversample):
    o0, o1, o2 = oversample
    return fine.reshape(shape[0], o0, shape[1], o1, shape[2], o2).mean(axis=(1, 3, 5))


@pytest.mark.parametrize("code", CODES)
@pytest.mark.parametrize("acceleration, partial_fourier", [(1, 1.0), (2, 0.75)])
def test_measured_shift_matches_prediction(code, acceleration, partial_fourier):
    # Distortion runs along the phase-encode axis because it is the slowest
    # (common practice, no source). The simulator acquires lines at their own times;
    # the shift model must predict the displacement of a small object in size and sign.
    axis = "ijk".index(code[0])
    shape = [8, 8, 8]
    shape[axis] = 24
    shape = tuple(shape)
    oversample = (2, 2, 2)
    obj = _blob(shape, oversample, [n / 2 - 0.3 for n in shape])
    field_hz = -143.0
    sidecar = epi_sidecar(code, shape[axis], echo_spacing_s=0.0007, te_s=0.03, acceleration=acceleration)
    options = dict(pe_code=code, echo_spacing_s=0.0007, te_s=0.03, oversample=oversample,
                   acceleration=acceleration, partial_fourier=partial_fourier)
    still = simulate_epi(obj, np.zeros_like(obj), **options)
    moved = simulate_epi(obj, np.full(obj.shape, field_hz), **options)
    measured = _centroid(moved, axis) - _centroid(still, axis)
    # Prediction from the timing a BIDS sidecar would carry (TotalReadoutTime only).
    timing = resolve_timing(shape[axis], sidecar={"TotalReadoutTime": sidecar["TotalReadoutTime"]})
    predicted = shift_vox_from_field(np.full(shape, field_hz), code, timing.echo_spacing_s)[0, 0, 0]
    assert abs(predicted) > 1.0  # a shift of more than one voxel: the test can tell sizes apart
    assert measured == pytest.approx(predicted, abs=0.05)
    # Nothing moves along the other two axes.
    for other in {0, 1, 2} - {axis}:
        assert abs(_centroid(moved, other) - _centroid(still, other)) < 1e-6


def test_simulator_agrees_with_forward_model_and_unwarp_inverts_it():
    shape, oversample = (24, 40, 4), (3, 3, 2)
    x, y, _ = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    obj = np.exp(-(((x - 11.5) / 6) ** 2 + ((y - 19.5) / 9) ** 2) / 2) * (1 + 0.3 * np.cos(y / 3))
    field = 60 * np.sin(2 * np.pi * y / 40 + 0.4) * np.cos(np.pi * x / 24) + 20
    image = simulate_epi(obj, field, pe_code="j-", echo_spacing_s=0.0005, te_s=0.03, oversample=oversample)
    truth = _block_mean(obj, shape, oversample)
    maps = shift_maps(_block_mean(field, shape, oversample), "j-", 0.0005)

    def nrmse(a, b):
        return np.sqrt(np.mean((a - b) ** 2)) / np.sqrt(np.mean(b ** 2))

    assert nrmse(image, truth) > 0.06  # visibly distorted
    assert nrmse(image, distort(truth, maps.shift_vox, 1)) < 0.025
    assert nrmse(unwarp_volume(image, maps.shift_vox, 1, interp="cubic"), truth) < 0.025


def test_through_slice_dropout_analytic():
    # Analytic: a linear field g (Hz per slice thickness) across a boxcar slice of n sub-slices
    # gives |sum_s exp(-2 pi i g z_s TE)| / n = |sin(pi g TE) / (n sin(pi g TE / n))| at the echo
    # time; for many sub-slices this tends to |sinc(g TE)| of the continuous slice.
    shape, oversample = (6, 8, 3), (1, 1, 8)
    _, _, z = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    obj = np.ones(z.shape)
    retention = {}
    for te in (0.02, 0.04):
        g = 15.0  # Hz across one slice
        field = g * z
        image = simulate_epi(obj, field, pe_code="j", echo_spacing_s=0.0005, te_s=te, oversample=oversample)
        phase = np.pi * g * te
        expected = abs(np.sin(phase) / (8 * np.sin(phase / 8)))
        assert np.allclose(image, expected, rtol=1e-6)
        assert expected == pytest.approx(abs(np.sinc(g * te)), abs=0.02)
        retention[te] = image.mean()
    # Longer echo times are more sensitive (common practice, no source).
    assert retention[0.04] < retention[0.02] < 1.0


def test_thinner_slices_lose_less():
    # Thinner slices lose less signal to through-plane gradients (common practice, no source):
    # the same gradient in Hz/mm across half the thickness.
    oversample = (1, 1, 8)
    losses = []
    for thickness in (1.0, 0.5):
        shape = (4, 8, 2)
        _, _, z = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
        image = simulate_epi(np.ones(z.shape), 20.0 * thickness * z, pe_code="j", echo_spacing_s=0.0005,
                             te_s=0.03, oversample=oversample)
        losses.append(1 - image.mean())
    assert losses[1] < losses[0]


def test_noise_level_and_reproducibility():
    shape, oversample = (16, 16, 2), (1, 1, 1)
    zeros = np.zeros((16, 16, 2))
    image = simulate_epi(zeros, zeros, pe_code="i", echo_spacing_s=0.0005, te_s=0.03, oversample=oversample,
                         noise_sd=2.0, rng=np.random.default_rng(5), complex_output=True)
    assert image.shape == shape
    assert np.std(image.real) == pytest.approx(2.0, rel=0.1)
    assert np.std(image.imag) == pytest.approx(2.0, rel=0.1)
    with pytest.raises(InputError):
        simulate_epi(zeros, zeros, pe_code="i", echo_spacing_s=0.0005, te_s=0.03, oversample=1, noise_sd=1.0)


def test_4d_run_motion_and_determinism():
    shape, oversample = (10, 12, 4), (2, 2, 2)
    obj = _blob(shape, oversample, (4.7, 5.5, 1.5), sigma=2.0)
    field = np.full(obj.shape, 30.0)
    options = dict(pe_code="j", echo_spacing_s=0.0005, te_s=0.03, oversample=oversample,
                   translation_sd_vox=0.3, rotation_sd_deg=1.0, noise_sd=0.01)
    first, motion = simulate_epi_run(obj, field, 3, rng=np.random.default_rng(7), **options)
    second, motion2 = simulate_epi_run(obj, field, 3, rng=np.random.default_rng(7), **options)
    assert first.shape == shape + (3,) and first.dtype == np.float32
    assert np.array_equal(first, second) and np.array_equal(motion, motion2)
    assert motion.shape == (3, 6) and np.all(np.abs(motion[:, :3]) < 1.5)
    # Volumes differ by motion; the blob's x-centroid follows the drawn x-translation.
    for t in range(3):
        assert _centroid(first[..., t], 0) - _centroid(first[..., 0], 0) == pytest.approx(
            motion[t, 0] - motion[0, 0], abs=0.1)
    with pytest.raises(InputError):
        simulate_epi_run(obj, field, 2, pe_code="j", echo_spacing_s=0.0005, te_s=0.03, oversample=2,
                         noise_sd=0.1)


def test_input_checks():
    obj = np.ones((8, 8, 8))
    common = dict(echo_spacing_s=0.0005, te_s=0.03, oversample=2)
    with pytest.raises(GeometryError):
        simulate_epi(obj, np.ones((8, 8, 6)), pe_code="j", **common)
    with pytest.raises(GeometryError):
        simulate_epi(np.ones((9, 8, 8)), np.ones((9, 8, 8)), pe_code="j", **common)
    with pytest.raises(InputError):
        simulate_epi(obj, obj, pe_code="j", slice_axis=1, **common)
    with pytest.raises(InputError):
        simulate_epi(obj, obj, pe_code="j", partial_fourier=0.4, **common)
    with pytest.raises(InputError):
        simulate_epi(obj, obj, pe_code="j", echo_spacing_s=0.01, te_s=0.005, oversample=2)


def test_spin_echo_refocuses_dropout_but_keeps_the_distortion():
    # Spin echo (common practice, no source): the refocusing pulse cancels the phase accrued
    # before the echo, so a uniform object in a through-slice gradient keeps all its signal
    # (only the centre line of k-space carries signal, and it is acquired at the echo), while
    # the gradient echo loses it as |sin(pi g TE) / (n sin(pi g TE / n))| (analytic).
    shape, oversample = (6, 8, 3), (1, 1, 8)
    _, _, z = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    obj, g, te = np.ones(z.shape), 15.0, 0.04
    common = dict(pe_code="j", echo_spacing_s=0.0005, te_s=te, oversample=oversample)
    gradient_echo = simulate_epi(obj, g * z, **common)
    spin_echo = simulate_epi(obj, g * z, spin_echo=True, **common)
    phase = np.pi * g * te
    assert np.allclose(gradient_echo, abs(np.sin(phase) / (8 * np.sin(phase / 8))), rtol=1e-6)
    assert gradient_echo.mean() < 0.6
    assert np.allclose(spin_echo, 1.0, rtol=1e-9)
    # A uniform offset differs between the two only by a global phase: the same shift in size and sign.
    shape, oversample = (8, 24, 4), (2, 2, 2)
    blob = _blob(shape, oversample, (3.7, 11.6, 1.5))
    field = np.full(blob.shape, -120.0)
    options = dict(pe_code="j-", echo_spacing_s=0.0007, te_s=0.03, oversample=oversample)
    se = simulate_epi(blob, field, spin_echo=True, **options)
    assert np.allclose(se, simulate_epi(blob, field, **options), atol=1e-12)
    predicted = shift_vox_from_field(np.full(shape, -120.0), "j-", 0.0007)[0, 0, 0]
    still = simulate_epi(blob, np.zeros_like(blob), spin_echo=True, **options)
    assert _centroid(se, 1) - _centroid(still, 1) == pytest.approx(predicted, abs=0.05)
