"""Motion through a run: kernels against references, Gauss-Newton, poses, single-interpolation correction,
framewise displacement, the table."""

import numpy as np
import pytest
from scipy import ndimage
from scipy.spatial.transform import Rotation

import _align_data as data
from fieldfix import _motion_kernels as kernels
from fieldfix import _pose
from fieldfix.align import align_rigid_matrix, align_rigid_parameters
from fieldfix.shift import Readout
from fieldfix.errors import GeometryError, InputError
from fieldfix.motion import (
    MotionOptions,
    MotionResult,
    PoseLevel,
    VolumePose,
    align_framewise_displacement,
    LARGE_MOTION,
    align_motion,
    align_motion_model,
    align_motion_result,
    align_motion_tsv,
    align_resample_volume,
    align_run_volumes,
    align_volume_pose,
)
from fieldfix.simulate.epi import simulate_epi_run
from fieldfix.unwarp import distort_with_field, unwarp_volume

RNG_SEED = 23  # a new RNG from it before each test (tests/conftest.py)
RNG = np.random.default_rng(RNG_SEED)

SHAPE, VOXEL, CENTRE = (48, 48, 30), 4.0, (0.0, -5.0, 10.0)
ESP = 5e-4
POSES = [((0.0, 0.0, 0.0), (0.0, 0.0, 0.0)), ((0.5, -0.3, 0.8), (1.0, 0.3, -0.5)),
         ((1.2, 0.4, -0.6), (-0.8, 0.6, 0.9))]


# ---------------------------------------------------------------------------------------------
# Kernels against their plain-numpy references and outside references
# ---------------------------------------------------------------------------------------------

def _vmap():
    rot = _pose.rotation_matrix(np.deg2rad([4.0, -3.0, 5.0]))
    return np.concatenate([rot * 0.93, np.array([[0.31], [-0.27], [0.44]])], axis=1)


@pytest.mark.parametrize("shape", [(7, 12, 5), (2, 9, 4), (13, 3, 8)])
def test_prefilter_matches_scipy_spline_filter(shape):
    # Outside reference: scipy.ndimage.spline_filter (order 3, mirror); also the FFT reference.
    vol = RNG.random(shape)
    scipy_coef = ndimage.spline_filter(vol, 3, mode="mirror")
    for parallel in (False, True):
        assert np.max(np.abs(kernels.prefilter_cubic(vol, parallel=parallel) - scipy_coef)) < 1e-10
    assert np.max(np.abs(kernels.prefilter_cubic_reference(vol) - scipy_coef)) < 1e-10


def test_resample_rigid_shift_matches_reference_and_map_coordinates():
    vol = RNG.random((9, 10, 11))
    coef = kernels.prefilter_cubic(vol)
    shift = RNG.normal(0, 0.6, vol.shape)
    gradient, column = np.stack(np.gradient(shift)), np.array([0.05, 0.97, -0.1])
    ref = kernels.resample_rigid_shift_reference(coef, _vmap(), shift, gradient, column, 0.1, 1)
    for parallel in (False, True):
        ours = kernels.resample_rigid_shift(coef, _vmap(), shift, gradient, column, 0.1, 1, parallel=parallel)
        assert np.max(np.abs(ours - ref)) < 1e-5
    # Outside reference: scipy.ndimage.map_coordinates (order 3, mirror) at the same positions, times the
    # Jacobian weight max(1 + column . gradient, floor) computed here.
    ijk = np.indices(vol.shape, dtype=float).reshape(3, -1)
    pos = _vmap()[:, :3] @ ijk + _vmap()[:, 3:4]
    pos[1] += shift.ravel()
    inside = np.all((pos >= 0) & (pos <= np.array(vol.shape)[:, None] - 1), axis=0)
    weight = np.maximum(1 + np.einsum("a,a...->...", column, gradient), 0.1).ravel()
    scipy_values = ndimage.map_coordinates(vol, pos, order=3, mode="mirror") * weight
    assert np.max(np.abs(ours.ravel()[inside] - scipy_values[inside])) < 1e-5
    assert inside.mean() > 0.5 and np.all(ours.ravel()[~np.all((pos >= -0.5) & (pos <= np.array(vol.shape)[:, None]
                                                                        - 0.5), axis=0)] == 0)


