"""B0 field from EPI images with reversed phase encoding ("blip up / blip down"), and joint restoration.

The same field moves signal forward along the phase-encode (PE) axis in one image and
backward in the image of opposite polarity (:mod:`fieldfix.shift`:
``shift_vox = sign * b0_hz * echo_spacing_s * n_pe_lines``, Jacobian ``1 + d shift / d y``).
:func:`field_from_pairs` finds the smooth field under which all images, each unwarped
with its own shift and Jacobian, agree; :func:`restore_jointly` combines the images of
both polarities into one corrected image by least squares.

Method (field)
--------------
* Idea: Chang & Fitzpatrick 1992 (IEEE Trans Med Imaging 11(3):319-329, from memory)
  showed that the two polarities determine the displacement, line by line, from the
  equality of the integrated intensities (their line-integral method). This module does
  not integrate lines; it fits a smooth field to the whole volume by least squares, as
  Andersson, Skare & Ashburner 2003 (NeuroImage 20(2):870-888, from memory) did: a
  cubic B-spline field, each image unwarped with the Jacobian intensity modulation inside
  the cost, both polarities treated alike (the symmetric form of Holland, Kuperman &
  Dale 2010, NeuroImage 50(1):175-183, from memory). Cost, gradient and the bending
  penalty are written out in :mod:`fieldfix._pairs_model`.
* Images with the same (code, echo spacing, PE lines) form a *group*; a group of several
  volumes is averaged after rigid alignment of its volumes to the first one
  (least squares, :mod:`fieldfix._pairs_rigid`). Groups may use any PE axes (e.g.
  ``j, j-, i, i-``); at least one opposite pair on one axis is required.
* Intensity: distortion conserves the summed signal (apart from what leaves the field of
  view), so each group is scaled by ``mean_sums / its_sum`` before the fit (robust to a
  global intensity difference), and all by one factor that makes the mean in the signal
  region 1.
* Coarse to fine (:data:`DEFAULT_LEVELS`): at each level the images are smoothed
  (Gaussian, ``fwhm_vox`` input voxels), block-averaged by ``subsample``, and the field is a
  cubic B-spline with knots every ``knot_spacing_vox`` input voxels; the coefficients are
  refitted by least squares on the next level's knots.
* Optimiser: scipy's L-BFGS-B per level with the analytic gradient (numba kernels in
  :mod:`fieldfix._pairs_kernels`), at most ``max_iterations`` iterations per level.
* Motion (``PairOptions.motion``): a rigid motion of each group relative to the first is
  estimated by alternating with the field on the same cost: after each field fit the
  corrected group images are registered rigidly (least squares), and the next fit
  compares ``C_g(T_g x)`` with the others while group g's field is ``b(T_g^-1 y)`` (the
  field moves with the head). The field is in the first group's frame. Motion along the
  PE axis (translation, and the PE components of the rotations) cannot be told from a
  field that is uniform or linear across the other axes, since both move the two
  polarities rigidly apart: such motion ends up in the field.
* Robustness: the image differences enter through a Cauchy loss (``robust_scale``), so
  voxels the model cannot match (folds, pile-ups, ringing at sharp edges) do not drag the
  field along whole PE lines.

Examples
--------
>>> import numpy as np
>>> from fieldfix.unwarp import distort_with_field
>>> profile = np.exp(-((np.arange(48.0) - 24) / 6) ** 2)  # a blob along the PE axis (y)
>>> obj, field = profile[None, :, None] * np.ones((12, 48, 12)), np.full((12, 48, 12), 40.0)
>>> enc = [PhaseEncoding("j", 5e-4), PhaseEncoding("j-", 5e-4)]  # blip up, blip down
>>> images = [distort_with_field(obj, field, e.pe_code, e.echo_spacing_s) for e in enc]
>>> result = field_from_pairs(images, enc, (2.5, 2.5, 2.5))
>>> bool(abs(np.median(result.b0_hz[result.mask]) - 40.0) < 2.0)
True
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize
from threadpoolctl import threadpool_limits

from . import _pairs_kernels as kernels
from . import _pairs_model as model
from . import _pairs_rigid as rigid
from .errors import GeometryError, InputError, MetadataError
from .geometry import parse_pe_code, voxel_sizes_mm
from .shift import DEFAULT_JACOBIAN_FLOOR
from .unwarp import unwarp_array

__all__ = ["PhaseEncoding", "PairLevel", "PairOptions", "PairFieldResult", "DEFAULT_LEVELS",
           "RESTORE_PENALTY", "field_from_pairs", "restore_jointly", "pair_agreement"]


@dataclass(frozen=True)
class PhaseEncoding:
    """How one image was phase-encoded.

    Attributes
    ----------
    pe_code : str
        BIDS ``PhaseEncodingDirection`` (``i j k i- j- k-``).
    echo_spacing_s : float
        Effective echo spacing, s (``TotalReadoutTime / (n_pe_lines - 1)``).
    n_pe_lines : int, optional
        Reconstructed PE matrix size; default: the grid's size along the PE axis.
    """

    pe_code: str
    echo_spacing_s: float | None
    n_pe_lines: int | None = None


@dataclass(frozen=True)
class PairLevel:
    """One resolution of the coarse-to-fine schedule (units: voxels of the input grid).

    Attributes
    ----------
    subsample : int
        Block size of the averaging per axis.
    fwhm_vox : float
        Full width at half maximum of the Gaussian smoothing before subsampling (0: none).
    knot_spacing_vox : float
        Distance between the B-spline knots of the field.
    """

    subsample: int
    fwhm_vox: float
    knot_spacing_vox: float


#: Default schedule: 4x subsampled and smoothed by 4 voxels with knots every 16 voxels, then
#: 2x / 2 voxels / 6, then full resolution / 1 voxel / 2 (5 mm knots at 2.5 mm voxels).
DEFAULT_LEVELS = (PairLevel(4, 4.0, 16.0), PairLevel(2, 2.0, 6.0), PairLevel(1, 1.0, 2.0))


@dataclass(frozen=True)
class PairOptions:
    """Options of :func:`field_from_pairs`.

    Attributes
    ----------
    levels : tuple of PairLevel
        Coarse-to-fine schedule, coarsest first.
    bending_weight_mm4_per_hz2 : float
        Weight of the mean bending energy (Hz/mm^2)^2 against the mean data term of images
        normalised to a signal mean of 1; units mm^4/Hz^2.
    laplacian_weight_mm4_per_hz2 : float
        Weight of the mean squared Laplacian of the field (Hz/mm^2)^2, mm^4/Hz^2 (0: off).
        Inside tissue of uniform susceptibility the field is harmonic, so this term
        leaves such fields free (follows from the dipole kernel; from memory).
    robust_scale : float or None
        Scale (in units of the normalised signal) of the Cauchy loss of the image
        differences; None for plain least squares. Caps the pull of voxels the model
        cannot match: folds, pile-ups, ringing at sharp edges.
    max_iterations : int
        L-BFGS iterations per level (per pass when motion is on).
    motion : bool
        Estimate a rigid motion of each polarity group relative to the first.
    motion_rounds : int
        Field / motion alternations per level when `motion` is on.
    align_within_groups : bool
        Rigidly align the volumes of a group to its first volume before averaging.
    interp : {'linear', 'cubic', 'sinc'}
        Interpolation of the corrected images in the result.
    """

    levels: tuple = DEFAULT_LEVELS
    bending_weight_mm4_per_hz2: float = 0.005
    laplacian_weight_mm4_per_hz2: float = 0.0
    robust_scale: float | None = 0.1
    max_iterations: int = 100
    motion: bool = False
    motion_rounds: int = 2
    align_within_groups: bool = True
    interp: str = "cubic"


@dataclass
class PairFieldResult:
    """Result of :func:`field_from_pairs`.

    Attributes
    ----------
    b0_hz : (X, Y, Z) float32
        Field in Hz, in the frame of the first group.
    mask : (X, Y, Z) bool
        Where the images carry signal (Otsu rule on the mean corrected image).
    extended : (X, Y, Z) bool
        Outside the mask: there the field is only the smooth extension of the fit.
    confidence : (X, Y, Z) float32 in [0, 1)
        ``h / (h + median_mask(h))`` with ``h`` the Gauss-Newton curvature of the data term
        per voxel (how strongly the images pin the field there), 0 outside the mask.
    corrected : (X, Y, Z, V) float32
        Every input volume unwarped with its own shift and Jacobian (its group's field).
    group_codes : tuple of str
        PE code of each group, in order of first appearance.
    group_of_volume : (V,) int
    motion_mm_deg : (G, 6) float64
        Rigid pull parameters of each group relative to the first (zeros without motion).
    volume_motion_mm_deg : (V, 6) float64
        Rigid parameters aligning each volume to the first of its group.
    nrmsd_before, nrmsd_after : float
        Agreement of the group images (see :func:`pair_agreement`): distorted
        (intensity-normalised) and corrected. Lower is better; the quality number.
    correlation_before, correlation_after : float
        Mean Pearson correlation between groups in the mask.
    iterations : tuple of int
        L-BFGS iterations per level (and per pass with motion).
    converged : bool
        Every L-BFGS run stopped on its tolerance before `max_iterations`.
    gains : (G,) float64
        Intensity factors applied to the groups.
    """

    b0_hz: np.ndarray
    mask: np.ndarray
    extended: np.ndarray
    confidence: np.ndarray
    corrected: np.ndarray
    group_codes: tuple
    group_of_volume: np.ndarray
    motion_mm_deg: np.ndarray
    volume_motion_mm_deg: np.ndarray
    nrmsd_before: float
    nrmsd_after: float
    correlation_before: float
    correlation_after: float
    iterations: tuple
    converged: bool
    gains: np.ndarray = field(default_factory=lambda: np.ones(0))


# ---------------------------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------------------------


def _as_volumes(images) -> np.ndarray:
    """(X, Y, Z, V) float64 from a 4D array or a sequence of 3D arrays, refusing bad shapes or values."""
    if isinstance(images, np.ndarray) and images.ndim == 4:
        volumes = [images[..., v] for v in range(images.shape[3])]
    elif isinstance(images, np.ndarray) and images.ndim == 3:
        raise GeometryError("images: one 3D volume given; need images of two opposite polarities")
    else:
        volumes = [np.asarray(v) for v in images]
    for index, volume in enumerate(volumes):
        if volume.ndim != 3:
            raise GeometryError(f"images[{index}] must be 3D, got {volume.ndim} dimensions")
        if volume.shape != volumes[0].shape:
            raise GeometryError(f"images[{index}] has shape {volume.shape}, images[0] has {volumes[0].shape}")
        if not np.issubdtype(volume.dtype, np.number) or np.iscomplexobj(volume):
            raise InputError(f"images[{index}] must be real numbers (magnitude), got {volume.dtype}")
        if not np.all(np.isfinite(volume)):
            raise InputError(f"images[{index}] contains NaN or infinite values")
    if min(volumes[0].shape) < 4:
        raise GeometryError(f"images: each axis needs at least 4 voxels, got {volumes[0].shape}")
    return np.stack([np.asarray(v, np.float64) for v in volumes], axis=-1)


def _check_encoding(index: int, enc, shape) -> tuple[int, int, float]:
    """(axis, sign, shift in voxels per Hz) of one encoding, refusing missing or bad timing."""
    if not isinstance(enc, PhaseEncoding):
        raise InputError(f"encodings[{index}] must be a PhaseEncoding, got {type(enc).__name__}")
    if enc.pe_code is None:
        raise MetadataError(f"encodings[{index}].pe_code is missing")
    try:
        axis, sign = parse_pe_code(enc.pe_code)
    except InputError:
        raise MetadataError(f"encodings[{index}].pe_code {enc.pe_code!r} is not one of i j k i- j- k-") from None
    spacing = enc.echo_spacing_s
    if spacing is None:
        raise MetadataError(f"encodings[{index}].echo_spacing_s is missing (effective echo spacing in s)")
    if not isinstance(spacing, (int, float)) or not math.isfinite(spacing) or not 0 < spacing < 0.01:
        raise MetadataError(f"encodings[{index}].echo_spacing_s must be a number of seconds in (0, 0.01), "
                            f"got {spacing!r}")
    lines = shape[axis] if enc.n_pe_lines is None else enc.n_pe_lines
    if not isinstance(lines, (int, np.integer)) or lines < 2:
        raise MetadataError(f"encodings[{index}].n_pe_lines must be an integer >= 2, got {lines!r}")
    return axis, sign, sign * float(spacing) * int(lines)


def _check_codes(checked) -> None:
    signs = {}
    for axis, sign, _ in checked:
        signs.setdefault(axis, set()).add(sign)
    if not any(len(s) == 2 for s in signs.values()):
        raise MetadataError("encodings: need at least one pair of opposite phase-encode codes on the same axis "
                            "(e.g. 'j' and 'j-'), got only one polarity per axis")


def _voxel_mm(affine_or_voxel_mm) -> np.ndarray:
    value = np.asarray(affine_or_voxel_mm, float)
    vox = voxel_sizes_mm(value) if value.shape == (4, 4) else np.broadcast_to(value, (3,)).astype(float)
    if vox.shape != (3,) or not np.all(np.isfinite(vox)) or np.any(vox <= 0):
        raise GeometryError(f"affine_or_voxel_mm must give three positive voxel sizes in mm, got {vox.tolist()}")
    return vox


def _prepare(images, encodings, affine_or_voxel_mm):
    data = _as_volumes(images)
    encodings = list(encodings) if encodings is not None else []
    if len(encodings) != data.shape[3]:
        raise InputError(f"encodings: {len(encodings)} given for {data.shape[3]} images; give one per image")
    checked = [_check_encoding(i, e, data.shape[:3]) for i, e in enumerate(encodings)]
    _check_codes(checked)
    return data, checked, _voxel_mm(affine_or_voxel_mm)


# ---------------------------------------------------------------------------------------------
# Groups, averaging, intensity
# ---------------------------------------------------------------------------------------------


def _group(checked):
    keys, of_volume = [], []
    for axis, sign, per_hz in checked:
        key = (axis, sign, round(per_hz, 12))
        if key not in keys:
            keys.append(key)
        of_volume.append(keys.index(key))
    return keys, np.array(of_volume, int)


def _average_groups(data, of_volume, n_groups, voxel_mm, align: bool):
    means, motion = [], np.zeros((data.shape[3], 6))
    for g in range(n_groups):
        members = np.flatnonzero(of_volume == g)
        first = data[..., members[0]]
        total = first.copy()
        for v in members[1:]:
            if align:
                motion[v] = rigid.register_rigid(first, data[..., v], voxel_mm)
                total += rigid.pull(data[..., v], motion[v], voxel_mm)
            else:
                total += data[..., v]
        means.append(total / len(members))
    return means, motion


def _normalise(means):
    """Scale groups to equal summed signal, then all to a mean of 1 in the signal region."""
    from .phase import magnitude_mask

    sums = np.array([float(m.sum()) for m in means])
    if np.any(sums <= 0):
        raise InputError(f"images: group {int(np.argmin(sums))} has no positive signal")
    gains = sums.mean() / sums
    scaled = [m * g for m, g in zip(means, gains)]
    average = sum(scaled) / len(scaled)
    region = magnitude_mask(average)
    level = float(average[region].mean()) if region.any() else float(average.mean())
    return [s / level for s in scaled], gains / level


# ---------------------------------------------------------------------------------------------
# Optimisation
# ---------------------------------------------------------------------------------------------


def _fit(objective: model.Objective, start: np.ndarray, max_iterations: int):
    result = optimize.minimize(objective, start.ravel(), jac=True, method="L-BFGS-B",
                               options={"maxiter": int(max_iterations), "maxcor": 20, "ftol": 1e-9,
                                        "gtol": 1e-8})
    converged = bool(result.success) and int(result.nit) < int(max_iterations)
    return result.x.reshape(start.shape), int(result.nit), converged


def _motion_step(coef, level, params):
    """Register each group's corrected image (without motion) to the first group's."""
    still = model.Objective(level, 0.0)
    images = [p[0] for p in still.corrected(coef)]
    out = [np.zeros(6)]
    for g in range(1, len(images)):
        out.append(rigid.register_rigid(images[0], images[g], level.voxel_mm, start=params[g], iterations=10))
    return out


def _objective(level, options, coef, params):
    if not options.motion or params is None:
        return model.Objective(level, options.bending_weight_mm4_per_hz2,
                               laplacian_weight=options.laplacian_weight_mm4_per_hz2,
                               robust_scale=options.robust_scale)
    shape = level.images[0].shape
    mappings = [None] + [rigid.pull_mapping(p, level.voxel_mm, shape) for p in params[1:]]
    offsets = model.group_field_offsets(coef, level, params)
    return model.Objective(level, options.bending_weight_mm4_per_hz2, mappings, offsets,
                           laplacian_weight=options.laplacian_weight_mm4_per_hz2,
                           robust_scale=options.robust_scale)


def _optimise(images, axes, per_hz, voxel_mm, options: PairOptions, progress: bool):
    from ._progress import progress_bar

    coef, knots, params = None, None, [np.zeros(6) for _ in images]
    iterations, converged = [], True
    for spec in progress_bar(options.levels, desc="field levels", enabled=progress, unit="level"):
        level = model.make_level(images, axes, per_hz, voxel_mm, spec.subsample, spec.fwhm_vox,
                                 spec.knot_spacing_vox)
        if coef is None:
            coef = np.zeros(tuple(len(k) for k in level.knots))
        else:
            coef = model.refit(coef, knots, level.knots, level.positions_mm)
        knots = level.knots
        rounds = max(1, int(options.motion_rounds)) if options.motion else 1
        for _ in range(rounds):
            coef, nit, ok = _fit(_objective(level, options, coef, params), coef, options.max_iterations)
            iterations.append(nit)
            converged &= ok
            if options.motion:
                params = _motion_step(coef, level, params)
        if options.motion:
            coef, nit, ok = _fit(_objective(level, options, coef, params), coef, options.max_iterations)
            iterations.append(nit)
            converged &= ok
    return coef, knots, params, tuple(iterations), converged


# ---------------------------------------------------------------------------------------------
# Results
# ---------------------------------------------------------------------------------------------


def pair_agreement(images, mask: np.ndarray) -> tuple[float, float]:
    """Agreement of several images of one object within a mask.

    ``nrmsd = sqrt(mean_g mean_mask (I_g - M)^2) / sqrt(mean_mask M^2)`` with ``M`` the mean
    image (0 when all agree), and the mean Pearson correlation over all pairs (1 when all
    agree up to scale).

    Examples
    --------
    >>> import numpy as np
    >>> a = np.arange(8.0).reshape(2, 2, 2)
    >>> pair_agreement([a, a], np.ones(a.shape, bool))
    (0.0, 1.0)
    """
    mask = np.asarray(mask, bool)
    values = [np.asarray(im, float)[mask] for im in images]
    mean = sum(values) / len(values)
    denominator = math.sqrt(float((mean ** 2).mean())) if mean.size else 0.0
    spread = math.sqrt(float(np.mean([((v - mean) ** 2).mean() for v in values]))) if mean.size else 0.0
    nrmsd = spread / denominator if denominator > 0 else float("nan")
    pairs = [(i, j) for i in range(len(values)) for j in range(i + 1, len(values))]
    correlation = float(np.mean([np.corrcoef(values[i], values[j])[0, 1] for i, j in pairs]))
    return float(nrmsd), correlation


def _group_fields(b0_hz, params, voxel_mm):
    return [b0_hz if not np.any(p) else rigid.pull(b0_hz, p, voxel_mm, inverse=True) for p in params]


def _corrected_volumes(data, of_volume, keys, fields, interp):
    out = np.empty(data.shape, np.float32)
    for v in range(data.shape[3]):
        axis, sign, per_hz = keys[of_volume[v]]
        shift = fields[of_volume[v]] * per_hz
        out[..., v] = unwarp_array(data[..., v], shift, axis, interp=interp, jacobian=True,
                                   jacobian_floor=DEFAULT_JACOBIAN_FLOOR)
    return out


def _confidence(images, axes, per_hz, voxel_mm, coef, knots, mask, options):
    """Gauss-Newton curvature of the data term per voxel, mapped to [0, 1), zero outside the mask."""
    from scipy import ndimage

    last = options.levels[-1]
    level = model.make_level(images, axes, per_hz, voxel_mm, 1, last.fwhm_vox, last.knot_spacing_vox)
    coef = model.refit(coef, knots, level.knots, level.positions_mm)
    parts = model.Objective(level, 0.0).corrected(coef)
    curvature = np.zeros(images[0].shape)
    for (_, dshift, _, dvalue), axis, factor in zip(parts, axes, level.factor):
        curvature += np.moveaxis((factor * (1.0 + dshift) * dvalue) ** 2, -1, axis)
    curvature = ndimage.gaussian_filter(curvature, last.knot_spacing_vox / 2.0)
    median = float(np.median(curvature[mask])) if mask.any() else 0.0
    confidence = curvature / (curvature + median) if median > 0 else np.zeros_like(curvature)
    return np.where(mask, confidence, 0.0).astype(np.float32)


def _reference_frame_means(corrected, of_volume, volume_motion, params, voxel_mm, gains):
    """Per group: mean corrected image moved into the first group's frame, intensity-normalised."""
    means = []
    for g, p in enumerate(params):
        members = np.flatnonzero(of_volume == g)
        total = np.zeros(corrected.shape[:3])
        for v in members:
            volume = corrected[..., v].astype(np.float64)
            total += rigid.pull(volume, volume_motion[v], voxel_mm) if np.any(volume_motion[v]) else volume
        mean = total / len(members) * gains[g]
        means.append(rigid.pull(mean, p, voxel_mm) if np.any(p) else mean)
    return means


def field_from_pairs(images, encodings, affine_or_voxel_mm, *, options: PairOptions | None = None,
                     progress: bool = False) -> PairFieldResult:
    """Estimate the B0 field (Hz) from EPI images acquired with different phase-encode codes.

    Parameters
    ----------
    images : (X, Y, Z, V) array or sequence of V (X, Y, Z) arrays
        Magnitude images on one grid (same shape and affine), e.g. spin-echo b=0 volumes
        of both polarities, in any order.
    encodings : sequence of V PhaseEncoding
        Code and timing of each volume; at least one opposite pair on one axis.
    affine_or_voxel_mm : (4, 4) array or 3 floats
        The grid's affine (mm) or its voxel sizes in mm.
    options : PairOptions, optional
    progress : bool
        Show a progress bar over the levels.

    Returns
    -------
    PairFieldResult
        The field, mask, confidence, corrected volumes, motion and agreement numbers:
        ``nrmsd_after`` is the normalised RMS difference between the groups' corrected
        mean images within the mask (:func:`pair_agreement`), ``nrmsd_before`` the same for
        the distorted images.

    Raises
    ------
    GeometryError
        Shapes differ, a volume is not 3D, or the voxel sizes are not positive.
    MetadataError
        A code or timing is missing or implausible, or no opposite pair is given.
    InputError
        NaN or infinite values, a wrong number of encodings.

    Examples
    --------
    >>> import numpy as np
    >>> from fieldfix.unwarp import distort_with_field
    >>> obj = np.zeros((16, 40, 12)); obj[4:12, 10:30, 3:9] = 1.0
    >>> b0 = np.full(obj.shape, 25.0)
    >>> pair = [distort_with_field(obj, b0, c, 5e-4) for c in ("j", "j-")]
    >>> res = field_from_pairs(pair, [PhaseEncoding("j", 5e-4), PhaseEncoding("j-", 5e-4)], (2.0, 2.0, 2.0))
    >>> res.b0_hz.shape, res.nrmsd_after < res.nrmsd_before
    ((16, 40, 12), True)
    """
    from .phase import magnitude_mask

    options = PairOptions() if options is None else options
    data, checked, voxel_mm = _prepare(images, encodings, affine_or_voxel_mm)
    keys, of_volume = _group(checked)
    means, volume_motion = _average_groups(data, of_volume, len(keys), voxel_mm, options.align_within_groups)
    normalised, gains = _normalise(means)
    axes, per_hz = tuple(k[0] for k in keys), tuple(k[2] for k in keys)
    # The spline products are many small matrix products: one BLAS thread runs them several times
    # faster than a pool (measured: 55 ms against 220 ms per cost evaluation on 2 busy cores).
    with threadpool_limits(limits=1, user_api="blas"):
        coef, knots, params, iterations, converged = _optimise(normalised, axes, per_hz, voxel_mm, options,
                                                               progress)
    positions = [np.arange(n) * v for n, v in zip(data.shape[:3], voxel_mm)]
    b0_hz = model.separable(coef, [model.basis(p, k) for p, k in zip(positions, knots)])
    fields = _group_fields(b0_hz, params, voxel_mm)
    corrected = _corrected_volumes(data, of_volume, keys, fields, options.interp)
    after = _reference_frame_means(corrected, of_volume, volume_motion, params, voxel_mm, gains)
    mask = magnitude_mask(sum(after) / len(after))
    before = [m * g for m, g in zip(means, gains)]
    nrmsd_before, corr_before = pair_agreement(before, mask)
    nrmsd_after, corr_after = pair_agreement(after, mask)
    confidence = _confidence(normalised, axes, per_hz, voxel_mm, coef, knots, mask, options)
    codes = tuple(("ijk"[a] + ("-" if s < 0 else "")) for a, s, _ in keys)
    return PairFieldResult(
        b0_hz=b0_hz.astype(np.float32), mask=mask, extended=~mask, confidence=confidence, corrected=corrected,
        group_codes=codes, group_of_volume=of_volume, motion_mm_deg=np.array(params), volume_motion_mm_deg=volume_motion,
        nrmsd_before=nrmsd_before, nrmsd_after=nrmsd_after, correlation_before=corr_before,
        correlation_after=corr_after, iterations=iterations, converged=converged, gains=gains)


# ---------------------------------------------------------------------------------------------
# Joint restoration
# ---------------------------------------------------------------------------------------------


#: Default weight of the restoration's smoothness penalty: dimensionless, relative to the data term
#: (chosen on k-space simulated pairs: strong enough to fix what no image samples, weak enough to keep
#: stripes three voxels apart).
RESTORE_PENALTY = 3e-3


def _restore_inputs(images, encodings, b0_hz, penalty, jacobian_floor):
    data = _as_volumes(images)
    encodings = list(encodings) if encodings is not None else []
    if len(encodings) != data.shape[3]:
        raise InputError(f"encodings: {len(encodings)} given for {data.shape[3]} images; give one per image")
    checked = [_check_encoding(i, e, data.shape[:3]) for i, e in enumerate(encodings)]
    b0_hz = np.asarray(b0_hz, np.float64)
    if b0_hz.shape != data.shape[:3]:
        raise GeometryError(f"b0_hz has shape {b0_hz.shape}, the images {data.shape[:3]}")
    if not np.all(np.isfinite(b0_hz)):
        raise InputError("b0_hz contains NaN or infinite values")
    axes = {axis for axis, _, _ in checked}
    if len(axes) != 1:
        raise GeometryError("encodings: joint restoration needs all images on one phase-encode axis, got axes "
                            + ", ".join(sorted("ijk"[a] for a in axes)))
    if not (isinstance(penalty, (int, float)) and math.isfinite(penalty) and penalty > 0):
        raise InputError(f"penalty must be a positive number, got {penalty!r}")
    if not (isinstance(jacobian_floor, (int, float)) and 0 < jacobian_floor < 1):
        raise InputError(f"jacobian_floor must be a number in (0, 1), got {jacobian_floor!r}")
    return data, checked, b0_hz, axes.pop()


def restore_jointly(images, encodings, b0_hz: np.ndarray, *, penalty: float = RESTORE_PENALTY,
                    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR) -> np.ndarray:
    """One corrected image from images of several polarities, by least squares over all of them.

    Model (per PE line): the undistorted image ``u`` is a cubic B-spline on the voxel grid
    (coefficients ``c``). A spin at ``x`` appears at ``w(x) = x + s(x)`` (``s`` the image's own
    shift, linear between voxel centres), and the scanner records band-limited samples, so
    distorted sample ``j`` is ``y_j = integral u(x) K(j - w(x)) dx`` with ``K`` the Keys cubic
    convolution kernel (Keys 1981, IEEE Trans. Acoust. Speech Signal Process. 29(6), from
    memory; a compact stand-in for the scanner's sinc). This conserves signal (``sum_j K = 1``),
    compressed images come out smoothed as acquired ones do, and for a smooth ``u`` it is the
    pull-back of :mod:`fieldfix.unwarp` inverted: ``y_j = u(x_j) / J(x_j)`` with ``x_j + s(x_j) = j``.
    The restoration (Andersson, Skare & Ashburner 2003, NeuroImage 20(2):870-888, from memory)
    solves ``min_c sum_m sum_j J_mj^2 (A_m c - y_m)_j^2 + penalty * S * ||D2 c||^2``:

    * weights ``J_mj^2`` (the local Jacobian of sample ``j`` of image ``m``) compare every sample
      in undistorted intensity units (as ``J * y``, what it gives the undistorted image), so a
      polarity counts in proportion to its sampling density there: where one polarity
      compresses, the other, stretched, carries most of the weight;
    * samples whose kernel reaches a folded segment (Jacobian at or below `jacobian_floor`) are
      left out: the other polarity carries that signal;
    * ``D2`` are second differences of ``c`` and ``S`` the mean diagonal of the data term's normal
      matrix, so `penalty` is dimensionless; the result is linear in the images (scaling them
      scales it).

    The result is ``A_0 c``: what an acquisition without field would have recorded (``A_0`` the
    model at zero shift). Without field, smooth images come back as their mean; detail near the
    grid's resolution limit is damped slightly by the penalty (stripes three voxels apart keep
    about 93% of their contrast at the default). The images must share one PE axis and one
    head position (no motion).

    Where one polarity is compressed and the object has fine detail, this beats unwarping
    either image alone by far (tests/test_pairs.py). Where the object is smooth and the images
    noisy, the compressed image alone can be the less noisy one in its own compressed region,
    since the weights favour the stretched one there.

    Parameters
    ----------
    images : (X, Y, Z, V) array or sequence of V (X, Y, Z) arrays
    encodings : sequence of V PhaseEncoding
    b0_hz : (X, Y, Z) array
        Field in Hz on the images' grid (e.g. ``field_from_pairs(...).b0_hz``).
    penalty : float
        Dimensionless weight of the smoothness penalty (default :data:`RESTORE_PENALTY`).
    jacobian_floor : float
        Jacobian at or below which the mapping counts as folded (default 0.1, as in
        :mod:`fieldfix.shift`).

    Returns
    -------
    (X, Y, Z) float32

    Examples
    --------
    >>> import numpy as np
    >>> from fieldfix.unwarp import distort_with_field
    >>> y = np.arange(48.0)
    >>> obj = np.exp(-((y - 22.0) / 6.0) ** 2)[None, :, None] * np.ones((4, 48, 4))
    >>> b0 = np.tile(30.0 * np.sin(y / 5.0)[None, :, None], (4, 1, 4))
    >>> pair = [distort_with_field(obj, b0, c, 1e-3) for c in ("j", "j-")]
    >>> enc = [PhaseEncoding("j", 1e-3), PhaseEncoding("j-", 1e-3)]
    >>> bool(np.abs(restore_jointly(pair, enc, b0) - obj).max() < 0.02)
    True
    """
    data, checked, b0_hz, axis = _restore_inputs(images, encodings, b0_hz, penalty, jacobian_floor)
    shape = data.shape[:3]
    lines = (int(np.prod(shape[:axis])), shape[axis], int(np.prod(shape[axis + 1:])))  # (outer, n, inner) views
    stacked = np.ascontiguousarray(np.moveaxis(data, -1, 0)).reshape((-1,) + lines)
    shifts = np.stack([b0_hz * per_hz for _, _, per_hz in checked]).reshape(stacked.shape)
    out = kernels.restore_lines(stacked, shifts, float(penalty), float(jacobian_floor))
    return out.reshape(shape).astype(np.float32)
