"""fieldfix.pairs: field from reversed phase-encode pairs, checked against analytic cases, the k-space
EPI simulator, gradient-echo field mapping of the same head, and the bad-input rules."""

import numpy as np
import pytest
from scipy import ndimage

from fieldfix.errors import GeometryError, InputError, MetadataError
from fieldfix.fieldmap import b0_from_echoes
from fieldfix.pairs import PairOptions, PhaseEncoding, field_from_pairs, pair_agreement, restore_jointly
from fieldfix.simulate.epi import fine_coordinates, simulate_epi
from fieldfix.simulate.gradient_echo import simulate_gradient_echo
from fieldfix.unwarp import distort_with_field, unwarp_volume

ESP = 5e-4
PAIR = [PhaseEncoding("j", ESP), PhaseEncoding("j-", ESP)]


def _textured_head(shape, seed=0, oversample=(1, 1, 1)):
    """An ellipsoid with smooth inner texture (invented), sampled at `oversample` per voxel."""
    grids = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    r2 = sum(((g - (n - 1) / 2) / (0.38 * n)) ** 2 for g, n in zip(grids, shape))
    fine_shape = tuple(n * o for n, o in zip(shape, oversample))
    texture = ndimage.gaussian_filter(np.random.default_rng(seed).random(fine_shape), 2.0 * max(oversample))
    texture = (texture - texture.min()) / np.ptp(texture)
    return np.where(r2 < 1, 0.6 + 0.8 * texture, 0.0)