@pytest.mark.parametrize("shape", [(7, 8, 9), (3, 5, 4), (2, 6, 1)])
def test_mirror_padding_matches_numpy_reflect(shape):
    # Outside reference: numpy.pad(mode="reflect") is scipy.ndimage's 'mirror' extension.
    coef = RNG.random(shape)
    assert np.array_equal(kernels.pad_mirror(coef), np.pad(coef, 2, mode="reflect") if min(shape) > 1
                          else np.pad(np.pad(coef, [(2, 2), (2, 2), (0, 0)], mode="reflect"),
                                      [(0, 0), (0, 0), (2, 2)], mode="edge"))


def test_block_mean_matches_reference_and_cascades():
    vol = RNG.random((11, 8, 7))
    for factor in (1, 2, 3, 4):
        assert np.max(np.abs(kernels.block_mean(vol, factor) - _pose.block_mean(vol, factor))) < 1e-14
    assert np.allclose(kernels.block_mean(kernels.block_mean(vol, 2), 2), kernels.block_mean(vol, 4), atol=1e-14)
    assert kernels.block_mean(vol, 3)[0, 0, 0] == pytest.approx(vol[:3, :3, :3].mean())


def _pose_case(n_voxels=300):
    samples = ndimage.gaussian_filter(RNG.random((12, 13, 14)), 1.0)
    ijk = np.stack([RNG.integers(2, n - 2, n_voxels) for n in samples.shape], axis=1)
    shift = RNG.normal(0, 0.4, n_voxels)
    rot = _pose.rotation_matrix(np.deg2rad([3.0, -2.0, 4.0]))
    ymap = rot @ np.concatenate([np.diag([2.0, 2.5, 3.0]), -np.array([[12.0], [15.0], [19.5]])], axis=1)
    pmap = np.concatenate([np.diag([0.5, 0.4, 1 / 3]), np.array([[6.2], [5.8], [6.4]])], axis=1)
    return samples, ijk, shift, ymap, pmap


def test_pose_kernels_match_references_and_scipy():
    samples, ijk, shift, ymap, pmap = _pose_case()
    values = kernels.pull_values(samples, ijk, shift, ymap, pmap, 1)
    ref = kernels.pull_values_reference(samples, ijk, shift, ymap, pmap, 1)
    assert np.array_equal(np.isnan(values), np.isnan(ref)) and 0.5 < np.isfinite(values).mean() < 1.0
    assert np.nanmax(np.abs(values - ref)) < 1e-12
    # Outside reference: the cubic B-spline whose coefficients are the samples themselves is
    # scipy.ndimage.map_coordinates(order=3, prefilter=False).
    _, pos = kernels._positions_reference(ijk, shift, ymap, pmap, 1)
    ok = np.isfinite(values)
    scipy_values = ndimage.map_coordinates(samples, pos[:, ok], order=3, prefilter=False, mode="mirror")
    assert np.max(np.abs(values[ok] - scipy_values)) < 1e-12
    gradient, weight, still = RNG.normal(0, 0.4, (len(ijk), 3)), RNG.random(len(ijk)), RNG.random(len(ijk))
    jmap = np.array([[0.05, 0.98, -0.04], [0.0, 0.02, 0.9], [0.3, 0.0, -0.01], [-0.9, 0.01, 0.0]])
    ref = kernels.normal_equations_reference(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, 0.1, 1)
    for parallel in (False, True):
        sums = kernels.normal_equations(samples, ijk, shift, gradient, weight, still, ymap, pmap, jmap, 0.1, 1,
                                        parallel=parallel)
        assert np.max(np.abs(sums - ref)) < 1e-10 * max(1.0, np.abs(ref).max())


