"""Head motion through an EPI run: per-volume rigid poses, and motion and distortion in one resampling.

Model
-----
The run's reference volume and the field (Hz) aligned to it (e.g. by
:func:`fieldfix.align.align_fieldmap` and :func:`fieldfix.align.align_field_to_run`) define the
head at rest: its undistorted image ``o`` (the reference unwarped once) and its field ``f``. Volume
``t`` shows the head moved by the pose ``P_t`` (reference world -> volume world, the conventions
of :mod:`fieldfix.align`: ``y = R (x - c) + c + t`` with ``R = Rz Ry Rx`` about the run grid's
centre ``c``), distorted by the *moved* field::

    volume_t = D(kappa * f o P_t^-1) [o o P_t^-1]

with ``D`` the signal-conserving forward model along the phase-encode axis and ``kappa`` the
shift per hertz (:mod:`fieldfix.shift`). First order: the map follows the head. Neglected: the
change of the field with the head's orientation to B0 (the susceptibility field of a pitched or
rolled head is not the rotated field; about a hertz per degree near the sinuses at 3 T, from
memory), field drift, the spin history and through-slice motion within a volume, and any
change of the field caused by the motion of other body parts.

Pose estimation (:func:`align_volume_pose`): the same contrast on both sides, so least squares
between the reference at rest and the volume pulled back through the model at a trial pose (the
correction below, with its pose-dependent Jacobian ``J``):
``C = sum w (J * volume(Q v + shift(v) e_pe) - still(v))^2 / sum w still^2``. ``still`` is the
reference volume pulled back the same way at the identity, so the reference's own pose is exactly
the identity. Both are read through the cubic B-spline whose coefficients are the samples (no
prefilter: interpolation plus a light smoothing of about 0.58 voxel, which keeps the cost smooth
in the pose and less sensitive to sharp, aliased edges). The cost counts the voxels where the
field is gentle (``|d shift / d y| < 0.3``), leaves out the voxels next to the grid's faces
(``margin_vox``: the field of view does not move with the head, and its cut edges would hold the
estimate at no motion) and keeps at most ``voxels_per_level / factor`` of them, the strongest
edges of the reference at rest. It is minimised by Gauss-Newton with Levenberg-Marquardt damping
(:func:`fieldfix._pose.gauss_newton`; one numba pass gives the residuals and the 6x6 normal
equations with the exact Jacobian, the intensity weight's change with the rotation included) on
a 4-2-1 pyramid of block means, starting from the previous volume's pose; a level stops when the
next step would move less than 0.01 mm and 0.01 degree (scaled by the block size on coarse
levels).

Correction (:func:`align_resample_volume`), one interpolation per volume: the output voxel ``v``
(reference position, undistorted) takes the cubic B-spline value of volume ``t`` at
``Q_t v + kappa f(v) e_pe`` (``Q_t`` the pose in voxel coordinates, ``e_pe`` the phase-encode
axis) times the Jacobian ``1 + kappa grad f(v) . (Q_t^-1 e_pe)``, floored at the fold threshold
of :mod:`fieldfix.shift`: motion and distortion in a single resampling, so the data are not
blurred twice.

Framewise displacement (:func:`align_framewise_displacement`): Power, Barnes, Snyder, Schlaggar
and Petersen 2012, NeuroImage 59:2142 (from memory): the sum of the absolute backward differences
of the six parameters, rotations (radians) turned into millimetres on a sphere of radius 50 mm.

Research software, not a medical device: inspect corrected images before they are used for any
decision about a person.

Examples
--------
>>> import numpy as np
>>> fd = align_framewise_displacement(np.array([[0, 0, 0], [1, 0, 0.5]]), np.zeros((2, 3)))
>>> fd.tolist()
[0.0, 1.5]
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import _motion_kernels
from . import _pose
from ._progress import progress_bar
from .errors import GeometryError, InputError
from .geometry import parse_pe_code
from .shift import DEFAULT_JACOBIAN_FLOOR, Readout

__all__ = [
    "MotionOptions",
    "MotionModel",
    "VolumePose",
    "MotionResult",
    "align_motion_model",
    "align_volume_pose",
    "align_resample_volume",
    "align_run_volumes",
    "align_motion",
    "align_motion_result",
    "align_framewise_displacement",
    "align_motion_tsv",
    "FD_RADIUS_MM",
    "LARGE_MOTION",
]

#: Radius of the sphere on which rotations become displacements (Power et al. 2012).
FD_RADIUS_MM = 50.0
#: The pose cost counts voxels whose reference shift changes by less than this per voxel along
#: the phase-encode axis: where the field is steeper, signal piles up, folds and drops out, and
#: the forward model no longer predicts the image well.
TRUSTED_SHIFT_GRADIENT = 0.3
#: A pyramid level whose grid leaves fewer voxels than this for the cost (small grids, coarse
#: levels) is left out.
MIN_POSE_VOXELS = 64
#: A volume that moved more than this (mm or degrees) from the reference gets a warning.
LARGE_MOTION = 10.0


@dataclass(frozen=True)
class MotionOptions(_pose.PyramidSearch):
    """Options of the motion model.

    Attributes
    ----------
    levels, max_iterations, step_mm, step_deg, relative_cost : the pose pyramid and its
        convergence rule (see :class:`fieldfix._pose.PyramidSearch`); `max_iterations` counts
        Gauss-Newton passes per level
    voxels_per_level : int, most voxels the cost counts on one level (the strongest edges of
        the reference at rest; all candidates when there are fewer)
    margin_vox : int, voxels of the run grid next to its faces that the cost leaves out: the
        field of view stays where it is while the head moves, so its cut edges and the
        content entering or leaving it would pull the estimate towards no motion
    jacobian_floor : float, Jacobian floor of the intensity correction
    parallel : bool or None, numba threads for the resampling (None: by grid size)
    """

    max_iterations: int = 20
    voxels_per_level: int = 20000
    margin_vox: int = 3
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR
    parallel: bool | None = None


@dataclass(frozen=True)
class MotionModel:
    """The head at rest (reference volume unwarped, and its field), built once per run.

    Attributes
    ----------
    shape : tuple, run grid
    affine : (4, 4), run voxel -> world mm
    pe_axis : int
    kappa : float, shift (voxels along the PE axis) per Hz
    centre_mm : (3,), rotation centre (run grid centre)
    shift_vox : (X, Y, Z), the reference shift map ``kappa * b0_hz``
    shift_gradient : (3, X, Y, Z), its derivatives along the voxel axes
    levels : tuple of :class:`PoseLevel`, the pyramid of the pose estimation
    options : MotionOptions
    """

    shape: tuple
    affine: np.ndarray
    pe_axis: int
    kappa: float
    centre_mm: np.ndarray
    shift_vox: np.ndarray
    shift_gradient: np.ndarray
    levels: tuple
    options: MotionOptions


@dataclass(frozen=True)
class PoseLevel:
    """One level of the pose pyramid: the voxels the cost counts on a grid of `factor`-voxel blocks.

    Attributes
    ----------
    factor : int
    affine : (4, 4), the level grid (voxel centres at the blocks' centres)
    pe_axis : int
    ijk : (N, 3) int, the voxels counted (level grid indices)
    shift_vox : (N,), the reference shift at those voxels, in level voxels
    shift_gradient : (N, 3), its derivatives along the level's voxel axes (block means)
    weight : (N,), fraction of each block the cost trusts (see ``TRUSTED_SHIFT_GRADIENT``)
    still : (N,), the reference at rest: the reference volume pulled back at the identity
    jacobian_floor : float
    """

    factor: int
    affine: np.ndarray
    pe_axis: int
    ijk: np.ndarray
    shift_vox: np.ndarray
    shift_gradient: np.ndarray
    weight: np.ndarray
    still: np.ndarray
    jacobian_floor: float

    def maps(self, state: _pose.RigidState, centre_mm) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(ymap, pmap, jmap) of :mod:`fieldfix._motion_kernels` at a pose.

        ``jmap[0]`` is the column ``Q^-1 e_pe = B R^T a`` of the inverse voxel map (``a`` the
        phase-encode voxel axis in world mm, ``B`` the inverse of the grid's 3x3 affine) and
        ``jmap[1 + k] = -B R^T (e_k x a)`` its derivative for a rotation about world axis k
        applied after ``R``.
        """
        affine = self.affine
        ymap = state.rotation @ np.concatenate([affine[:3, :3], (affine[:3, 3] - centre_mm)[:, None]], axis=1)
        inverse = np.linalg.inv(affine)
        offset = inverse[:3, :3] @ (centre_mm + state.translation_mm) + inverse[:3, 3]
        back = inverse[:3, :3] @ state.rotation.T
        axis = affine[:3, self.pe_axis]
        jmap = np.stack([back @ axis] + [-back @ np.cross(np.eye(3)[k], axis) for k in range(3)])
        return ymap, np.concatenate([inverse[:3, :3], offset[:, None]], axis=1), jmap

    def normal(self, samples, state: _pose.RigidState, centre_mm, parallel=None):
        """Normalised cost ``sum w r^2 / sum w still^2``, its gradient and Gauss-Newton matrix."""
        ymap, pmap, jmap = self.maps(state, centre_mm)
        sums = _motion_kernels.normal_equations(samples, self.ijk, self.shift_vox, self.shift_gradient, self.weight,
                                                self.still, ymap, pmap, jmap, self.jacobian_floor, self.pe_axis,
                                                parallel=parallel)
        scale = 1.0 / max(float(sums[29]), 1e-300)
        matrix = np.zeros((6, 6))
        matrix[np.triu_indices(6)] = sums[7:28]
        matrix = matrix + np.triu(matrix, 1).T
        return float(sums[0]) * scale, sums[1:7] * scale, matrix * scale


def _level(reference, shift, gradient, trusted, affine, factor, pe_axis, centre, options) -> PoseLevel:
    """Pick the voxels of one level (trusted, off the faces, inside at rest, strongest edges)."""
    _, level_affine = _pose.level_grid(reference.shape, affine, factor)
    samples = _motion_kernels.block_mean(reference, factor)
    level_shift = _motion_kernels.block_mean(shift, factor) / factor
    weight = _motion_kernels.block_mean(trusted, factor)
    margin = max(1, int(np.ceil(options.margin_vox / factor)))
    keep = np.zeros(samples.shape, bool)
    keep[margin:-margin, margin:-margin, margin:-margin] = True
    keep &= weight > 0
    ijk = np.argwhere(keep)
    edges = np.sqrt(sum(g * g for g in np.gradient(samples)))[keep]
    cap = max(int(options.voxels_per_level // factor), 6)
    if len(ijk) > cap:
        ijk = ijk[np.sort(np.argsort(edges, kind="stable")[-cap:])]
    index = tuple(ijk.T)
    level_gradient = np.stack([_motion_kernels.block_mean(g, factor)[index] for g in gradient], axis=1)
    level = PoseLevel(int(factor), level_affine, int(pe_axis), np.ascontiguousarray(ijk, np.int64),
                      level_shift[index], level_gradient, weight[index], np.zeros(len(ijk)),
                      float(options.jacobian_floor))
    ymap, pmap, _ = level.maps(_pose.RigidState(np.zeros(3), np.eye(3)), centre)
    values = _motion_kernels.pull_values(samples, level.ijk, level.shift_vox, ymap, pmap, pe_axis)
    inside = np.isfinite(values)
    jacobian = np.maximum(1.0 + level_gradient[inside, pe_axis], options.jacobian_floor)  # at rest
    return PoseLevel(level.factor, level_affine, level.pe_axis, level.ijk[inside], level.shift_vox[inside],
                     level_gradient[inside], level.weight[inside], jacobian * values[inside], level.jacobian_floor)


@dataclass(frozen=True)
class VolumePose:
    """Pose of one volume against the reference (reference world -> volume world).

    Attributes
    ----------
    translation_mm, rotation_deg : tuple of 3 floats (conventions of :mod:`fieldfix.align`)
    matrix : (4, 4) array
    cost_before, cost_after : float, normalised least squares on the finest level at the start
        pose and at the result
    iterations : int, cost evaluations over all levels
    converged : bool
    """

    translation_mm: tuple
    rotation_deg: tuple
    matrix: np.ndarray
    cost_before: float
    cost_after: float
    iterations: int
    converged: bool


@dataclass(frozen=True)
class MotionResult:
    """Poses of a whole run.

    Attributes
    ----------
    translation_mm, rotation_deg : (n_volumes, 3) arrays
    framewise_displacement_mm : (n_volumes,) array (Power et al. 2012; 0 for the first volume)
    cost_after : (n_volumes,) array
    converged : (n_volumes,) bool array
    warnings : tuple of str
    """

    translation_mm: np.ndarray
    rotation_deg: np.ndarray
    framewise_displacement_mm: np.ndarray
    cost_after: np.ndarray
    converged: np.ndarray
    warnings: tuple = field(default_factory=tuple)


def align_motion_model(
    reference: np.ndarray,
    run_affine: np.ndarray,
    b0_hz: np.ndarray,
    readout: Readout,
    options: MotionOptions = MotionOptions(),
) -> MotionModel:
    """Build the motion model of a run from its reference volume and the field aligned to it.

    Parameters
    ----------
    reference : (X, Y, Z) array, the reference volume (distorted EPI)
    run_affine : (4, 4) array
    b0_hz : (X, Y, Z) array, Hz, the field on the run grid where the head is in `reference`
    readout : Readout
    options : MotionOptions

    Returns
    -------
    MotionModel

    Examples
    --------
    >>> import numpy as np
    >>> vol = np.zeros((12, 12, 8)); vol[3:9, 3:9, 2:6] = 1.0
    >>> model = align_motion_model(vol, np.eye(4), np.zeros_like(vol), Readout("j", 5e-4))
    >>> model.shape, model.pe_axis
    ((12, 12, 8), 1)
    """
    reference = _pose.checked_volume(reference, "reference")
    b0_hz = _pose.checked_volume(b0_hz, "b0_hz")
    if b0_hz.shape != reference.shape:
        raise GeometryError(f"b0_hz {b0_hz.shape} must be on the run grid {reference.shape}")
    _pose.require_anatomy(reference, "reference")
    affine = _pose.checked_affine(run_affine, "run_affine")
    axis, _ = parse_pe_code(readout.pe_code)
    kappa = readout.shift_per_hz(reference.shape)
    shift = kappa * b0_hz
    centre = affine[:3, :3] @ ((np.array(reference.shape) - 1) / 2.0) + affine[:3, 3]
    gradient = np.stack(np.gradient(shift))
    trusted = (np.abs(gradient[axis]) < TRUSTED_SHIFT_GRADIENT).astype(float)
    levels = [_level(reference, shift, gradient, trusted, affine, factor, axis, centre, options)
              for factor in options.levels]
    levels = tuple(level for level in levels if len(level.ijk) >= MIN_POSE_VOXELS)  # small grids: fewer levels
    if not levels:
        raise InputError(f"reference {reference.shape}: fewer than {MIN_POSE_VOXELS} voxels away from the grid's "
                         f"faces on every level; a pose needs more than {2 * options.margin_vox + 4} voxels along "
                         f"every axis")
    return MotionModel(tuple(reference.shape), affine, axis, kappa, centre, shift, gradient, levels, options)


def _pose_result(model: MotionModel, state: _pose.RigidState, costs, iterations, converged) -> VolumePose:
    matrix = np.eye(4)
    matrix[:3, :3] = state.rotation
    matrix[:3, 3] = model.centre_mm + state.translation_mm - state.rotation @ model.centre_mm
    translation, angles = _pose.pose_parameters(matrix, model.centre_mm)
    return VolumePose(translation_mm=tuple(float(v) for v in translation),
                      rotation_deg=tuple(float(v) for v in np.rad2deg(angles)), matrix=matrix,
                      cost_before=float(costs[0]), cost_after=float(costs[1]), iterations=int(iterations),
                      converged=bool(converged))


def align_volume_pose(model: MotionModel, volume: np.ndarray, start: VolumePose | None = None) -> VolumePose:
    """Estimate one volume's pose against the reference, distortion-aware (see the module docstring).

    Parameters
    ----------
    model : MotionModel
    volume : (X, Y, Z) array on the run grid
    start : VolumePose, optional, initial pose (e.g. the previous volume's); identity if None

    Returns
    -------
    VolumePose
    """
    return _estimate(model, _run_volume(model, volume), start)


def _estimate(model: MotionModel, volume: np.ndarray, start: VolumePose | None) -> VolumePose:
    state = _start_state(start)
    passes, result, samples = 0, None, _pyramid(volume, [level.factor for level in model.levels])
    for level in model.levels:
        result = _pose.gauss_newton(
            lambda s, level=level: level.normal(samples[level.factor], s, model.centre_mm, model.options.parallel),
            state, model.options.rule(level.factor))
        state, passes = result.state, passes + result.passes
    finest = model.levels[-1]
    first = result.cost_start if len(model.levels) == 1 else finest.normal(
        samples[finest.factor], _start_state(start), model.centre_mm, model.options.parallel)[0]
    return _pose_result(model, state, (first, result.cost), passes, result.converged)


def _pyramid(volume, factors) -> dict:
    """Block means of `volume` for each factor, each made from the coarsest finished level whose
    block size divides it (zero padding makes the two ways equal)."""
    done = {1: volume}
    for factor in sorted(set(factors)):
        finer = max(f for f in done if factor % f == 0)
        done[factor] = _motion_kernels.block_mean(done[finer], factor // finer)
    return done


def _start_state(start: VolumePose | None) -> _pose.RigidState:
    if start is None:
        return _pose.RigidState(np.zeros(3), np.eye(3))
    return _pose.RigidState(np.asarray(start.translation_mm, float),
                            _pose.rotation_matrix(np.deg2rad(start.rotation_deg)))


def align_resample_volume(model: MotionModel, volume: np.ndarray, pose: VolumePose,
                          out: np.ndarray | None = None) -> np.ndarray:
    """Correct one volume for motion and distortion in a single cubic B-spline interpolation.

    Parameters
    ----------
    model : MotionModel
    volume : (X, Y, Z) array, the volume as acquired
    pose : VolumePose, its pose (e.g. from :func:`align_volume_pose`)
    out : (X, Y, Z) float32 C-contiguous array, optional

    Returns
    -------
    (X, Y, Z) float32 array: the volume in the reference position, undistorted, with the
    Jacobian intensity correction; zero where the source lies beyond half a voxel outside.

    Examples
    --------
    >>> import numpy as np
    >>> vol = np.zeros((12, 12, 8)); vol[3:9, 3:9, 2:6] = 1.0
    >>> model = align_motion_model(vol, np.eye(4), np.zeros_like(vol), Readout("j", 5e-4))
    >>> still = VolumePose((0.0, 0.0, 0.0), (0.0, 0.0, 0.0), np.eye(4), 0.0, 0.0, 0, True)
    >>> bool(np.allclose(align_resample_volume(model, vol, still), vol, atol=1e-5))
    True
    """
    return _resample(model, _run_volume(model, volume), pose, out)


def _run_volume(model: MotionModel, volume) -> np.ndarray:
    volume = _pose.checked_volume(volume, "volume")
    if volume.shape != model.shape:
        raise GeometryError(f"volume shape {volume.shape} differs from the run grid {model.shape}")
    return volume


def _resample(model: MotionModel, volume: np.ndarray, pose: VolumePose, out=None) -> np.ndarray:
    parallel = model.options.parallel
    voxel_map = np.linalg.inv(model.affine) @ np.asarray(pose.matrix, float) @ model.affine
    column = np.linalg.inv(voxel_map)[:3, model.pe_axis]
    coef = _motion_kernels.prefilter_cubic(volume, parallel=parallel)
    return _motion_kernels.resample_rigid_shift(coef, voxel_map[:3], model.shift_vox, model.shift_gradient, column,
                                                model.options.jacobian_floor, model.pe_axis, out=out,
                                                parallel=parallel)


def _volumes(run):
    shape = getattr(run, "shape", None)
    if shape is None or len(shape) != 4:
        raise InputError(f"run must be a 4D array-like (volumes along the last axis), got shape {shape}")
    return int(shape[3])


def align_run_volumes(run, model: MotionModel, *, resample: bool = True, progress: bool = False):
    """Go through a run volume by volume: estimate each pose, and correct the volume once.

    Parameters
    ----------
    run : 4D array-like (numpy array, memory map or nibabel ``dataobj``), volumes on the last axis;
        only one volume is read at a time, so memory does not grow with the run's length
    model : MotionModel
    resample : bool, also yield the corrected volume (else None)
    progress : bool, show a progress bar

    Yields
    ------
    (t, VolumePose, corrected) : int, VolumePose, (X, Y, Z) float32 array or None
    """
    n_volumes = _volumes(run)
    pose = None
    for t in progress_bar(range(n_volumes), total=n_volumes, desc="motion", enabled=progress, unit="vol"):
        volume = _run_volume(model, run[..., t])
        pose = _estimate(model, volume, pose)
        yield t, pose, (_resample(model, volume, pose) if resample else None)


def align_motion(run, model: MotionModel, *, progress: bool = False) -> MotionResult:
    """Poses of every volume of a run (estimation only; see :func:`align_run_volumes` to correct).

    Returns
    -------
    MotionResult, with a warning for volumes that did not converge or moved far.
    """
    poses = [pose for _, pose, _ in align_run_volumes(run, model, resample=False, progress=progress)]
    return align_motion_result(poses)


def align_motion_result(poses) -> MotionResult:
    """The poses of a run's volumes, in order, as one :class:`MotionResult`, with a warning for
    volumes that did not converge or moved more than ``LARGE_MOTION`` (mm or degrees) from the
    reference."""
    translation = np.array([p.translation_mm for p in poses], float).reshape(-1, 3)
    rotation = np.array([p.rotation_deg for p in poses], float).reshape(-1, 3)
    converged = np.array([p.converged for p in poses], bool)
    warnings = []
    if not converged.all():
        warnings.append(f"the pose did not converge for volume(s) {', '.join(map(str, np.flatnonzero(~converged)))}")
    far = np.flatnonzero(np.maximum(np.abs(translation).max(axis=1, initial=0.0),
                                    np.abs(rotation).max(axis=1, initial=0.0)) > LARGE_MOTION)
    if far.size:
        warnings.append(f"volume(s) {', '.join(map(str, far))} moved more than {LARGE_MOTION:g} mm or degrees "
                        "from the reference; inspect them")
    return MotionResult(translation, rotation, align_framewise_displacement(translation, rotation),
                        np.array([p.cost_after for p in poses], float), converged, tuple(warnings))


def align_framewise_displacement(translation_mm, rotation_deg, radius_mm: float = FD_RADIUS_MM) -> np.ndarray:
    """Framewise displacement (Power et al. 2012), mm, one value per volume (0 for the first).

    ``FD_t = sum_i |p_i(t) - p_i(t - 1)|`` over the three translations (mm) and the three
    rotations turned into arc lengths on a sphere of `radius_mm` (radians x radius).

    Examples
    --------
    >>> align_framewise_displacement([[0, 0, 0], [0, 0, 0]], [[0, 0, 0], [1, 0, 0]]).round(4).tolist()
    [0.0, 0.8727]
    """
    translation = np.asarray(translation_mm, float).reshape(-1, 3)
    rotation = np.asarray(rotation_deg, float).reshape(-1, 3)
    if translation.shape != rotation.shape:
        raise InputError(f"translation_mm {translation.shape} and rotation_deg {rotation.shape} differ in length")
    params = np.concatenate([translation, np.deg2rad(rotation) * float(radius_mm)], axis=1)
    fd = np.zeros(len(params))
    if len(params) > 1:
        fd[1:] = np.abs(np.diff(params, axis=0)).sum(axis=1)
    return fd


#: Column names of the motion table (units in the names).
TSV_COLUMNS = ("volume", "shift_x_mm", "shift_y_mm", "shift_z_mm", "turn_x_deg", "turn_y_deg", "turn_z_deg",
               "framewise_displacement_mm")


def align_motion_tsv(result: MotionResult) -> str:
    """Format a motion table as tab-separated text (no file is written).

    One header line with the units in the column names (world mm and degrees, the conventions
    of :mod:`fieldfix.align`), then one row per volume: index, three translations, three
    rotations and the framewise displacement (Power et al. 2012).

    Examples
    --------
    >>> r = MotionResult(np.zeros((2, 3)), np.array([[0, 0, 0], [0.5, 0, 0]]), np.array([0.0, 0.436]),
    ...                  np.zeros(2), np.ones(2, bool))
    >>> align_motion_tsv(r).splitlines()[2].split()
    ['1', '0.0000', '0.0000', '0.0000', '0.5000', '0.0000', '0.0000', '0.4360']
    """
    lines = ["\t".join(TSV_COLUMNS)]
    for t, (shift, turn, fd) in enumerate(zip(result.translation_mm, result.rotation_deg,
                                              result.framewise_displacement_mm)):
        values = [*shift, *turn, fd]
        lines.append("\t".join([str(t)] + [f"{float(v):.4f}" for v in values]))
    return "\n".join(lines) + "\n"