def _block_mean(fine, oversample):
    n = [s // o for s, o in zip(fine.shape, oversample)]
    o = oversample
    return fine.reshape(n[0], o[0], n[1], o[1], n[2], o[2]).mean(axis=(1, 3, 5))


def test_uniform_offset_gives_equal_and_opposite_rigid_shifts():
    # Analytic: a uniform field f moves the whole image by +f*esp*N voxels for 'j' and by -f*esp*N for
    # 'j-', a rigid shift; the shifted images are made by scipy.ndimage.fourier_shift (exact for band-
    # limited images), not by fieldfix's own forward model.
    shape = (20, 48, 12)
    obj = ndimage.gaussian_filter(_textured_head(shape, 1), 1.0)
    field_hz = 35.0
    shift = field_hz * ESP * shape[1]  # 0.84 voxel
    images = [np.real(np.fft.ifftn(ndimage.fourier_shift(np.fft.fftn(obj), (0, s * shift, 0)))) for s in (1, -1)]
    result = field_from_pairs(images, PAIR, (2.5, 2.5, 2.5))
    inside = result.mask & (obj > 0.3)
    assert np.median(np.abs(result.b0_hz[inside] - field_hz)) < 1.0
    assert result.nrmsd_after < 0.25 * result.nrmsd_before
    assert result.correlation_after > 0.99


def test_linear_field_gives_an_affine_stretch_with_the_analytic_jacobian():
    # Analytic: b = a + g*y shifts y to y' = y + k(a + g y), an affine map along the PE axis; the
    # distorted image is rho(y(y')) / (1 + k g) for 'j' and with k -> -k for 'j-' (signal conserved).
    shape = (16, 56, 10)
    k = ESP * shape[1]
    a, g = 10.0, 0.9  # Hz, Hz per voxel: Jacobians 1.025 and 0.975
    y = np.arange(shape[1], dtype=float)
    i, _, z = np.meshgrid(np.arange(shape[0]), y, np.arange(shape[2]), indexing="ij")

    def obj(yy):
        return (np.exp(-((i - 7.5) ** 2 / 20 + (yy - 27.0) ** 2 / 90 + (z - 4.5) ** 2 / 12))
                * (1 + 0.3 * np.cos(yy / 3.0)))

    images = []
    for sign in (1, -1):
        undistorted_y = (y - sign * k * a) / (1 + sign * k * g)
        images.append(obj(undistorted_y[None, :, None] + 0 * i) / (1 + sign * k * g))
    result = field_from_pairs(images, PAIR, (2.0, 2.0, 2.0))
    truth = a + g * np.broadcast_to(y[None, :, None], shape)
    inside = obj(np.broadcast_to(y[None, :, None], shape)) > 0.05
    assert np.median(np.abs(result.b0_hz - truth)[inside]) < 0.5
    jacobian = 1 + k * np.gradient(result.b0_hz, axis=1)
    assert np.median(jacobian[inside]) == pytest.approx(1 + k * g, abs=0.003)


def _simulated_pair(shape, oversample, field_fine, obj_fine, noise_sd=0.0, seed=0, codes=("j", "j-")):
    images = []
    for n, code in enumerate(codes):
        images.append(simulate_epi(obj_fine, field_fine, pe_code=code, echo_spacing_s=ESP, te_s=0.05,
                                   oversample=oversample, spin_echo=True, noise_sd=noise_sd,
                                   rng=np.random.default_rng(seed + n)))
    return images


def _bump_field(shape, oversample, amplitude=60.0):
    grids = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    centre = [0.5 * shape[0], 0.7 * shape[1], 0.4 * shape[2]]
    r2 = sum(((gr - c) / (0.25 * n)) ** 2 for gr, c, n in zip(grids, centre, shape))
    return amplitude * np.exp(-0.5 * r2) + 15.0 * (grids[1] / shape[1] - 0.5)


def test_kspace_simulated_pair_recovers_the_field():
    # Independent reference: fieldfix.simulate.epi acquires k-space line by line (spin echo) and knows
    # nothing of shift maps; the field recovered from the pair must match the field it was given.
    shape, oversample = (24, 48, 12), (1, 2, 2)
    obj = _textured_head(shape, 2, oversample)
    field = _bump_field(shape, oversample)
    images = _simulated_pair(shape, oversample, field, obj, noise_sd=0.01)
    result = field_from_pairs(images, PAIR, (3.0, 3.0, 3.0))
    truth = _block_mean(field, oversample)
    inside = _block_mean(obj, oversample) > 0.5
    error = np.abs(result.b0_hz - truth)[inside]
    assert np.median(error) < 2.0 and np.percentile(error, 90) < 7.0
    assert result.nrmsd_after < 0.5 * result.nrmsd_before
    assert result.b0_hz.dtype == np.float32 and result.corrected.shape == shape + (2,)
    # Outside the object the field is only the smooth extension: the result says so.
    assert np.array_equal(result.extended, ~result.mask)
    assert np.all(result.confidence[result.extended] == 0) and result.confidence[result.mask].max() > 0.5


@pytest.mark.slow
def test_agrees_with_gradient_echo_field_mapping_of_the_same_head():
    # Outside reference within fieldfix: dual-echo gradient-echo data of the same head and field
    # (fieldfix.simulate.simulate_gradient_echo) mapped by fieldfix.b0_from_echoes.
    shape, oversample = (24, 48, 12), (1, 2, 2)
    obj = _textured_head(shape, 3, oversample)
    field = _bump_field(shape, oversample, amplitude=50.0)
    images = _simulated_pair(shape, oversample, field, obj, noise_sd=0.01, seed=5)
    from_pair = field_from_pairs(images, PAIR, (3.0, 3.0, 3.0)).b0_hz
    magnitude = _block_mean(obj, oversample)
    echoes = simulate_gradient_echo(_block_mean(field, oversample), [4.92e-3, 7.38e-3], magnitude=magnitude,
                                    snr=60.0, frequency_adjust=False, rng=4)
    from_echoes = b0_from_echoes(echoes.echoes, echoes.echo_times_s, voxel_size_mm=(3.0, 3.0, 3.0)).b0_hz
    inside = ndimage.binary_erosion(magnitude > 0.5, iterations=1)
    difference = np.abs(from_pair - from_echoes)[inside]
    assert np.median(difference) < 2.5 and np.percentile(difference, 90) < 6.0


def test_four_codes_in_one_4d_array_with_repeats_gain_and_motion_within_groups():
    # Both polarities on two axes (j, j-, i, i-) in one 4D array, two volumes of 'j' of which the second
    # is moved rigidly (aligned before averaging), and the 'i-' volume at 1.3 times the intensity.
    shape = (40, 40, 12)
    obj = ndimage.gaussian_filter(_textured_head(shape, 4), 0.7)
    b0 = ndimage.gaussian_filter(np.random.default_rng(8).normal(0, 1, shape), 6.0)
    b0 = 30.0 * b0 / np.abs(b0).max() + 10.0
    codes = ["j", "j", "j-", "i", "i-"]
    volumes = [distort_with_field(obj, b0, c, ESP) for c in codes]
    from fieldfix import _pairs_rigid as rigid

    volumes[1] = rigid.pull(volumes[1], [0.8, -0.5, 0.0, 0.0, 0.0, 1.5], (2.5, 2.5, 2.5), inverse=True)
    volumes[4] = 1.3 * volumes[4]
    data = np.stack(volumes, axis=-1)
    result = field_from_pairs(data, [PhaseEncoding(c, ESP) for c in codes], np.diag([2.5, 2.5, 2.5, 1.0]))
    assert result.group_codes == ("j", "j-", "i", "i-")
    assert result.group_of_volume.tolist() == [0, 0, 1, 2, 3]
    assert np.allclose(result.volume_motion_mm_deg[1], [0.8, -0.5, 0.0, 0.0, 0.0, 1.5], atol=0.15)
    assert result.gains[3] / result.gains[2] == pytest.approx(1 / 1.3, rel=0.02)
    inside = ndimage.binary_erosion(obj > 0.3, iterations=2)
    assert np.median(np.abs(result.b0_hz - b0)[inside]) < 1.5
    assert result.corrected.shape == shape + (5,)


@pytest.mark.slow
def test_rigid_motion_between_polarities_is_estimated_jointly():
    shape = (32, 40, 16)
    obj = ndimage.gaussian_filter(_textured_head(shape, 5), 0.7)
    b0 = 25.0 + 20.0 * np.sin(np.indices(shape)[1] / 9.0)
    # Motion along the PE axis (ty, and the y-parts of rx and rz) cannot be told from a field that is
    # uniform or linear across the other axes (both shift the two polarities rigidly apart), so the
    # check uses a motion with no component along the PE axis (module docstring).
    motion = np.array([1.0, 0.0, -0.5, 0.0, 1.0, 0.0])  # mm and degrees
    from fieldfix import _pairs_rigid as rigid

    # The head moves between the acquisitions and the field moves with it.
    moved_obj = rigid.pull(obj, motion, (2.5, 2.5, 2.5), inverse=True)
    moved_b0 = rigid.pull(b0, motion, (2.5, 2.5, 2.5), inverse=True)
    images = [distort_with_field(obj, b0, "j", ESP), distort_with_field(moved_obj, moved_b0, "j-", ESP)]
    still = field_from_pairs(images, PAIR, (2.5, 2.5, 2.5))
    moving = field_from_pairs(images, PAIR, (2.5, 2.5, 2.5), options=PairOptions(motion=True))
    assert np.allclose(moving.motion_mm_deg[1], motion, atol=0.2)
    inside = ndimage.binary_erosion(obj > 0.3, iterations=2)
    error_still = np.median(np.abs(still.b0_hz - b0)[inside])
    error_moving = np.median(np.abs(moving.b0_hz - b0)[inside])
    assert error_moving < 1.5 and error_moving < 0.5 * error_still


def test_restoration_forward_model_predicts_kspace_distortion_better_than_the_box_model():
    # Independent reference: the k-space simulator (spin echo). From the image acquired without field,
    # the restoration's forward model (a cubic B-spline seen through the Keys kernel at w = x + s(x))
    # predicts the images acquired with the field, both polarities, better than the signal-conserving
    # box model of fieldfix.unwarp.distort, overall and where the image is compressed (Jacobian < 0.8).
    from fieldfix import _pairs_kernels as kernels
    from fieldfix.unwarp import distort

    shape, oversample = (2, 64, 2), (1, 4, 2)
    _, y, _ = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    obj = (np.abs(y - 31.5) < 20) * (1.0 + 0.3 * np.cos(2 * np.pi * y / 4.0) + 0.3 * np.sin(y / 5.0))
    obj = ndimage.gaussian_filter1d(obj, 4.0, axis=1)
    field = 220.0 * np.exp(-0.5 * ((y - 35.0) / 7.7) ** 2)  # pull-back Jacobians 0.45 .. 1.55

    def acquire(field_fine, code):
        return simulate_epi(obj, field_fine, pe_code=code, echo_spacing_s=ESP, te_s=0.05,
                            oversample=oversample, spin_echo=True)

    still = acquire(np.zeros_like(field), "j")
    coef = np.linalg.solve(kernels.forward_matrix(np.zeros(64), 0.1)[0], still[0, :, 0])
    b0 = _block_mean(field, oversample)
    for code, sign in (("j", 1), ("j-", -1)):
        seen = acquire(field, code)[0, :, 0]
        shift = sign * b0 * ESP * shape[1]
        amat, jac, left_out = kernels.forward_matrix(shift[0, :, 0], 0.1)
        assert not left_out.any() and jac.min() < 0.5 and jac.max() > 1.5
        ours, box = amat @ coef, distort(still, shift, 1)[0, :, 0]
        for rows in (np.ones(64, bool), jac < 0.8):
            def rms(image, rows=rows):
                return float(np.sqrt(np.mean((image - seen)[rows] ** 2)))

            assert rms(ours) < 0.85 * rms(box)  # measured 0.62-0.81


@pytest.fixture(scope="module")
def compressed_pair():
    """k-space spin-echo pair of a textured head with fine stripes along PE (three voxels apart) and a
    field bump along PE: pull-back Jacobians 0.45 .. 1.55 for 'j' (1.55 .. 0.45 for 'j-')."""
    shape, oversample = (16, 64, 4), (1, 4, 2)
    grids = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    obj = _textured_head(shape, 6, oversample) * (1 + 0.4 * np.cos(2 * np.pi * grids[1] / 3.0))
    centre = [0.5 * shape[0], 0.55 * shape[1], 0.5 * shape[2]]
    widths = [1.0 * shape[0], 0.12 * shape[1], 3.0 * shape[2]]
    field = 220.0 * np.exp(-0.5 * sum(((g - c) / w) ** 2 for g, c, w in zip(grids, centre, widths)))
    images = _simulated_pair(shape, oversample, field, obj, noise_sd=0.01, seed=6)
    return images, _block_mean(field, oversample), _block_mean(obj, oversample)


def test_joint_restoration_beats_each_unwarped_polarity_overall_and_where_each_is_compressed(compressed_pair):
    # Reference: the k-space simulator (knows nothing of the restoration's model) and the box-averaged
    # object. Where 'j' is compressed (Jacobian < 0.8) it has lost the stripes that 'j-', stretched
    # there, still resolves, and the other way round; the joint least squares (Andersson, Skare &
    # Ashburner 2003) must beat each single cubic unwarp overall and in both compressed regions.
    images, b0, truth = compressed_pair
    joint = restore_jointly(images, PAIR, b0)
    assert joint.shape == truth.shape and joint.dtype == np.float32
    shifts = [sign * b0 * ESP * truth.shape[1] for sign in (1, -1)]
    singles = [unwarp_volume(image, shift, 1, interp="cubic") for image, shift in zip(images, shifts)]
    head = truth > 0.3
    jacobians = [1 + np.gradient(shift, axis=1) for shift in shifts]
    assert jacobians[0][head].min() < 0.5 and jacobians[0][head].max() > 1.5
    regions = [head] + [head & (jac < 0.8) for jac in jacobians]
    assert min(r.sum() for r in regions[1:]) > 300
    for region in regions:
        def rms(image, region=region):
            return float(np.sqrt(np.mean((image - truth)[region] ** 2)))

        # measured: overall 0.026 against 0.105 / 0.139; compressed 0.022 / 0.024 against >= 0.049 / 0.040
        assert all(rms(joint) < 0.7 * rms(single) for single in singles)


def test_joint_restoration_without_field_returns_the_mean_image_and_is_linear():
    rng = np.random.default_rng(9)
    obj = ndimage.gaussian_filter(_textured_head((12, 40, 6), 7), 1.5)
    pair = [obj + rng.normal(0, 0.01, obj.shape) for _ in range(2)]
    zero = np.zeros(obj.shape)
    restored = restore_jointly(pair, PAIR, zero)
    assert np.abs(restored - (pair[0] + pair[1]) / 2).max() < 0.01  # the penalty damps only the finest noise
    b0 = np.full(obj.shape, 30.0)
    assert np.allclose(restore_jointly([3.0 * p for p in pair], PAIR, b0), 3.0 * restore_jointly(pair, PAIR, b0),
                       rtol=1e-5, atol=1e-6)


def test_pair_agreement_definition():
    a = np.random.default_rng(0).random((6, 6, 6))
    mask = np.ones(a.shape, bool)
    nrmsd, corr = pair_agreement([a, 2 * a], mask)
    # I_g - M = -/+ a/2 with M = 1.5 a: nrmsd = (rms a / 2) / (1.5 rms a) = 1/3.
    assert nrmsd == pytest.approx(1 / 3) and corr == pytest.approx(1.0)


# ---------------------------------------------------------------------------------------------
# Bad input: one-line library errors that name the parameter (and the image's index)
# ---------------------------------------------------------------------------------------------

_GOOD = np.ones((8, 12, 6))


@pytest.mark.parametrize("images, encodings, error, words", [
    ([_GOOD, np.ones((8, 12, 5))], PAIR, GeometryError, "images[1] has shape"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding("j", ESP)], MetadataError, "opposite"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding("i-", ESP)], MetadataError, "opposite"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding("y-", ESP)], MetadataError, "encodings[1].pe_code"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding(None, ESP)], MetadataError, "encodings[1].pe_code"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding("j-", None)], MetadataError,
     "encodings[1].echo_spacing_s is missing"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", 0.5), PhaseEncoding("j-", ESP)], MetadataError,
     "encodings[0].echo_spacing_s"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding("j-", ESP, 1)], MetadataError,
     "encodings[1].n_pe_lines"),
    ([_GOOD, _GOOD], [PhaseEncoding("j", ESP)], InputError, "encodings: 1 given for 2 images"),
    ([_GOOD, _GOOD], None, InputError, "encodings: 0 given"),
    (_GOOD, PAIR[:1], GeometryError, "images: one 3D volume"),
    ([_GOOD, np.where(np.arange(6) == 2, np.nan, _GOOD)], PAIR, InputError, "images[1] contains NaN"),
    ([_GOOD, np.ones((8, 12))], PAIR, GeometryError, "images[1] must be 3D"),
])
def test_bad_input_is_refused_with_one_line_naming_the_parameter(images, encodings, error, words):
    with pytest.raises(error) as caught:
        field_from_pairs(images, encodings, (2.0, 2.0, 2.0))
    message = str(caught.value)
    assert words in message and "\n" not in message


