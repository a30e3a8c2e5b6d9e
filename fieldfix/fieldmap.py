"""From gradient-echo echoes to a B0 map in Hz.

The field follows from the phase gained between two echo times (common practice, no
source): ``b0_hz = dphi / (2*pi*dTE)``, unambiguous within ``+-1/(2*dTE)``
(:func:`unaliased_range_hz`).  Spatial wraps beyond that range are removed by
:mod:`fieldfix.unwrap`.

Entry points, all returning a :class:`FieldMapResult`:

* :func:`b0_from_echoes` -- two or more complex echoes.  Two echoes: conjugate-product
  phase difference, spatially unwrapped.  Three or more: the phase of every echo relative
  to the first is unwrapped *along echo time*, starting from the pair with the shortest
  spacing (largest unaliased range, spatially unwrapped as well) and adding echoes in
  order of their distance in time, each predicted from the current fit; then a
  magnitude-weighted straight-line fit of phase against echo time gives the field
  (weights ``|s_n|**2``, the inverse phase-noise variance; common practice, no source).
* :func:`b0_from_phase_difference` -- a phase-difference image and the echo spacing.
* :func:`b0_from_map` -- a ready map in Hz, rad/s, ppm or tesla (:func:`field_to_hz`).

Regularisation (:func:`regularise_b0`), in this order: outlier rejection against the
local median (:func:`find_outliers`), masked normalised smoothing with a FWHM in mm
(:func:`smooth_masked`), and extension beyond the mask by solving Laplace's equation
outside it (:func:`extend_harmonic`): the field is harmonic where there are no
susceptibility sources.

Example
-------
>>> import numpy as np
>>> from fieldfix.simulate.gradient_echo import simulate_gradient_echo, head_field_hz
>>> truth = head_field_hz((24, 24, 16), amplitude_hz=150.0)
>>> data = simulate_gradient_echo(truth, [4.92e-3, 7.38e-3], snr=None, rng=0)
>>> res = b0_from_echoes(data.echoes, data.echo_times_s, mask=data.object_mask)
>>> bool(np.abs(res.b0_hz - data.b0_hz)[data.object_mask].max() < 1e-6)
True
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.ndimage as ndi

from . import _fieldmap_kernels as _fk
from ._multigrid import harmonic_fill
from .errors import InputError, UnitError
from .phase import magnitude_mask, phase_difference
from .units import GAMMA_HZ_PER_T
from .unwrap import unwrap, wrap_phase

TWO_PI = 2.0 * np.pi
FWHM_PER_SIGMA = np.sqrt(8.0 * np.log(2.0))

__all__ = [
    "FieldMapResult",
    "unaliased_range_hz",
    "phase_to_hz",
    "field_to_hz",
    "hz_to_units",
    "fit_multi_echo",
    "find_outliers",
    "smooth_masked",
    "extend_harmonic",
    "regularise_b0",
    "b0_from_echoes",
    "b0_from_phase_difference",
    "b0_from_map",
]


@dataclass
class FieldMapResult:
    """A B0 map and what was learned making it.

    Attributes
    ----------
    b0_hz : ndarray
        Final field in Hz (outliers replaced, smoothed if asked, extended beyond the mask).
    mask : ndarray of bool
        Voxels where the field was measured.
    magnitude : ndarray
        Reference magnitude (first echo, or the given magnitude).
    raw_b0_hz : ndarray
        Field before regularisation (0 outside the mask).
    outliers : ndarray of bool
        Mask voxels rejected as outliers.
    n_offset_changed : int
        Mask voxels whose 2*pi multiple the spatial unwrap changed.
    n_regions : int
        Disconnected mask regions.
    unaliased_range_hz : float or None
        ``1/(2 dTE)`` for the spacing that fixes the spatial wraps (None for a ready map).
    echo_times_s : tuple
    method : str
        How the field was obtained.
    """

    b0_hz: np.ndarray
    mask: np.ndarray
    magnitude: np.ndarray
    raw_b0_hz: np.ndarray
    outliers: np.ndarray
    n_offset_changed: int = 0
    n_regions: int = 0
    unaliased_range_hz: float | None = None
    echo_times_s: tuple = ()
    method: str = ""
    notes: list = field(default_factory=list)


# ------------------------------------------------------------------------------------------
# units
# ------------------------------------------------------------------------------------------
def unaliased_range_hz(delta_te_s: float) -> float:
    """Half-width of the unambiguous field range, ``1 / (2 * dTE)`` in Hz.

    Example
    -------
    >>> round(unaliased_range_hz(2.46e-3), 3)
    203.252
    """
    delta_te_s = float(delta_te_s)
    if not delta_te_s > 0:
        raise InputError(f"echo spacing must be positive, got {delta_te_s} s")
    return 1.0 / (2.0 * delta_te_s)


def phase_to_hz(phase_rad, delta_te_s: float):
    """Field in Hz from phase gained over ``delta_te_s``: ``phase / (2 pi dTE)``.

    Example
    -------
    >>> round(float(phase_to_hz(np.pi, 0.005)), 9)
    100.0
    """
    return np.asarray(phase_rad, dtype=np.float64) / (TWO_PI * float(delta_te_s))


_FIELD_UNITS = {"hz": "hz", "rad/s": "rad/s", "rads": "rad/s", "rad_per_s": "rad/s", "ppm": "ppm",
                "t": "t", "tesla": "t"}


def _hz_per_unit(units: str, field_strength_t: float | None, what: str) -> float:
    """Hz per one of `units` (ppm needs the field strength)."""
    key = _FIELD_UNITS.get(str(units).strip().lower())
    if key is None:
        raise UnitError(f"unknown field-map unit {units!r}; use Hz, rad/s, ppm or T")
    if key == "ppm":
        if field_strength_t is None or not field_strength_t > 0:
            raise UnitError(f"{what} needs the field strength (for example 3T)")
        return 1e-6 * GAMMA_HZ_PER_T * float(field_strength_t)
    return {"hz": 1.0, "rad/s": 1.0 / TWO_PI, "t": GAMMA_HZ_PER_T}[key]


def field_to_hz(values, units: str, *, field_strength_t: float | None = None):
    """Convert a field map in Hz, rad/s, ppm (needs the field strength) or tesla to Hz.

    Uses the proton gyromagnetic ratio from scipy.constants (via fieldfix.units).

    Example
    -------
    >>> round(float(field_to_hz(2 * np.pi * 50.0, "rad/s")), 9)
    50.0
    """
    factor = _hz_per_unit(units, field_strength_t, "a field map in ppm")
    v = np.asarray(values)
    if v.dtype != np.float32:  # single precision stays single (a field map read as float32), else float64
        v = v.astype(np.float64)
    return v * factor


def hz_to_units(b0_hz, units: str, *, field_strength_t: float | None = None):
    """Convert a field in Hz to Hz, rad/s, ppm (needs the field strength) or tesla.

    Example
    -------
    >>> round(float(hz_to_units(127.74, "ppm", field_strength_t=3.0)), 3)  # about 1 ppm at 3 T
    1.0
    """
    factor = _hz_per_unit(units, field_strength_t, "ppm output")
    return np.asarray(b0_hz, dtype=np.float64) / factor


# ------------------------------------------------------------------------------------------
# multi-echo fit
# ------------------------------------------------------------------------------------------
def _line_fit(tes, phases, weights):
    """Per-voxel weighted straight-line fit; returns (slope, intercept, precision)."""
    s = sxx = sx = sy = sxy = 0.0
    for t, y, w in zip(tes, phases, weights):
        s = s + w
        sx = sx + w * t
        sy = sy + w * y
        sxx = sxx + w * t * t
        sxy = sxy + w * t * y
    det = s * sxx - sx * sx
    ok = det > 0
    safe = np.where(ok, det, 1.0)
    slope = np.where(ok, (s * sxy - sx * sy) / safe, 0.0)
    intercept = np.where(s > 0, (sy - slope * sx) / np.where(s > 0, s, 1.0), 0.0)
    precision = np.where(s > 0, det / np.where(s > 0, s, 1.0), 0.0)  # 1/var(slope) up to sigma^2
    return slope, intercept, precision


def fit_multi_echo(echoes, echo_times_s, mask=None, *, unwrap_method="quality"):
    """Field from three or more echoes by temporal unwrapping and a weighted line fit.

    Parameters
    ----------
    echoes : sequence of complex ndarray
    echo_times_s : sequence of float
        Distinct echo times (any order).
    mask : ndarray of bool, optional
        Where to unwrap spatially (default: everywhere).
    unwrap_method : {"quality", "laplacian", None}
        Spatial unwrap of the shortest-spacing estimate (None: no spatial unwrap).

    Returns
    -------
    b0_hz : ndarray
    weight : ndarray
        Precision of the slope (use as smoothing weight).
    info : dict
        ``n_offset_changed``, ``n_regions``, ``shortest_spacing_s``.

    Example
    -------
    >>> from fieldfix.simulate.gradient_echo import simulate_gradient_echo
    >>> truth = np.full((8, 8, 8), 300.0)
    >>> d = simulate_gradient_echo(truth, [2e-3, 3e-3, 6e-3], snr=None, t2star_s=None,
    ...                            magnitude=np.ones((8, 8, 8)), frequency_adjust=False, rng=0)
    >>> b0, w, info = fit_multi_echo(d.echoes, d.echo_times_s, unwrap_method=None)
    >>> bool(np.allclose(b0, 300.0))
    True
    """
    tes = np.asarray(echo_times_s, dtype=np.float64)
    if len(echoes) != tes.size:
        raise InputError(f"{len(echoes)} echoes but {tes.size} echo times")
    if tes.size < 2:
        raise InputError("need at least two echoes")
    order = np.argsort(tes)
    tes = tes[order]
    zs = [np.asarray(echoes[i]) for i in order]
    if np.any(np.diff(tes) <= 0):
        raise InputError("echo times must be distinct")
    gaps = np.diff(tes)
    j = int(np.argmin(gaps))
    dphi, _w = phase_difference(zs[j], zs[j + 1])
    info = {"n_offset_changed": 0, "n_regions": 0, "shortest_spacing_s": float(gaps[j])}
    if unwrap_method is not None:
        res = unwrap(dphi, mask, method=unwrap_method)
        dphi = res.phase
        info["n_offset_changed"] = res.n_changed
        info["n_regions"] = res.n_regions
    # start: slope (rad/s) from the shortest spacing, phase 0 at the first echo
    slope = dphi / gaps[j]
    intercept = np.zeros(dphi.shape)
    ref = zs[0]
    t_rel = tes - tes[0]
    times, phases, weights = [0.0], [np.zeros(dphi.shape)], [np.abs(ref) ** 2]
    precision = np.zeros(dphi.shape)
    # add echoes in order of their distance in time from the first; each one's phase
    # relative to the first echo is unwrapped against the current prediction
    for n in range(1, tes.size):
        pred = intercept + slope * t_rel[n]
        resid = np.angle(zs[n] * np.conj(ref) * np.exp(-1j * pred))
        times.append(t_rel[n])
        phases.append(pred + resid)
        weights.append(np.abs(zs[n]) ** 2)
        slope, intercept, precision = _line_fit(times, phases, weights)
    return slope / TWO_PI, precision, info


# ------------------------------------------------------------------------------------------
# regularisation
# ------------------------------------------------------------------------------------------
def find_outliers(b0_hz, mask, *, threshold: float = 6.0, min_hz: float = 10.0, size_vox: int = 3):
    """Mask voxels that disagree with their neighbourhood far more than it varies.

    With ``r = b0 - median`` (the median of the mask voxels in the voxel's 3x3x3
    neighbourhood, itself included), a voxel is an outlier when ``|r|`` exceeds
    ``min_hz`` and ``threshold`` robust standard deviations, taken as the larger of

    * the global scale, 1.4826 * median absolute deviation of ``r`` over the mask, and
    * the local scale, the standard deviation of ``r`` over the voxel's mask neighbours
      (the voxel itself left out, so that a spike does not raise its own limit).

    The local scale keeps steep but real fields (next to air cavities, hundreds of Hz per
    centimetre at 7 T) from being taken for outliers, while an isolated spike such as a
    missed 2*pi jump in a locally smooth map is still caught. The 1.4826 factor makes a
    MAD a standard deviation for Gaussian data (Rousseeuw and Croux 1993, JASA).
    Only mask voxels enter the neighbourhoods (numba kernel in
    :mod:`fieldfix._fieldmap_kernels`; 3x3x3 only, `size_vox` must be 3).

    Example
    -------
    >>> f = np.zeros((9, 9, 9)); f[4, 4, 4] = 400.0
    >>> int(find_outliers(f, np.ones(f.shape, bool)).sum())
    1
    """
    if size_vox != 3:
        raise InputError(f"size_vox must be 3 (a 3x3x3 neighbourhood), got {size_vox}")
    mask = np.ascontiguousarray(mask, dtype=bool)
    if not mask.any():
        return np.zeros(mask.shape, dtype=bool)
    residual, local_scale = _fk.local_residuals_nb(np.ascontiguousarray(b0_hz, dtype=np.float64), mask)
    resid = residual[mask]
    global_scale = 1.4826 * np.median(np.abs(resid - np.median(resid)))
    limit = np.maximum(threshold * np.maximum(global_scale, local_scale[mask]), min_hz)
    out = np.zeros(mask.shape, dtype=bool)
    out[mask] = np.abs(resid) > limit
    return out


def _normalised_gaussian(values, weights, sigma):
    """``(G * (w v), G * w)`` with zero outside the grid, computed on the bounding box of ``w != 0``.

    Exact: outside the box the weights vanish, so cropping to the box grown by the kernel
    radius (scipy's ``truncate=4`` sigmas) changes no sum; it only skips empty space.
    Returns the two arrays on the cropped box and the box's slices.
    """
    nonzero = np.nonzero(np.any(weights != 0, axis=(1, 2)))[0], np.nonzero(np.any(weights != 0, axis=(0, 2)))[0], \
        np.nonzero(np.any(weights != 0, axis=(0, 1)))[0]
    box = []
    for axis, idx in enumerate(nonzero):
        if idx.size == 0:
            return None, None, None
        radius = int(4.0 * float(sigma[axis]) + 0.5) + 1
        box.append(slice(max(int(idx[0]) - radius, 0), min(int(idx[-1]) + 1 + radius, weights.shape[axis])))
    box = tuple(box)
    w = weights[box]
    num = ndi.gaussian_filter(w * values[box], sigma, mode="constant")
    den = ndi.gaussian_filter(w, sigma, mode="constant", output=np.float64)  # float32 weights, float64 sums
    return num, den, box


def _sigma_vox(fwhm_mm, voxel_size_mm):
    vs = np.broadcast_to(np.asarray(voxel_size_mm, dtype=np.float64), (3,))
    return tuple(float(fwhm_mm) / FWHM_PER_SIGMA / v for v in vs)


def smooth_masked(b0_hz, mask, *, fwhm_mm: float, voxel_size_mm=(1.0, 1.0, 1.0), weights=None):
    """Masked, normalised Gaussian smoothing (normalised convolution).

    ``smooth = G * (w m f) / G * (w m)`` inside the mask, with ``G`` a Gaussian of the
    given FWHM in mm (Knutsson and Westin 1993, CVPR, "normalized convolution").  Values
    outside the mask never leak in; outside the mask the input is returned unchanged.

    Example
    -------
    >>> f = np.full((10, 10, 10), 5.0); m = np.zeros(f.shape, bool); m[2:8, 2:8, 2:8] = True
    >>> f[~m] = 1000.0
    >>> bool(np.allclose(smooth_masked(f, m, fwhm_mm=4.0)[m], 5.0))
    True
    """
    f = np.asarray(b0_hz, dtype=np.float64)
    m = np.asarray(mask, dtype=bool)
    if fwhm_mm <= 0:
        return f.copy()
    w = np.ones(f.shape, np.float32) if weights is None else np.asarray(weights, dtype=np.float32)
    wm = np.where(m, w, np.float32(0.0))
    sigma = _sigma_vox(fwhm_mm, voxel_size_mm)
    num, den, box = _normalised_gaussian(np.where(m, f, 0.0), wm, sigma)
    out = f.copy()
    if box is None:
        return out
    ok = m[box] & (den > 1e-12 * max(den.max(), 1e-300))
    out[box][ok] = num[ok] / den[ok]
    return out


def extend_harmonic(b0_hz, mask, *, voxel_size_mm=(1.0, 1.0, 1.0), rtol: float = 1e-6, maxiter: int = 300):
    """Extend a field beyond the mask by solving Laplace's equation outside it.

    Inside the mask the field is kept (Dirichlet condition); outside, the discrete
    Laplacian (7-point, with the voxel spacings) is zero, with zero normal derivative
    at the edge of the grid.  Solved by conjugate gradients preconditioned with one
    geometric multigrid V-cycle (:mod:`fieldfix._multigrid`), to a residual of `rtol`
    times that of the zero start; the work grows linearly with the number of voxels.

    Example
    -------
    >>> z, y, x = np.mgrid[:12, :12, :12].astype(float)
    >>> f = x**2 - y**2 + 3 * z          # harmonic
    >>> hole = (x - 6)**2 + (y - 6)**2 + (z - 6)**2 < 9
    >>> g = np.where(hole, 0.0, f)
    >>> bool(np.allclose(extend_harmonic(g, ~hole), f, atol=1e-3))
    True
    """
    f = np.asarray(b0_hz, dtype=np.float64)
    m = np.asarray(mask, dtype=bool)
    if m.all():
        return f.copy()
    if not m.any():
        raise InputError("cannot extend a field map from an empty mask")
    vs = np.broadcast_to(np.asarray(voxel_size_mm, dtype=np.float64), (3,))
    out, _ = harmonic_fill(f, m, tuple(1.0 / vs**2), rtol=rtol, maxiter=maxiter)
    return out


#: Relative residual of the harmonic extension in :func:`regularise_b0`. On the 7 T head of
#: benchmarks/bench_fieldmap.py the extended map then lies within 0.2 Hz of the converged
#: solution everywhere (the map's own error inside the mask is about 1.5 Hz rms), in 13
#: instead of 19 multigrid-preconditioned iterations, with float32 vectors (see _multigrid).
EXTENSION_RTOL = 1e-4


def regularise_b0(b0_hz, mask, *, voxel_size_mm=(1.0, 1.0, 1.0), weights=None, smooth_fwhm_mm: float = 0.0,
                  reject_outliers: bool = True, extend: bool = True):
    """Outlier rejection, masked smoothing and harmonic extension, in that order.

    Returns ``(b0_hz, outliers)``.  Outliers are left out of the smoothing weights and
    replaced by the normalised average of their neighbours (FWHM at least two voxels).
    The extension is solved to a relative residual of :data:`EXTENSION_RTOL`.
    """
    f = np.where(mask, np.asarray(b0_hz, dtype=np.float64), 0.0)
    outliers = find_outliers(f, mask) if reject_outliers else np.zeros(mask.shape, dtype=bool)
    good = mask & ~outliers
    # weights enter Gaussian sums only: float32 keeps them at half the memory
    w = np.ones(f.shape, np.float32) if weights is None else np.asarray(weights, dtype=np.float32)
    if outliers.any():
        # replace each outlier by the normalised Gaussian average of its good neighbours
        fill_fwhm = max(smooth_fwhm_mm, 2.0 * float(np.max(voxel_size_mm)))
        sigma = _sigma_vox(fill_fwhm, voxel_size_mm)
        num, den, box = _normalised_gaussian(np.where(good, f, 0.0), np.where(good, w, 0.0), sigma)
        ok = np.zeros(mask.shape, bool)
        if box is not None:
            ok[box] = outliers[box] & (den > 1e-12 * max(float(den.max()), 1e-300))
            f = f.copy()
            f[box][ok[box]] = num[ok[box]] / den[ok[box]]
        good = good | ok
    if smooth_fwhm_mm > 0:
        f = smooth_masked(f, good, fwhm_mm=smooth_fwhm_mm, voxel_size_mm=voxel_size_mm, weights=w)
    f = np.where(good, f, 0.0)
    if extend and good.any():
        f = extend_harmonic(f, good, voxel_size_mm=voxel_size_mm, rtol=EXTENSION_RTOL)
    return f, outliers


# ------------------------------------------------------------------------------------------
# entry points
# ------------------------------------------------------------------------------------------
def _auto_mask(magnitude, mask):
    if mask is not None:
        m = np.asarray(mask, dtype=bool)
        if m.shape != magnitude.shape:
            raise InputError(f"mask shape {m.shape} differs from image shape {magnitude.shape}")
        return m
    return magnitude_mask(magnitude)


def b0_from_echoes(echoes, echo_times_s, *, mask=None, voxel_size_mm=(1.0, 1.0, 1.0), unwrap_method="quality",
                   smooth_fwhm_mm: float = 0.0, reject_outliers: bool = True, extend: bool = True) -> FieldMapResult:
    """B0 map in Hz from two or more complex gradient-echo images.

    Parameters
    ----------
    echoes : sequence of complex ndarray, 3D
    echo_times_s : sequence of float
        Echo times in seconds, one per echo.
    mask : ndarray of bool, optional
        Default: :func:`fieldfix.phase.magnitude_mask` of the first echo's magnitude.
    voxel_size_mm : 3 floats
    unwrap_method : {"quality", "laplacian"}
    smooth_fwhm_mm : float
        Width of the masked smoothing (0: none).
    reject_outliers, extend : bool

    Returns
    -------
    FieldMapResult
    """
    if len(echoes) < 2:
        raise InputError("need at least two echoes")
    tes = tuple(float(t) for t in echo_times_s)
    if len(tes) != len(echoes):
        raise InputError(f"{len(echoes)} echoes but {len(tes)} echo times")
    shapes = {np.shape(z) for z in echoes}
    if len(shapes) != 1:
        raise InputError(f"echo images differ in shape: {sorted(shapes)}")
    first = int(np.argmin(tes))
    magnitude = np.abs(np.asarray(echoes[first]))
    m = _auto_mask(magnitude, mask)
    if len(echoes) == 2:
        order = np.argsort(tes)
        z1, z2 = echoes[order[0]], echoes[order[1]]
        dte = tes[order[1]] - tes[order[0]]
        if not dte > 0:
            raise InputError("the two echo times must differ")
        dphi, weight = phase_difference(z1, z2)
        res = unwrap(dphi, m, method=unwrap_method)
        del dphi
        raw = phase_to_hz(res.phase, dte)
        n_changed, n_regions, spacing = res.n_changed, res.n_regions, dte
        del res  # its phase and 2*pi multiples (float64, int64) would stay through the regularisation
        method = f"two echoes, {unwrap_method} unwrap"
    else:
        raw, weight, info = fit_multi_echo(echoes, tes, m, unwrap_method=unwrap_method)
        n_changed, n_regions, spacing = info["n_offset_changed"], info["n_regions"], info["shortest_spacing_s"]
        method = f"{len(echoes)} echoes, temporal unwrap + weighted fit, {unwrap_method} unwrap"
    raw[~m] = 0.0
    b0, outliers = regularise_b0(raw, m, voxel_size_mm=voxel_size_mm, weights=weight,
                                 smooth_fwhm_mm=smooth_fwhm_mm, reject_outliers=reject_outliers, extend=extend)
    return FieldMapResult(b0, m, magnitude, raw, outliers, n_changed, n_regions, unaliased_range_hz(spacing),
                          tuple(sorted(tes)), method)


def b0_from_phase_difference(phase_diff_rad, delta_te_s, *, magnitude=None, mask=None,
                             voxel_size_mm=(1.0, 1.0, 1.0), unwrap_method="quality", smooth_fwhm_mm: float = 0.0,
                             reject_outliers: bool = True, extend: bool = True) -> FieldMapResult:
    """B0 map in Hz from a (wrapped) phase-difference image in radians and the echo spacing.

    A magnitude image (or a mask) is needed to know where the object is; the magnitude
    also weights the smoothing.
    """
    dphi = wrap_phase(phase_diff_rad)
    if magnitude is None and mask is None:
        raise InputError("a phase-difference image needs a magnitude image or a mask")
    mag = np.ones(dphi.shape) if magnitude is None else np.abs(np.asarray(magnitude, dtype=np.float64))
    if mag.shape != dphi.shape:
        raise InputError(f"magnitude shape {mag.shape} differs from phase-difference shape {dphi.shape}")
    m = _auto_mask(mag, mask)
    res = unwrap(dphi, m, method=unwrap_method)
    raw = np.where(m, phase_to_hz(res.phase, delta_te_s), 0.0)
    b0, outliers = regularise_b0(raw, m, voxel_size_mm=voxel_size_mm, weights=mag**2,
                                 smooth_fwhm_mm=smooth_fwhm_mm, reject_outliers=reject_outliers, extend=extend)
    return FieldMapResult(b0, m, mag, raw, outliers, res.n_changed, res.n_regions, unaliased_range_hz(delta_te_s),
                          (), f"phase difference, {unwrap_method} unwrap")


def b0_from_map(values, units="hz", *, magnitude=None, mask=None, field_strength_t=None,
                voxel_size_mm=(1.0, 1.0, 1.0), smooth_fwhm_mm: float = 0.0, reject_outliers: bool = False,
                extend: bool = True) -> FieldMapResult:
    """Validate a ready field map, convert it to Hz and regularise it.

    Without a mask or magnitude every finite voxel counts as measured.
    """
    b0 = field_to_hz(values, units, field_strength_t=field_strength_t)
    finite = np.isfinite(b0)
    if not finite.any():
        raise InputError("field map has no finite values")
    if magnitude is not None:
        mag = np.abs(np.asarray(magnitude, dtype=np.float64))
        m = _auto_mask(mag, mask)
    else:
        mag = np.ones(b0.shape)
        m = finite if mask is None else _auto_mask(mag, mask)
    m = m & finite
    raw = np.where(m, b0, 0.0)
    out, outliers = regularise_b0(raw, m, voxel_size_mm=voxel_size_mm, smooth_fwhm_mm=smooth_fwhm_mm,
                                  reject_outliers=reject_outliers, extend=extend)
    return FieldMapResult(out, m, mag, raw, outliers, 0, 0, None, (), f"ready map in {units}")
