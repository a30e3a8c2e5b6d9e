"""Put the field where the head is: rigid alignment of a field map to an EPI run.

The field map is acquired minutes before or after the EPI runs; placing it through the two
images' affines alone is right only if the head did not move in between. :func:`align_fieldmap`
estimates the rigid transform between the field map's anatomy (its magnitude image) and the run's
reference volume, with the distortion in the loop, and :func:`align_field_to_run` resamples the
field onto the run through that transform.

Method
------
* Cost across contrasts: normalised gradient fields (Haber and Modersitzki 2006, MICCAI 2006,
  LNCS 4191:726; from memory): one minus the mean squared cosine between the edges of the
  prediction and of the EPI, insensitive to contrast inversion.
* Distortion in the loop: at each pose the field-map magnitude is resampled onto the run grid
  through the pose, shifted along the phase-encode axis by the field resampled the same way (the
  map follows the head) with the signal-conserving forward model (the rule of
  :func:`fieldfix.unwarp.distort`) and only then compared with the EPI, so the registration does
  not absorb the distortion.
* Exact gradients of the discrete cost with respect to the six parameters (through the trilinear
  sampling, the forward model's overlap rule and the rigid map), minimised by L-BFGS
  (scipy.optimize) over a resolution pyramid of the run grid (blocks of 4, 2, 1 voxels; the
  magnitude smoothed to each level's voxel size).
* Convergence rule (:class:`fieldfix._pose.StopRule`): a level stops when no translation moves
  by 0.01 mm or more and no rotation by 0.01 degree or more between two iterations (scaled by the
  block size on coarse levels), or the cost changes by less than 1e-7 of itself.

Conventions
-----------
Parameters are ``translation_mm`` (world x = R, y = A, z = S; NIfTI RAS+) and ``rotation_deg``
about world x, y, z through ``centre_mm`` (the world position of the run grid's central voxel,
``(n - 1) / 2`` on each axis), applied x first, then y, then z (``R = Rz @ Ry @ Rx``, each
right-handed; a positive rotation about x raises the anterior of the head). The 4x4 ``matrix``
maps a point of the head in field-map world coordinates to the same point in run world
coordinates: ``y = R (x - c) + c + t``.

Research software, not a medical device: inspect corrected images before they are used for any
decision about a person.

Examples
--------
>>> import numpy as np
>>> result_matrix = np.eye(4)
>>> field, inside = align_field_to_run(np.full((8, 8, 8), 5.0), np.eye(4), (4, 4, 4), np.eye(4),
...                                    result_matrix)
>>> float(field[1, 1, 1]), bool(inside.all())
(5.0, True)
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from . import _pose
from .errors import GeometryError
from .geometry import parse_pe_code, resample_to_grid, voxel_sizes_mm
from .shift import Readout

__all__ = [
    "AlignOptions",
    "FieldmapAlignment",
    "align_rigid_matrix",
    "align_rigid_parameters",
    "align_fieldmap",
    "align_field_to_run",
    "normalised_mutual_information",
]

@dataclass(frozen=True)
class AlignOptions(_pose.PyramidSearch):
    """Options of :func:`align_fieldmap`.

    Attributes
    ----------
    levels, max_iterations, step_mm, step_deg, relative_cost : the pyramid and its convergence
        rule (see :class:`fieldfix._pose.PyramidSearch` and the module docstring)
    edge_fraction : float, NGF edge parameter as a fraction of the mean gradient magnitude
    min_overlap : float, fraction of run voxels the field map must cover at the start (else refused)
    warn_overlap : float, below this fraction after alignment the result carries a warning
    """

    edge_fraction: float = 0.3
    min_overlap: float = 0.05
    warn_overlap: float = 0.5


@dataclass(frozen=True)
class FieldmapAlignment:
    """Result of :func:`align_fieldmap`.

    Attributes
    ----------
    matrix : (4, 4) array, field-map world -> run world (head points), mm
    translation_mm : tuple of 3 floats, world x, y, z
    rotation_deg : tuple of 3 floats, about world x, y, z through `centre_mm` (``R = Rz Ry Rx``)
    centre_mm : tuple of 3 floats, the rotation centre (run grid centre), world mm
    cost_before, cost_after : float, NGF cost (0 = all edges parallel) at the affine-only
        placement and at the result, on the finest level
    measure_before, measure_after : float
        Normalised mutual information (Studholme, Hill and Hawkes 1999, Pattern Recognit.
        32:71; from memory) of the forward-distorted magnitude and the EPI over 32 x 32
        intensity bins, inside the voxels where either has signal; 1 = independent, 2 = identical.
    iterations : int, L-BFGS iterations over all levels
    converged : bool, the convergence rule was met on the finest level
    coverage : float, fraction of run voxels inside the field map's field of view at the result
    warnings : tuple of str
    """

    matrix: np.ndarray
    translation_mm: tuple
    rotation_deg: tuple
    centre_mm: tuple
    cost_before: float
    cost_after: float
    measure_before: float
    measure_after: float
    iterations: int
    converged: bool
    coverage: float
    warnings: tuple = field(default_factory=tuple)


def align_rigid_matrix(translation_mm, rotation_deg, centre_mm) -> np.ndarray:
    """4x4 rigid map ``y = R (x - c) + c + t`` with ``R = Rz @ Ry @ Rx`` (angles in degrees).

    Examples
    --------
    >>> m = align_rigid_matrix((1.0, 0.0, 0.0), (0.0, 0.0, 90.0), (0.0, 0.0, 0.0))
    >>> np.round(m @ [1.0, 0.0, 0.0, 1.0], 6).tolist()
    [1.0, 1.0, 0.0, 1.0]
    """
    return _pose.pose_matrix(np.asarray(translation_mm, float), np.deg2rad(np.asarray(rotation_deg, float)),
                             np.asarray(centre_mm, float))


def align_rigid_parameters(matrix, centre_mm) -> tuple[np.ndarray, np.ndarray]:
    """(translation_mm, rotation_deg) of a rigid 4x4 matrix, inverse of :func:`align_rigid_matrix`.

    Examples
    --------
    >>> t, r = align_rigid_parameters(align_rigid_matrix((1, 2, 3), (4, 5, 6), (10, 0, 0)), (10, 0, 0))
    >>> np.round(t, 6).tolist(), np.round(r, 6).tolist()
    ([1.0, 2.0, 3.0], [4.0, 5.0, 6.0])
    """
    translation, angles = _pose.pose_parameters(matrix, centre_mm)
    return translation, np.rad2deg(angles)


def normalised_mutual_information(a: np.ndarray, b: np.ndarray, bins: int = 32) -> float:
    """``(H(a) + H(b)) / H(a, b)`` over voxels where either image is non-zero (Studholme et al. 1999).

    Examples
    --------
    >>> x = np.arange(1000.0).reshape(10, 10, 10)
    >>> round(normalised_mutual_information(x, x), 3)
    2.0
    """
    a, b = np.asarray(a, float).ravel(), np.asarray(b, float).ravel()
    keep = (a != 0) | (b != 0)
    if keep.sum() < 2:
        return 1.0
    joint, _, _ = np.histogram2d(a[keep], b[keep], bins=bins)
    p = joint / joint.sum()

    def entropy(q):
        q = q[q > 0]
        return float(-(q * np.log(q)).sum())

    h_joint = entropy(p)
    return (entropy(p.sum(axis=0)) + entropy(p.sum(axis=1))) / h_joint if h_joint > 0 else 2.0


# ---------------------------------------------------------------------------------------------
# Checks
# ---------------------------------------------------------------------------------------------

# ---------------------------------------------------------------------------------------------
# Levels and the alignment
# ---------------------------------------------------------------------------------------------

@dataclass(frozen=True)
class _Inputs:
    magnitude: np.ndarray
    b0_hz: np.ndarray
    fieldmap_affine: np.ndarray
    target: np.ndarray        # run reference on the working grid (PE last)
    target_affine: np.ndarray
    kappa: float              # shift per Hz along the working grid's last axis
    centre_mm: np.ndarray


def _inputs(magnitude, b0_hz, fieldmap_affine, reference, run_affine, readout: Readout) -> _Inputs:
    magnitude = _pose.checked_volume(magnitude, "magnitude")
    b0_hz = _pose.checked_volume(b0_hz, "b0_hz")
    reference = _pose.checked_volume(reference, "reference")
    if magnitude.shape != b0_hz.shape:
        raise GeometryError(f"magnitude {magnitude.shape} and b0_hz {b0_hz.shape} must share the field-map grid")
    _pose.require_anatomy(magnitude, "magnitude")
    _pose.require_anatomy(reference, "reference")
    fieldmap_affine = _pose.checked_affine(fieldmap_affine, "fieldmap_affine")
    run_affine = _pose.checked_affine(run_affine, "run_affine")
    axis, _ = parse_pe_code(readout.pe_code)
    kappa = readout.shift_per_hz(reference.shape)
    order = _pose.working_order(axis)
    centre = run_affine[:3, :3] @ ((np.array(reference.shape) - 1) / 2.0) + run_affine[:3, 3]
    return _Inputs(magnitude, b0_hz, fieldmap_affine, np.ascontiguousarray(reference.transpose(order)),
                   _pose.permuted_affine(run_affine, order), kappa, centre)


def _level_problem(inputs: _Inputs, factor: int, params, edge_fraction: float) -> _pose.Problem:
    shape, affine = _pose.level_grid(inputs.target.shape, inputs.target_affine, factor)
    target = _pose.block_mean(inputs.target, factor)
    voxel = float(np.prod(voxel_sizes_mm(affine)) ** (1 / 3))
    source = _pose.smoothed_for(inputs.magnitude, inputs.fieldmap_affine, voxel)
    problem = _pose.Problem(source, np.ascontiguousarray(inputs.b0_hz), inputs.fieldmap_affine, shape, affine,
                            inputs.kappa / factor, inputs.centre_mm)
    prediction, _ = problem.predict(params)
    spacing = voxel_sizes_mm(affine)
    cost = _pose.make_ngf(target, spacing, prediction, edge_fraction)
    return _pose.Problem(source, problem.field_hz, inputs.fieldmap_affine, shape, affine, problem.kappa,
                         inputs.centre_mm, cost)


def _measures(problem: _pose.Problem, target: np.ndarray, params) -> tuple[float, float]:
    cost, _ = problem.evaluate(params)
    prediction, _ = problem.predict(params)
    return cost, normalised_mutual_information(prediction, target)


def align_fieldmap(
    magnitude: np.ndarray,
    b0_hz: np.ndarray,
    fieldmap_affine: np.ndarray,
    reference: np.ndarray,
    run_affine: np.ndarray,
    readout: Readout,
    options: AlignOptions = AlignOptions(),
) -> FieldmapAlignment:
    """Estimate the rigid transform that puts the field map's head where the run's head is.

    Parameters
    ----------
    magnitude : (X, Y, Z) array
        Field-map magnitude (any contrast, any units), undistorted.
    b0_hz : (X, Y, Z) array
        The field map in Hz on the same grid (defined, e.g. extended, everywhere).
    fieldmap_affine : (4, 4) array, field-map voxel -> world mm
    reference : (X', Y', Z') array
        The run's reference volume (distorted EPI).
    run_affine : (4, 4) array, run voxel -> world mm
    readout : Readout
        Phase-encode code and effective echo spacing of the run.
    options : AlignOptions

    Returns
    -------
    FieldmapAlignment
        See the module docstring for the conventions. The result always comes back; when the
        registration did not converge, left little overlap, moved far or made the match worse,
        its ``warnings`` say so.

    Raises
    ------
    InputError
        Non-finite values, an all-zero or constant magnitude or reference, a bad readout.
    GeometryError
        Mismatched grids, a singular affine, or a field map that does not overlap the run.

    Examples
    --------
    >>> import numpy as np
    >>> i, j, k = np.indices((20, 20, 12), dtype=float)
    >>> def head(x0):
    ...     shape = np.exp(-((i - x0) ** 2 + (j - 9.5) ** 2 + ((k - 5.5) * 1.5) ** 2) / 18.0)
    ...     return shape * (1 + 0.3 * np.sin((i - x0 + 9.5) / 2.0) * np.cos(j / 3.0))
    >>> affine = np.diag([3.0, 3.0, 3.0, 1.0])
    >>> result = align_fieldmap(head(9.5), np.zeros((20, 20, 12)), affine, head(10.0), affine, Readout("j", 5e-4))
    >>> round(result.translation_mm[0], 1)  # half a 3 mm voxel to the right
    1.5
    """
    inputs = _inputs(magnitude, b0_hz, fieldmap_affine, reference, run_affine, readout)
    params = np.zeros(6)
    finest = _level_problem(inputs, 1, params, options.edge_fraction)
    start_coverage = finest.coverage(params)
    if start_coverage < options.min_overlap:
        raise GeometryError(f"fieldmap_affine: the field map covers {100 * start_coverage:.1f}% of the run's "
                            f"voxels; it does not overlap the run's field of view")
    before = _measures(finest, inputs.target, params)
    iterations, solution = 0, None
    for factor in options.levels:
        problem = finest if factor == 1 else _level_problem(inputs, factor, params, options.edge_fraction)
        solution = _pose.minimise(problem, params, options.rule(factor))
        params, iterations = solution.params, iterations + solution.iterations
    after = _measures(finest, inputs.target, params)
    return _result(inputs, params, before, after, iterations, solution, finest.coverage(params), options)


def _result(inputs, params, before, after, iterations, solution, coverage, options) -> FieldmapAlignment:
    matrix = _pose.pose_matrix(params[:3], params[3:], inputs.centre_mm)
    translation, rotation = params[:3], np.rad2deg(params[3:])
    converged = bool(solution is not None and solution.converged and options.levels[-1] == 1)
    warnings = []
    if not converged:
        warnings.append(f"the registration did not converge within {options.max_iterations} iterations on the "
                        f"finest level; the placement may be wrong")
    if coverage < options.warn_overlap:
        warnings.append(f"the field map covers only {100 * coverage:.0f}% of the run's voxels after alignment")
    if np.abs(translation).max() > 20.0 or np.abs(rotation).max() > 15.0:
        warnings.append("the head moved more than 20 mm or 15 degrees between field map and run; check the "
                        "result by eye")
    if after[0] > before[0]:
        warnings.append("the alignment did not improve the edge match (NGF cost rose); the placement may be wrong")
    return FieldmapAlignment(matrix=matrix, translation_mm=tuple(float(v) for v in translation),
                             rotation_deg=tuple(float(v) for v in rotation),
                             centre_mm=tuple(float(v) for v in inputs.centre_mm), cost_before=before[0],
                             cost_after=after[0], measure_before=before[1], measure_after=after[1],
                             iterations=int(iterations), converged=converged, coverage=float(coverage),
                             warnings=tuple(warnings))


def align_field_to_run(
    b0_hz: np.ndarray,
    fieldmap_affine: np.ndarray,
    run_shape: tuple,
    run_affine: np.ndarray,
    matrix: np.ndarray,
    *,
    order: int = 3,
) -> tuple[np.ndarray, np.ndarray]:
    """Resample a field map (Hz) onto a run's grid through an alignment (the map follows the head).

    The field-map voxels sit at ``matrix @ fieldmap_affine`` in run world coordinates, so the
    resampling is :func:`fieldfix.geometry.resample_to_grid` with that source affine (edge
    values outside the field map's field of view, reported in ``inside``).

    Parameters
    ----------
    b0_hz : (X, Y, Z) array, Hz, field-map grid
    fieldmap_affine : (4, 4) array
    run_shape : tuple, the run grid's shape (first three entries used)
    run_affine : (4, 4) array
    matrix : (4, 4) array
        Field-map world -> run world, e.g. ``align_fieldmap(...).matrix``.
    order : {0, 1, 3}, interpolation order

    Returns
    -------
    b0_hz_on_run : (X', Y', Z') float64, Hz
    inside : (X', Y', Z') bool

    Examples
    --------
    >>> import numpy as np
    >>> shift_1mm = np.eye(4); shift_1mm[0, 3] = 1.0
    >>> ramp = np.broadcast_to(np.arange(8.0)[:, None, None], (8, 8, 8))
    >>> moved, _ = align_field_to_run(ramp, np.eye(4), (8, 8, 8), np.eye(4), shift_1mm, order=1)
    >>> float(moved[4, 4, 4])
    3.0
    """
    b0_hz = _pose.checked_volume(b0_hz, "b0_hz")
    matrix = _pose.checked_affine(matrix, "matrix")
    source_affine = matrix @ _pose.checked_affine(fieldmap_affine, "fieldmap_affine")
    return resample_to_grid(b0_hz, source_affine, tuple(run_shape), _pose.checked_affine(run_affine, "run_affine"), order=order)