def test_bad_voxel_size_and_restoration_inputs():
    with pytest.raises(GeometryError, match="affine_or_voxel_mm"):
        field_from_pairs([_GOOD, _GOOD], PAIR, (2.0, 0.0, 2.0))
    with pytest.raises(GeometryError, match="one phase-encode axis"):
        restore_jointly([_GOOD, _GOOD], [PhaseEncoding("j", ESP), PhaseEncoding("i-", ESP)], np.zeros(_GOOD.shape))
    with pytest.raises(GeometryError, match="b0_hz has shape"):
        restore_jointly([_GOOD, _GOOD], PAIR, np.zeros((8, 12, 5)))
    with pytest.raises(InputError, match="b0_hz contains NaN"):
        restore_jointly([_GOOD, _GOOD], PAIR, np.full(_GOOD.shape, np.nan))
    for penalty in (0.0, -1.0, float("nan"), "0.1"):
        with pytest.raises(InputError, match="penalty must be a positive number"):
            restore_jointly([_GOOD, _GOOD], PAIR, np.zeros(_GOOD.shape), penalty=penalty)
    with pytest.raises(InputError, match="jacobian_floor must be a number in"):
        restore_jointly([_GOOD, _GOOD], PAIR, np.zeros(_GOOD.shape), jacobian_floor=1.5)