def test_normal_equations_are_the_exact_gauss_newton_sums():
    # The Jacobian against central differences of the residuals r = jac * value - still, each
    # parameter stepped as fieldfix._pose.RigidState.step steps it (translation mm, then small
    # rotations about world x, y, z applied after R). The intensity weight jac = max(1 + g . c, floor)
    # is recomputed here from the column c of the inverse voxel map, as the resampler takes it.
    samples, ijk, shift, _, _ = _pose_case(200)
    affine = np.diag([2.0, 2.5, 3.0, 1.0])
    affine[:3, 3] = [-12.0, -15.0, -19.5]
    centre = np.zeros(3)
    gradient = RNG.normal(0, 0.3, (len(ijk), 3))
    gradient[:10, 1] = -0.95  # folded voxels: weight at the floor
    level = PoseLevel(1, affine, 1, ijk, shift, gradient, RNG.uniform(0.5, 1, len(ijk)), RNG.random(len(ijk)), 0.1)
    state = _pose.RigidState(np.array([0.4, -0.3, 0.2]), _pose.rotation_matrix(np.deg2rad([2.0, -1.0, 1.5])))

    def residuals(s):
        ymap, pmap, _ = level.maps(s, centre)
        matrix = np.eye(4)
        matrix[:3, :3] = s.rotation
        matrix[:3, 3] = centre + s.translation_mm - s.rotation @ centre
        column = np.linalg.inv(np.linalg.inv(affine) @ matrix @ affine)[:3, 1]
        jac = np.maximum(1.0 + gradient @ column, 0.1)
        return jac * kernels.pull_values(samples, level.ijk, level.shift_vox, ymap, pmap, 1) - level.still

    base = residuals(state)
    keep = np.isfinite(base)
    columns = []
    for n in range(6):
        step = np.zeros(6)
        step[n] = 1e-5
        columns.append((residuals(state.step(step)) - residuals(state.step(-step)))[keep] / 2e-5)
    jacobian = np.stack(columns, axis=1)
    w = level.weight[keep]
    scale = 1.0 / np.sum(w * level.still[keep] ** 2)
    cost, grad, matrix = level.normal(samples, state, centre)
    assert cost == pytest.approx(np.sum(w * base[keep] ** 2) * scale, rel=1e-10)
    assert np.allclose(grad, jacobian.T @ (w * base[keep]) * scale, rtol=1e-5, atol=1e-9)
    assert np.allclose(matrix, (jacobian * w[:, None]).T @ jacobian * scale, rtol=1e-5, atol=1e-9)
    # The weight's change with the rotation is part of it: leaving it out misses the differences.
    ymap, pmap, jmap = level.maps(state, centre)
    jmap[1:] = 0.0
    frozen = kernels.normal_equations(samples, level.ijk, level.shift_vox, gradient, level.weight, level.still, ymap,
                                      pmap, jmap, 0.1, 1)[1:7] * scale
    assert not np.allclose(frozen[3:], grad[3:], rtol=1e-3, atol=1e-9)


def test_gauss_newton_matches_the_closed_form_rigid_fit():
    # Outside reference: least-squares rotation of two point sets by scipy.spatial.transform.Rotation.
    # align_vectors (Kabsch 1976 / Markley's SVD solution); the translation follows from the centroids.
    points = RNG.normal(0, 30, (60, 3))
    centre = np.array([5.0, -2.0, 8.0])
    truth = _pose.pose_matrix(np.array([2.0, -1.5, 0.7]), np.deg2rad([6.0, -4.0, 9.0]), centre)
    moved = points @ truth[:3, :3].T + truth[:3, 3] + RNG.normal(0, 0.5, points.shape)

    def normal(state):
        z = (points - centre) @ state.rotation.T
        r = z + centre + state.translation_mm - moved
        rows = np.zeros((len(points), 3, 6))
        rows[:, :, :3] = np.eye(3)
        rows[:, :, 3:] = np.stack([np.cross(np.eye(3)[a], z) for a in range(3)], axis=2)  # d(R z) = omega x (R z)
        jac = rows.reshape(-1, 6)
        return float(np.sum(r * r)), jac.T @ r.ravel(), jac.T @ jac

    result = _pose.gauss_newton(normal, _pose.RigidState(np.zeros(3), np.eye(3)), _pose.StopRule(1e-6, 1e-6, 0.0, 50))
    assert result.converged and result.passes < 15
    rotation, _ = Rotation.align_vectors(moved - moved.mean(axis=0), points - points.mean(axis=0))
    assert np.allclose(result.state.rotation, rotation.as_matrix(), atol=1e-7)
    fitted = points @ result.state.rotation.T + (centre + result.state.translation_mm - result.state.rotation @ centre)
    assert np.allclose(fitted.mean(axis=0), moved.mean(axis=0), atol=1e-7)


