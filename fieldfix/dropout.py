"""Susceptibility dropout predicted from a B0 map: through-plane retention, echo shift, BOLD sensitivity.

A field map in Hz (measured in a pilot, or modelled) predicts how much gradient-echo
signal each voxel keeps for a given protocol (slice thickness, echo time, slice
orientation and tilt, phase-encode polarity, optional z-shim moment).

Physics in brief (all gradients in world coordinates, taken through the affine):

* **Through-plane dephasing.** A field gradient ``g_n`` (Hz/mm) along the slice
  normal winds the phase across the slice by ``2*pi*g_n*t*z`` at time ``t``. The
  surviving fraction is the magnitude of the slice profile's Fourier transform,
  ``R = |P(u)| / P(0)`` with ``u = |g_n*t + m| * thickness`` in cycles per slice
  thickness (``m`` is a z-shim moment in cycles/mm). A rectangular profile gives the
  sinc law ``R = |sinc(u)|``; a Gaussian profile of FWHM = thickness gives
  ``R = exp(-pi^2 u^2 / (4 ln 2))``; a numeric profile comes from an RF pulse shape by
  the small-tip Fourier approximation (the excited profile is the Fourier transform of
  the RF envelope).
* **Echo shift along phase encoding** (Deichmann et al. 2002, NeuroImage 15:120-135).
  A field gradient along the phase-encode axis adds to the k-space traversal of the EPI
  readout, so the echo of that voxel forms at ``TE' = TE / (1 + Q)`` with
  ``Q = s * dF * N * esp``, where ``dF`` is the field change per voxel step along the
  phase-encode axis (Hz), ``s`` the polarity (+1 for ``j``, -1 for ``j-``; BIDS: with
  ``s = +1`` a positive field shifts the image towards increasing index), ``N`` the
  number of phase-encode lines of the full k-space and ``esp`` the effective echo spacing.
  The signal is lost when ``TE'`` leaves the acquisition window
  ``[TE - N*(pf - 1/2)*esp, TE + N/2*esp]`` (partial Fourier factor ``pf``; the
  omitted lines are the early ones) or when ``1 + Q <= 0`` (no echo forms).
* **Readout direction.** A gradient ``dF_ro`` (Hz per voxel step along the readout axis)
  shifts the echo within each readout line by ``dF_ro * t`` in units of the line's
  half-extent ``1/2``; the signal is lost when ``|dF_ro * TE'| > 1/2``.
* **BOLD sensitivity** (Weiskopf et al. 2006, NeuroImage 33:493-504): the through-plane
  retention evaluated at the local echo time times the local-to-nominal echo-time ratio,
  ``BS = R(TE') * TE'/TE``, zero where the echo is lost. Image distortion (the Jacobian
  intensity change) is not part of BS.

Slice geometry. World coordinates are NIfTI RAS+ millimetres (x to the subject's
right, y anterior, z superior). A slice frame holds the unit slice normal and the world
vectors of one voxel step along the phase-encode and readout axes. **Tilt sign
convention:** a tilt of ``+theta`` degrees is a right-handed rotation by ``theta``
about the world +x (left-to-right) axis: the normal of an axial slice turns from
superior towards posterior and the slice's anterior edge rises (``+y -> (0, cos, sin)``).

This is research software, not a medical device; predicted maps are a planning aid.

Examples
--------
>>> import numpy as np
>>> round(float(through_plane_retention(10.0, 0.03, 2.0, "rect")), 4)  # u = 0.6
0.5046
>>> round(float(through_plane_retention(0.0, 0.03, 2.0, "gaussian")), 4)
1.0
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from .errors import GeometryError, InputError
from .geometry import slice_normal_world, world_gradient
from .units import GAMMA_HZ_PER_T

__all__ = [
    "PROFILES",
    "SliceFrame",
    "SliceProfile",
    "field_gradient_hz_per_mm",
    "tilt_rotation",
    "frame_from_affine",
    "frame_from_orientation",
    "windowed_sinc_pulse",
    "rf_slice_profile",
    "slice_profile",
    "zshim_cyc_per_mm",
    "through_plane_retention",
    "local_echo_time",
    "readout_echo_inside",
    "bold_sensitivity",
    "project_gradient",
    "dropout_maps",
    "epi_signal_fraction",
]

PROFILES = ("rect", "gaussian", "rf")

# Table step of the retention tables (cycles per slice thickness) used by the kernels.
TABLE_STEP = 1.0 / 1024.0
_RECT_TABLE_MAX = 64.0
_GAUSS_TABLE_MAX = 6.0


# --------------------------------------------------------------------------- gradients


def field_gradient_hz_per_mm(b0_hz: np.ndarray, affine: np.ndarray, at: np.ndarray | None = None) -> np.ndarray:
    """Gradient of a B0 map in Hz/mm along world x, y, z.

    Uses :func:`fieldfix.geometry.world_gradient` (central differences per voxel axis,
    then the chain rule through the affine), so oblique grids are right. The B0 map
    should be smooth and extended somewhat past the brain so that the differences at
    the brain edge do not see the zero background.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array
    affine : (4, 4) array
    at : (N,) int array, optional
        Flat indices of the voxels wanted (see :func:`fieldfix.geometry.world_gradient`).

    Returns
    -------
    (X, Y, Z, 3) float64 array, or (N, 3) with `at`; Hz/mm

    Example
    -------
    >>> import numpy as np
    >>> k = np.arange(5.0)[None, None, :] * np.ones((3, 3, 1))
    >>> field_gradient_hz_per_mm(4.0 * k, np.diag([2.0, 2.0, 2.0, 1.0]))[1, 1, 2].tolist()
    [0.0, 0.0, 2.0]
    """
    b0_hz = np.asarray(b0_hz, float)
    if b0_hz.ndim != 3:
        raise GeometryError(f"the B0 map must be 3D, got {b0_hz.ndim} dimensions")
    return world_gradient(b0_hz, affine, at)


# --------------------------------------------------------------------------- geometry


def tilt_rotation(tilt_deg: float) -> np.ndarray:
    """Rotation matrix for a slice tilt about the world left-right (x) axis.

    Positive tilt is a right-handed rotation about +x (which points to the subject's
    right): +y (anterior) turns towards +z (superior), +z towards -y (posterior).

    Example
    -------
    >>> import numpy as np
    >>> np.round(tilt_rotation(90.0) @ np.array([0.0, 0.0, 1.0]), 6).tolist()
    [0.0, -1.0, 0.0]
    """
    t = np.deg2rad(float(tilt_deg))
    c, s = np.cos(t), np.sin(t)
    return np.array([[1.0, 0.0, 0.0], [0.0, c, -s], [0.0, s, c]])


@dataclass(frozen=True)
class SliceFrame:
    """Slice geometry in world coordinates.

    Attributes
    ----------
    normal : (3,) array
        Unit slice normal.
    pe_step_mm : (3,) array or None
        World vector of one voxel step towards increasing phase-encode index (mm).
    ro_step_mm : (3,) array or None
        World vector of one voxel step along the readout axis (mm).
    pe_lines : int or None
        Number of phase-encode lines of the full k-space (image matrix along PE).
    """

    normal: np.ndarray
    pe_step_mm: np.ndarray | None = None
    ro_step_mm: np.ndarray | None = None
    pe_lines: int | None = None
    tilt_deg: float = 0.0
    description: str = field(default="", compare=False)

    def as_dict(self) -> dict:
        """JSON-friendly summary."""
        out = {"slice_normal_world": [round(float(v), 6) for v in self.normal], "tilt_deg": float(self.tilt_deg)}
        if self.pe_step_mm is not None:
            out["pe_step_world_mm"] = [round(float(v), 6) for v in self.pe_step_mm]
        if self.ro_step_mm is not None:
            out["readout_step_world_mm"] = [round(float(v), 6) for v in self.ro_step_mm]
        if self.pe_lines is not None:
            out["pe_lines"] = int(self.pe_lines)
        if self.description:
            out["description"] = self.description
        return out


def frame_from_affine(
    affine: np.ndarray,
    slice_axis: int = 2,
    pe_axis: int | None = None,
    *,
    tilt_deg: float = 0.0,
    shape: tuple[int, ...] | None = None,
) -> SliceFrame:
    """Slice frame of an EPI grid (or any grid) given by its affine.

    The normal is the true normal of the slice plane (cross product of the in-plane axis
    directions, :func:`fieldfix.geometry.slice_normal_world`), signed towards increasing
    slice index. An extra `tilt_deg` is applied on top (see :func:`tilt_rotation`).

    Parameters
    ----------
    affine : (4, 4) array
    slice_axis : int
        Voxel axis across slices (0, 1 or 2).
    pe_axis : int, optional
        Voxel axis of phase encoding (not the slice axis). The readout axis is the third.
    tilt_deg : float
    shape : tuple, optional
        Grid shape; gives the number of phase-encode lines.

    Example
    -------
    >>> import numpy as np
    >>> f = frame_from_affine(np.diag([2.0, 2.0, 3.0, 1.0]), 2, 1, shape=(64, 64, 30))
    >>> f.normal.tolist(), f.pe_step_mm.tolist(), f.pe_lines
    ([0.0, 0.0, 1.0], [0.0, 2.0, 0.0], 64)
    """
    affine = np.asarray(affine, float)
    if slice_axis not in (0, 1, 2):
        raise InputError(f"slice axis must be 0, 1 or 2 (i, j or k), got {slice_axis!r}")
    if pe_axis is not None and (pe_axis not in (0, 1, 2) or pe_axis == slice_axis):
        raise InputError(f"the phase-encode axis ({pe_axis}) must differ from the slice axis ({slice_axis})")
    rot = tilt_rotation(tilt_deg)
    normal = rot @ slice_normal_world(affine, slice_axis)
    pe_step = ro_step = None
    pe_lines = None
    if pe_axis is not None:
        ro_axis = 3 - slice_axis - pe_axis
        pe_step = rot @ affine[:3, pe_axis]
        ro_step = rot @ affine[:3, ro_axis]
        if shape is not None:
            pe_lines = int(shape[pe_axis])
    return SliceFrame(normal, pe_step, ro_step, pe_lines, float(tilt_deg),
                      f"grid slice axis {'ijk'[slice_axis]}" + (f", PE axis {'ijk'[pe_axis]}" if pe_axis is not None else ""))


_WORLD_AXES = {"x": 0, "y": 1, "z": 2}
_ORIENTATION_NORMAL = {"axial": 2, "coronal": 1, "sagittal": 0}


def frame_from_orientation(
    orientation: str = "axial",
    tilt_deg: float = 0.0,
    *,
    pe_world_axis: str | None = "y",
    inplane_mm: float = 3.0,
    pe_lines: int | None = 64,
) -> SliceFrame:
    """Slice frame from a named orientation plus a tilt about the left-right axis.

    Parameters
    ----------
    orientation : {'axial', 'coronal', 'sagittal'}
        Untilted normals: axial +z (superior), coronal +y (anterior), sagittal +x (right).
    tilt_deg : float
        Rotation about world +x, see :func:`tilt_rotation` (positive: anterior edge of an
        axial slice up).
    pe_world_axis : {'x', 'y', 'z'} or None
        World axis of the untilted phase-encode direction (x left-right, y
        posterior-anterior, z inferior-superior); positive PE polarity then shifts a positive
        field towards +axis. Must lie in the slice plane.
    inplane_mm : float
        In-plane voxel size (both in-plane axes).
    pe_lines : int or None
        Number of phase-encode lines (full k-space).

    Example
    -------
    >>> f = frame_from_orientation("axial", 90.0, pe_world_axis="y", inplane_mm=2.0)
    >>> [round(float(v), 6) + 0.0 for v in f.normal], [round(float(v), 6) + 0.0 for v in f.pe_step_mm]
    ([0.0, -1.0, 0.0], [0.0, 0.0, 2.0])
    """
    if orientation not in _ORIENTATION_NORMAL:
        raise InputError(f"unknown slice orientation {orientation!r}; use axial, coronal or sagittal")
    n_axis = _ORIENTATION_NORMAL[orientation]
    rot = tilt_rotation(tilt_deg)
    normal = rot @ np.eye(3)[n_axis]
    pe_step = ro_step = None
    if pe_world_axis is not None:
        if pe_world_axis not in _WORLD_AXES:
            raise InputError(f"unknown world axis {pe_world_axis!r}; use x, y or z")
        p_axis = _WORLD_AXES[pe_world_axis]
        if p_axis == n_axis:
            raise InputError(f"phase encoding along {pe_world_axis} is not in the plane of {orientation} slices")
        if not inplane_mm > 0:
            raise InputError(f"the in-plane voxel size must be positive, got {inplane_mm}")
        r_axis = 3 - n_axis - p_axis
        pe_step = rot @ (np.eye(3)[p_axis] * float(inplane_mm))
        ro_step = rot @ (np.eye(3)[r_axis] * float(inplane_mm))
    return SliceFrame(normal, pe_step, ro_step, None if pe_lines is None else int(pe_lines), float(tilt_deg),
                      f"{orientation}, tilt {float(tilt_deg):g} deg")


def project_gradient(gradient_hz_per_mm: np.ndarray, frame: SliceFrame) -> dict[str, np.ndarray | None]:
    """Project a world gradient onto a slice frame.

    Returns
    -------
    dict with ``normal_hz_per_mm`` (gradient along the slice normal), ``pe_hz_per_voxel``
    and ``ro_hz_per_voxel`` (field change per voxel step along +PE index and readout;
    None when the frame has no in-plane axes).
    """
    g = np.asarray(gradient_hz_per_mm, float)
    out: dict[str, np.ndarray | None] = {"normal_hz_per_mm": g @ frame.normal}
    out["pe_hz_per_voxel"] = None if frame.pe_step_mm is None else g @ frame.pe_step_mm
    out["ro_hz_per_voxel"] = None if frame.ro_step_mm is None else g @ frame.ro_step_mm
    return out


# --------------------------------------------------------------------------- slice profiles


def windowed_sinc_pulse(tbw: float = 4.0, n_samples: int = 512, window: str = "hamming") -> tuple[np.ndarray, np.ndarray]:
    """A windowed-sinc RF envelope on normalised time ``tau`` in ``[-1/2, 1/2]``.

    ``b1(tau) = sinc(tbw * tau) * w(tau)`` with ``w`` a Hamming
    (``0.54 + 0.46 cos(2 pi tau)``), Hann or no ('none') window. The time-bandwidth
    product `tbw` is the number of sinc zero crossings across the pulse.

    Returns
    -------
    tau, b1 : arrays of length `n_samples` (b1 peaks at 1)

    Example
    -------
    >>> tau, b1 = windowed_sinc_pulse(4.0, 513)
    >>> float(b1.max())
    1.0
    """
    if not tbw > 0:
        raise InputError(f"the time-bandwidth product must be positive, got {tbw}")
    tau = (np.arange(n_samples) + 0.5) / n_samples - 0.5
    if window == "hamming":
        w = 0.54 + 0.46 * np.cos(2 * np.pi * tau)
    elif window == "hann":
        w = 0.5 + 0.5 * np.cos(2 * np.pi * tau)
    elif window == "none":
        w = np.ones_like(tau)
    else:
        raise InputError(f"unknown RF window {window!r}; use hamming, hann or none")
    b1 = np.sinc(tbw * tau) * w
    return tau, b1 / np.abs(b1).max()


def rf_slice_profile(tau: np.ndarray, b1: np.ndarray, tbw: float, v: np.ndarray) -> np.ndarray:
    """Excited slice profile of an RF envelope by the small-tip Fourier approximation.

    The transverse magnetisation after a small flip and ideal refocusing is, up to a
    constant, the Fourier transform of the envelope, ``P(f) = sum b1(tau) exp(-2 pi i f T tau)``.
    Positions are given in nominal slice thicknesses ``v = f / BW`` with ``BW = tbw / T``.

    Parameters
    ----------
    tau, b1 : arrays
        Normalised time (pulse duration 1, centred on 0) and envelope.
    tbw : float
        Time-bandwidth product (defines the nominal thickness).
    v : array
        Positions across the slice in units of the nominal thickness.

    Returns
    -------
    complex array like `v`, normalised so that ``P(0) = 1``.
    """
    tau = np.asarray(tau, float)
    dtau = np.gradient(tau) if tau.size > 1 else np.ones(1)
    phase = np.exp(-2j * np.pi * np.multiply.outer(np.asarray(v, float) * tbw, tau))
    prof = phase @ (np.asarray(b1, float) * dtau)
    centre = (np.asarray(b1, float) * dtau).sum()
    return prof / centre


@dataclass(frozen=True)
class SliceProfile:
    """A slice profile and its through-plane retention curve.

    ``retention(u)`` gives the surviving fraction for a through-plane phase winding of
    ``u`` cycles across the nominal slice thickness. ``table`` samples it at
    ``u = 0, step, 2*step, ...``; beyond the table the kernels use the exact sinc law
    (``tail='sinc'``) or zero (``tail='zero'``).
    """

    kind: str
    table: np.ndarray = field(repr=False)
    step: float = TABLE_STEP
    tail: str = "zero"
    tbw: float | None = None
    window: str | None = None

    def retention(self, u: np.ndarray | float) -> np.ndarray:
        """Retention for `u` cycles per slice thickness (exact for rect and gaussian)."""
        u = np.abs(np.asarray(u, float))
        if self.kind == "rect":
            return np.abs(np.sinc(u))
        if self.kind == "gaussian":
            return np.exp(-(np.pi**2) * u**2 / (4.0 * np.log(2.0)))
        idx = u / self.step
        out = np.interp(idx, np.arange(self.table.size), self.table, right=0.0)
        return out


@functools.lru_cache(maxsize=2)
def _closed_form_table(kind: str) -> np.ndarray:
    """Retention table of the rectangular (|sinc|) or Gaussian (FWHM = thickness) profile."""
    if kind == "rect":
        return np.abs(np.sinc(np.arange(0.0, _RECT_TABLE_MAX + TABLE_STEP / 2, TABLE_STEP)))
    u = np.arange(0.0, _GAUSS_TABLE_MAX + TABLE_STEP / 2, TABLE_STEP)
    return np.exp(-(np.pi**2) * u**2 / (4.0 * np.log(2.0)))


@functools.lru_cache(maxsize=16)
def _rf_table(tbw: float, window: str) -> np.ndarray:
    tau, b1 = windowed_sinc_pulse(tbw, 512, window)
    dv = 1.0 / 128.0
    v = np.arange(-6.0, 6.0 + dv / 2, dv)  # the profile is negligible beyond a few thicknesses
    prof = rf_slice_profile(tau, b1, tbw, v) * dv
    u_max = tbw / 2.0 + 1.0
    u = np.arange(0.0, u_max + TABLE_STEP / 2, TABLE_STEP)
    # Sum the profile-weighted phase over positions: |sum P(v) exp(2 pi i u v)| / |sum P(v)|.
    # Done in blocks to keep the (u, v) matrix small.
    out = np.empty(u.size)
    for start in range(0, u.size, 512):
        block = u[start:start + 512]
        out[start:start + 512] = np.abs(np.exp(2j * np.pi * np.multiply.outer(block, v)) @ prof)
    out /= np.abs(prof.sum())
    out[-1] = 0.0
    out.setflags(write=False)
    return out


def slice_profile(kind: str = "rect", *, tbw: float = 4.0, window: str = "hamming") -> SliceProfile:
    """Build a slice profile: 'rect' (ideal slab), 'gaussian' (FWHM = thickness) or 'rf'.

    'rf' is the numeric profile of a windowed-sinc pulse (`tbw`, `window`) by the
    small-tip Fourier approximation; its nominal thickness is the pulse bandwidth mapped
    through the slice-select gradient.

    Example
    -------
    >>> p = slice_profile("rf", tbw=4.0)
    >>> round(float(p.retention(0.0)), 6)
    1.0
    """
    if isinstance(kind, SliceProfile):
        return kind
    if kind in ("rect", "gaussian"):
        return SliceProfile(kind, _closed_form_table(kind), TABLE_STEP, "sinc" if kind == "rect" else "zero")
    if kind == "rf":
        return SliceProfile("rf", _rf_table(float(tbw), str(window)), TABLE_STEP, "zero", float(tbw), str(window))
    raise InputError(f"unknown slice profile {kind!r}; use one of {', '.join(PROFILES)}")


# --------------------------------------------------------------------------- retention and echo shift


def zshim_cyc_per_mm(moment_mtms_per_m: float) -> float:
    """Convert a z-shim gradient moment from mT*ms/m to a k-space offset in cycles/mm.

    ``k = gamma/(2 pi) * moment``; 1 mT*ms/m is about 0.0426 cycles/mm for protons.

    Example
    -------
    >>> round(zshim_cyc_per_mm(1.0), 5)
    0.04258
    """
    return float(moment_mtms_per_m) * 1e-6 * GAMMA_HZ_PER_T / 1000.0


def through_plane_retention(
    normal_hz_per_mm: np.ndarray | float,
    te_s: np.ndarray | float,
    thickness_mm: float,
    profile: str | SliceProfile = "rect",
    zshim_cyc_per_mm: float = 0.0,
) -> np.ndarray:
    """Fraction of signal kept against through-plane dephasing.

    ``R = retention_profile(|g_n * t + m| * thickness)``.

    Parameters
    ----------
    normal_hz_per_mm : array
        Field gradient along the slice normal (Hz/mm).
    te_s : float or array
        Echo time (s), or a local echo time map.
    thickness_mm : float
        Nominal slice thickness (mm).
    profile : {'rect', 'gaussian', 'rf'} or SliceProfile
    zshim_cyc_per_mm : float
        Compensation moment along the normal (cycles/mm, see :func:`zshim_cyc_per_mm`).

    Example
    -------
    >>> round(float(through_plane_retention(5.0, 0.03, 3.0, "gaussian")), 4)
    0.4863
    """
    if not thickness_mm > 0:
        raise InputError(f"the slice thickness must be positive, got {thickness_mm}")
    prof = slice_profile(profile) if not isinstance(profile, SliceProfile) else profile
    with np.errstate(invalid="ignore"):
        u = np.abs(np.asarray(normal_hz_per_mm, float) * np.asarray(te_s, float) + zshim_cyc_per_mm) * thickness_mm
    out = prof.retention(np.where(np.isfinite(u), u, 0.0))
    return np.where(np.isfinite(u), out, 0.0)


def acquisition_window_s(te_s: float, echo_spacing_s: float, pe_lines: int, partial_fourier: float = 1.0) -> tuple[float, float]:
    """Start and end of the phase-encode acquisition window (s after excitation).

    ``[TE - N*(pf - 1/2)*esp, TE + N/2*esp]``: partial Fourier drops the early lines.

    Example
    -------
    >>> [round(t, 6) for t in acquisition_window_s(0.03, 0.0005, 64, 0.75)]
    [0.022, 0.046]
    """
    if not 0.5 < partial_fourier <= 1.0:
        raise InputError(f"the partial Fourier factor must lie in (0.5, 1], got {partial_fourier}")
    before = pe_lines * (partial_fourier - 0.5) * echo_spacing_s
    after = pe_lines * 0.5 * echo_spacing_s
    return te_s - before, te_s + after


def local_echo_time(
    pe_hz_per_voxel: np.ndarray | float,
    te_s: float,
    *,
    pe_sign: int,
    echo_spacing_s: float,
    pe_lines: int,
    partial_fourier: float = 1.0,
) -> tuple[np.ndarray, np.ndarray]:
    """Local echo time and whether the echo falls in the acquired k-space window.

    After Deichmann et al. 2002 (NeuroImage 15:120-135): ``TE' = TE / (1 + Q)``,
    ``Q = pe_sign * pe_hz_per_voxel * pe_lines * echo_spacing_s``.

    Parameters
    ----------
    pe_hz_per_voxel : array
        Field change per voxel step towards increasing PE index (Hz).
    te_s : float
        Nominal echo time (time of the k-space centre line).
    pe_sign : {+1, -1}
        Phase-encode polarity (BIDS: ``j`` is +1, ``j-`` is -1).
    echo_spacing_s : float
        Effective echo spacing (s; divided by any in-plane acceleration).
    pe_lines : int
        Phase-encode lines of the full k-space.
    partial_fourier : float
        Fraction of k-space acquired along PE (the early lines are skipped).

    Returns
    -------
    te_local_s : array (inf where no echo forms)
    inside : bool array

    Example
    -------
    >>> te, ok = local_echo_time(np.array([0.0, 10.0, -20.0]), 0.03, pe_sign=1, echo_spacing_s=5e-4, pe_lines=64)
    >>> np.round(te * 1000, 3).tolist(), ok.tolist()
    ([30.0, 22.727, 83.333], [True, True, False])
    """
    if pe_sign not in (1, -1):
        raise InputError(f"the phase-encode polarity must be +1 or -1, got {pe_sign!r}")
    if not (echo_spacing_s > 0 and pe_lines > 0 and te_s > 0):
        raise InputError("echo time, echo spacing and number of phase-encode lines must be positive")
    g = np.asarray(pe_hz_per_voxel, float)
    denom = 1.0 + pe_sign * g * pe_lines * echo_spacing_s
    with np.errstate(divide="ignore", invalid="ignore"):
        te_local = np.where(denom > 0, te_s / np.where(denom > 0, denom, 1.0), np.inf)
    start, end = acquisition_window_s(te_s, echo_spacing_s, pe_lines, partial_fourier)
    inside = (denom > 0) & (te_local >= start) & (te_local <= end)
    return te_local, inside


def readout_echo_inside(ro_hz_per_voxel: np.ndarray | float, te_local_s: np.ndarray | float) -> np.ndarray:
    """Whether a readout-direction gradient leaves the echo inside each readout line.

    The gradient shifts the echo along k_x by ``dF_ro * t`` (in units of ``1/voxel``);
    each line covers ``[-1/2, 1/2]``.
    """
    with np.errstate(invalid="ignore"):
        return np.abs(np.asarray(ro_hz_per_voxel, float) * np.asarray(te_local_s, float)) <= 0.5


def bold_sensitivity(
    normal_hz_per_mm: np.ndarray,
    pe_hz_per_voxel: np.ndarray,
    te_s: float,
    thickness_mm: float,
    *,
    pe_sign: int,
    echo_spacing_s: float,
    pe_lines: int,
    ro_hz_per_voxel: np.ndarray | None = None,
    partial_fourier: float = 1.0,
    profile: str | SliceProfile = "rect",
    zshim_cyc_per_mm: float = 0.0,
) -> dict[str, np.ndarray]:
    """BOLD sensitivity after Weiskopf et al. 2006 (NeuroImage 33:493-504).

    ``BS = R(TE') * TE'/TE`` where the echo is acquired, else 0; ``R`` is the
    through-plane retention at the local echo time ``TE'`` (Deichmann et al. 2002).

    Returns
    -------
    dict with ``bold_sensitivity``, ``te_local_s``, ``echo_inside`` (PE and readout) and
    ``retention_local`` (through-plane retention at TE').

    Example
    -------
    >>> out = bold_sensitivity(np.array([0.0]), np.array([2.0]), 0.03, 3.0, pe_sign=1,
    ...                        echo_spacing_s=5e-4, pe_lines=64)
    >>> round(float(out["bold_sensitivity"][0]), 4)
    0.9398
    """
    te_local, inside = local_echo_time(pe_hz_per_voxel, te_s, pe_sign=pe_sign, echo_spacing_s=echo_spacing_s,
                                       pe_lines=pe_lines, partial_fourier=partial_fourier)
    if ro_hz_per_voxel is not None:
        inside = inside & readout_echo_inside(ro_hz_per_voxel, te_local)
    te_eval = np.where(inside, te_local, te_s)
    retention_local = through_plane_retention(normal_hz_per_mm, te_eval, thickness_mm, profile, zshim_cyc_per_mm)
    bs = np.where(inside, retention_local * te_eval / te_s, 0.0)
    return {"bold_sensitivity": bs, "te_local_s": te_local, "echo_inside": inside, "retention_local": retention_local}


def dropout_maps(
    b0_hz: np.ndarray,
    affine: np.ndarray,
    frame: SliceFrame,
    *,
    te_s: float,
    thickness_mm: float,
    profile: str | SliceProfile = "rect",
    zshim_cyc_per_mm: float = 0.0,
    pe_sign: int | None = None,
    echo_spacing_s: float | None = None,
    partial_fourier: float = 1.0,
) -> dict[str, np.ndarray]:
    """Retention (and, with phase-encode details, BOLD sensitivity) maps from a B0 map.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array
    affine : (4, 4) array
    frame : SliceFrame
        Slice normal, and PE/readout steps plus ``pe_lines`` for the BOLD sensitivity.
    te_s, thickness_mm, profile, zshim_cyc_per_mm
        See :func:`through_plane_retention`.
    pe_sign, echo_spacing_s, partial_fourier
        See :func:`local_echo_time`. BOLD sensitivity is computed when `pe_sign` and
        `echo_spacing_s` are given and the frame has a PE axis and line count.

    Returns
    -------
    dict with ``retention`` (at the nominal TE), ``gradient_normal_hz_per_mm`` and, when
    computed, ``bold_sensitivity``, ``te_local_s``, ``echo_inside``.

    Example
    -------
    >>> import numpy as np
    >>> k = np.arange(6.0)[None, None, :] * np.ones((4, 4, 1))
    >>> maps = dropout_maps(15.0 * k, np.eye(4), frame_from_affine(np.eye(4), 2), te_s=0.03, thickness_mm=1.0)
    >>> round(float(maps["retention"][2, 2, 3]), 4)  # 15 Hz/mm * 30 ms * 1 mm = 0.45 cycles
    0.6986
    """
    if not te_s > 0:
        raise InputError(f"the echo time must be positive, got {te_s}")
    grad = field_gradient_hz_per_mm(b0_hz, affine)
    proj = project_gradient(grad, frame)
    prof = slice_profile(profile)
    out = {
        "gradient_normal_hz_per_mm": proj["normal_hz_per_mm"],
        "retention": through_plane_retention(proj["normal_hz_per_mm"], te_s, thickness_mm, prof, zshim_cyc_per_mm),
    }
    if pe_sign is not None and echo_spacing_s is not None:
        if frame.pe_step_mm is None or frame.pe_lines is None:
            raise InputError("BOLD sensitivity needs the phase-encode axis and the number of phase-encode lines")
        bs = bold_sensitivity(proj["normal_hz_per_mm"], proj["pe_hz_per_voxel"], te_s, thickness_mm,
                              pe_sign=pe_sign, echo_spacing_s=echo_spacing_s, pe_lines=frame.pe_lines,
                              ro_hz_per_voxel=proj["ro_hz_per_voxel"], partial_fourier=partial_fourier,
                              profile=prof, zshim_cyc_per_mm=zshim_cyc_per_mm)
        out.update(bs)
    return out


def epi_signal_fraction(
    b0_hz: np.ndarray,
    affine: np.ndarray,
    frame: SliceFrame,
    *,
    te_s: float,
    thickness_mm: float,
    pe_sign: int,
    echo_spacing_s: float,
    partial_fourier: float = 1.0,
    profile: str | SliceProfile = "rect",
) -> np.ndarray:
    """Fraction of its signal a gradient-echo EPI voxel keeps under the field (0 to 1).

    The through-plane retention at the voxel's local echo time where its echo is acquired, else
    0 (Deichmann et al. 2002, NeuroImage 15:120-135; the maps of :func:`dropout_maps`). This is
    the image intensity factor, not the BOLD sensitivity: the ``TE'/TE`` contrast factor and the
    T2* decay between ``TE'`` and ``TE`` are left out. An EPI image is the anatomy times this
    factor, then distorted; a field-map magnitude taken at a short echo time keeps nearly all of it.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array
        The field (Hz) on its grid.
    affine : (4, 4) array
        The field's grid.
    frame : SliceFrame
        The EPI's slices: normal, PE and readout steps and ``pe_lines`` (:func:`frame_from_affine`).
    te_s, thickness_mm, pe_sign, echo_spacing_s, partial_fourier, profile
        The EPI's echo time (s), slice thickness (mm), polarity (+1 or -1), effective echo
        spacing (s), partial Fourier fraction and slice profile.

    Returns
    -------
    (X, Y, Z) float64 array on the field's grid.

    Example
    -------
    >>> import numpy as np
    >>> k = np.arange(6.0)[None, None, :] * np.ones((4, 4, 1))
    >>> frame = frame_from_affine(np.eye(4), 2, 1, shape=(4, 4, 6))
    >>> kept = epi_signal_fraction(15.0 * k, np.eye(4), frame, te_s=0.03, thickness_mm=1.0, pe_sign=1,
    ...                            echo_spacing_s=5e-4)
    >>> round(float(kept[2, 2, 3]), 4)  # no in-plane gradient: the retention at the nominal TE
    0.6986
    """
    if not te_s > 0:
        raise InputError(f"the echo time must be positive, got {te_s}")
    if frame.pe_step_mm is None or frame.pe_lines is None:
        raise InputError("the signal fraction needs the phase-encode axis and the number of phase-encode lines")
    proj = project_gradient(field_gradient_hz_per_mm(b0_hz, affine), frame)
    # the local-echo-time half of dropout_maps only: its retention at the nominal TE is not needed here
    local = bold_sensitivity(proj["normal_hz_per_mm"], proj["pe_hz_per_voxel"], te_s, thickness_mm, pe_sign=pe_sign,
                             echo_spacing_s=echo_spacing_s, pe_lines=frame.pe_lines,
                             ro_hz_per_voxel=proj["ro_hz_per_voxel"], partial_fourier=partial_fourier,
                             profile=slice_profile(profile))
    return np.where(local["echo_inside"], local["retention_local"], 0.0)