# ---------------------------------------------------------------------------------------------
# Simulated runs: recovery, single interpolation
# ---------------------------------------------------------------------------------------------

def _still_pose(matrix=None):
    return VolumePose((0.0, 0.0, 0.0), (0.0, 0.0, 0.0), np.eye(4) if matrix is None else matrix, 0.0, 0.0, 0, True)


@pytest.fixture(scope="module")
def moving_run():
    affine = data.grid_affine(SHAPE, VOXEL, CENTRE)
    centre = affine[:3, :3] @ ((np.array(SHAPE) - 1) / 2) + affine[:3, 3]
    acquisitions = [data.acquire_epi(SHAPE, affine, data.pose(t, r, centre), echo_spacing_s=ESP, noise_sd=0.005,
                                     seed=n) for n, (t, r) in enumerate(POSES)]
    run = np.stack([a.epi for a in acquisitions], axis=-1)
    model = align_motion_model(run[..., 0], affine, acquisitions[0].field_run_hz, Readout("j-", ESP))
    return dict(affine=affine, acquisitions=acquisitions, run=run, model=model, centre=centre)


@pytest.mark.slow
def test_known_motion_is_recovered(moving_run):
    # Known rigid transforms, k-space EPI whose distortion follows the moving head. The head is moved
    # by fieldfix._pose.pose_matrix about the run grid's centre in world mm, x then y then z: the
    # estimator's own conventions, so the recovered parameters are compared one to one.
    result = align_motion(moving_run["run"], moving_run["model"])
    assert result.converged.all() and not result.warnings
    for (t, r), est_t, est_r in zip(POSES, result.translation_mm, result.rotation_deg):
        assert np.max(np.abs(est_t - t)) < 0.2
        assert np.max(np.abs(est_r - r)) < 0.2
    assert np.allclose(result.framewise_displacement_mm,
                       align_framewise_displacement(result.translation_mm, result.rotation_deg))
    poses = [pose for _, pose, _ in align_run_volumes(moving_run["run"], moving_run["model"], resample=False)]
    assert all(p.cost_after < 0.5 * p.cost_before for p in poses[1:])  # each started at the previous pose


def test_large_motion_is_recovered_from_the_identity():
    # The pyramid's reach, and the Jacobian of the moved field: a smooth head pitched 6 degrees and
    # moved 8 mm (and a mixed move) from the reference, distorted by its own moved field with
    # fieldfix.unwarp.distort_with_field (the forward model), estimated from the identity.
    shape, voxel = (48, 56, 40), 3.5
    affine = data.grid_affine(shape, voxel)
    points = data.grid_points(shape, affine)

    def epi(move):
        moved = data.moved_back(points, move)
        return distort_with_field(data.smooth_head(moved), data.smooth_field(moved), "j-", ESP)

    model = align_motion_model(epi(np.eye(4)), affine, data.smooth_field(points), Readout("j-", ESP))
    for t, r in [((0.0, 2.0, 8.0), (6.0, 0.0, 0.0)), ((3.0, -3.0, 3.0), (2.0, -3.0, 4.0))]:
        pose = align_volume_pose(model, epi(align_rigid_matrix(t, r, model.centre_mm)))
        assert pose.converged and pose.cost_after < 0.01 * pose.cost_before
        assert np.max(np.abs(np.subtract(pose.translation_mm, t))) < 0.05
        assert np.max(np.abs(np.subtract(pose.rotation_deg, r))) < 0.05


@pytest.mark.slow
def test_motion_of_the_run_simulator_is_recovered():
    # fieldfix.simulate.epi.simulate_epi_run moves the head about the fine grid's centre, which is the
    # run grid's centre ((n o - 1) / 2 fine samples = (n - 1) / 2 voxels), rotating in voxel axes
    # (R = Rz Ry Rx, x first) and translating in voxels. On this isotropic, axis-aligned grid voxel
    # axes are world axes, so its motion is pose_matrix(translation * voxel, rotation, centre): the
    # estimator's conventions. Relative to volume 0 (which moved too) the pose is M_t M_0^-1.
    shape, voxel = (40, 40, 24), 4.0
    affine = data.grid_affine(shape, voxel, CENTRE)
    centre = affine[:3, :3] @ ((np.array(shape) - 1) / 2) + affine[:3, 3]
    fine = data.grid_points(shape, affine, 2)
    run, motion = simulate_epi_run(data.head_intensity(fine, data.EPI_CONTRAST, -1.0), data.field_at(fine), 4,
                                   pe_code="j-", echo_spacing_s=ESP, te_s=0.03, oversample=2,
                                   translation_sd_vox=0.15, rotation_sd_deg=0.7, noise_sd=0.005,
                                   rng=np.random.default_rng(4))
    moves = [align_rigid_matrix(m[:3] * voxel, m[3:], centre) for m in motion]
    field_at_rest = data.field_at(data.moved_back(fine, moves[0])).reshape(shape[0], 2, shape[1], 2, shape[2], 2)
    model = align_motion_model(run[..., 0], affine, field_at_rest.mean(axis=(1, 3, 5)), Readout("j-", ESP))
    result = align_motion(run, model)
    assert result.converged.all()
    for t, move in enumerate(moves):
        translation, rotation = align_rigid_parameters(move @ np.linalg.inv(moves[0]), centre)
        assert np.max(np.abs(result.translation_mm[t] - translation)) < 0.2
        assert np.max(np.abs(result.rotation_deg[t] - rotation)) < 0.2
    assert np.abs(motion[:, 3:]).max() > 0.9  # the run did turn by about a degree


def _high_frequency_energy(volume, mask):
    """Sharpness: mean squared discrete Laplacian inside a mask (interpolation blur lowers it most)."""
    return float((ndimage.laplace(np.asarray(volume, float))[mask] ** 2).mean())


@pytest.mark.slow
def test_single_interpolation_equals_two_steps_and_is_sharper(moving_run):
    model, run = moving_run["model"], moving_run["run"]
    t = 2
    pose = list(align_run_volumes(run[..., t:t + 1], model))[0][1]
    ours = align_resample_volume(model, run[..., t], pose)
    # Two steps at high order: motion with scipy.ndimage.affine_transform (cubic B-spline), then the
    # distortion with fieldfix's cubic unwarp of the reference field (two interpolations).
    voxel_map = np.linalg.inv(model.affine) @ pose.matrix @ model.affine
    moved_back = ndimage.affine_transform(run[..., t].astype(float), voxel_map[:3, :3], voxel_map[:3, 3], order=3,
                                          mode="mirror")
    two_step = unwarp_volume(moved_back, model.shift_vox, model.pe_axis, interp="cubic")
    head = moving_run["acquisitions"][0].truth > 0.1
    inner = ndimage.binary_erosion(head, iterations=2)
    difference = np.sqrt(np.mean((ours - two_step)[inner] ** 2)) / np.sqrt(np.mean(two_step[inner] ** 2))
    assert difference < 0.03  # the same image within 3 % (RMS, inside the head)
    sharper = _high_frequency_energy(ours, inner) / _high_frequency_energy(two_step, inner)
    assert sharper > 1.005  # measured 1.013: one cubic interpolation instead of two


def test_rigid_resampling_matches_scipy_affine_transform():
    # Outside reference: scipy.ndimage.affine_transform (order 3, mirror) with no field.
    rng = np.random.default_rng(3)
    volume = ndimage.gaussian_filter(rng.random((20, 22, 16)), 1.0)
    affine = np.diag([2.0, 2.5, 3.0, 1.0])
    model = align_motion_model(volume, affine, np.zeros_like(volume), Readout("j", 5e-4))
    matrix = align_rigid_matrix((1.1, -0.6, 0.9), (2.0, -1.5, 3.0), model.centre_mm)
    ours = align_resample_volume(model, volume, _still_pose(matrix))
    voxel_map = np.linalg.inv(affine) @ matrix @ affine
    reference = ndimage.affine_transform(volume, voxel_map[:3, :3], voxel_map[:3, 3], order=3, mode="mirror")
    ijk = np.indices(volume.shape).reshape(3, -1).astype(float)
    pos = voxel_map[:3, :3] @ ijk + voxel_map[:3, 3:4]
    inside = np.all((pos >= 0) & (pos <= np.array(volume.shape)[:, None] - 1), axis=0).reshape(volume.shape)
    assert np.max(np.abs(ours - reference)[inside]) < 1e-4


def test_framewise_displacement_hand_computed():
    # Power, Barnes, Snyder, Schlaggar and Petersen 2012, NeuroImage 59:2142: FD = sum of absolute
    # backward differences, rotations in radians times 50 mm. By hand, volume 1: 0.2 + 0.1 + 0.3 mm
    # + (0.5 deg = 0.0087266 rad) x 50 mm = 0.6 + 0.43633 = 1.03633 mm; volume 2: |-0.2| + |0.1| + 0
    # + |-0.5 + 1.0| deg about z (0.5 deg = 0.43633 mm) = 0.3 + 0.43633 + 0.43633 = 1.17266 mm.
    translation = [[0.0, 0.0, 0.0], [0.2, -0.1, 0.3], [0.0, 0.0, 0.3]]
    rotation = [[0.0, 0.0, 0.0], [0.5, 0.0, 0.0], [0.0, 0.0, 0.5]]
    fd = align_framewise_displacement(translation, rotation)
    assert fd == pytest.approx([0.0, 1.03633, 1.17266], abs=1e-5)
    with pytest.raises(InputError):
        align_framewise_displacement(translation, rotation[:2])


def test_motion_result_gathers_poses_and_warns():
    # Volume 1 turned 0.5 degree (FD 0.5 deg = 0.0087266 rad x 50 mm = 0.43633 mm, by hand),
    # volume 2 moved just past the large-motion limit and did not converge.
    def pose(translation, rotation, converged=True):
        return VolumePose(tuple(translation), tuple(rotation), np.eye(4), 1.0, 0.5, 3, converged)

    poses = [pose([0, 0, 0], [0, 0, 0]), pose([0, 0, 0], [0, 0.5, 0]),
             pose([0, LARGE_MOTION + 0.1, 0], [0, 0.5, 0], converged=False)]
    result = align_motion_result(poses)
    assert result.translation_mm.shape == (3, 3) and result.rotation_deg[1, 1] == 0.5
    assert result.framewise_displacement_mm[:2] == pytest.approx([0.0, 0.43633], abs=1e-5)
    assert result.converged.tolist() == [True, True, False]
    assert [w.split(" ")[0] for w in result.warnings] == ["the", "volume(s)"]
    assert "volume(s) 2" in result.warnings[0] and result.warnings[1].startswith("volume(s) 2 moved")
    assert align_motion_result(poses[:2]).warnings == ()


def test_motion_table_text():
    result = MotionResult(np.array([[0, 0, 0], [0.25, -1, 2]]), np.array([[0, 0, 0], [1, 2, -3]]),
                          np.array([0.0, 5.5]), np.zeros(2), np.ones(2, bool))
    lines = align_motion_tsv(result).splitlines()
    header = lines[0].split("\t")
    assert len(header) == 8 and header[1].endswith("_mm") and header[4].endswith("_deg")
    assert header[-1] == "framewise_displacement_mm"
    assert lines[2].split("\t") == ["1", "0.2500", "-1.0000", "2.0000", "1.0000", "2.0000", "-3.0000", "5.5000"]
    assert len(lines) == 3


def test_reference_pose_is_identity_and_bad_input():
    rng = np.random.default_rng(5)
    volume = ndimage.gaussian_filter(rng.random((16, 18, 12)), 1.5) * 100
    model = align_motion_model(volume, np.eye(4) * [3, 3, 3, 1], np.zeros_like(volume), Readout("j-", 5e-4),
                               MotionOptions(levels=(2, 1)))
    poses = list(align_run_volumes(volume[..., None], model, resample=False))
    assert np.max(np.abs(poses[0][1].translation_mm)) < 1e-3
    with pytest.raises(GeometryError, match="volume"):
        align_resample_volume(model, volume[:-1], _still_pose())
    with pytest.raises(InputError, match="run"):
        list(align_run_volumes(volume, model))
    with pytest.raises(InputError, match="reference"):
        align_motion_model(np.zeros_like(volume), np.eye(4), np.zeros_like(volume), Readout("j", 5e-4))
