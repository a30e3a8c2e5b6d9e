"""EPI acquisition simulator: k-space line by line, each line at its own time.

The simulator is the independent check of the shift physics in :mod:`fieldfix.shift`: it
knows nothing of shift maps. It starts from an object and a B0 map on a *fine* grid
(``oversample`` samples per output voxel along each axis), computes the signal of every
k-space sample by summing over the fine samples, and reconstructs by an inverse
discrete Fourier transform.

Signal model (spin-echo-free gradient echo, readout treated as instantaneous)::

    S(kr, kp) = mean_sub-voxels  rho(x) * exp(-2 pi i (kr * r / Nr + kp * p / Np))
                                        * exp(-2 pi i * f(x) * t(kp)) * exp(-t(kp) / T2*)

``r``, ``p`` are positions in output-voxel units along the readout and phase-encode (PE)
axes; ``f`` is the off-resonance in Hz; the gradient phase and the off-resonance phase
carry the same sign, as both are precession relative to the rotating frame. The slice
axis is integrated over the ``oversample`` sub-slices of each slice (a boxcar slice
profile), so through-slice field gradients dephase the signal (dropout), while in-plane
sub-voxel sampling lets the field vary within a voxel.

Spin echo (``spin_echo=True``): a refocusing pulse reverses the off-resonance phase
accrued before the echo, so the phase is referenced to the echo time,
``exp(-2 pi i f(x) (t(kp) - TE))``: the centre line carries no off-resonance phase (no
through-slice dephasing at the echo), while the phase still grows from line to line by
the same step, so the distortion is that of a gradient echo (common practice, no source).
``t2star_s`` then describes the decay with time since excitation as before.

Timing: line ``kp`` (integer, ``-Np//2 .. Np - Np//2 - 1``) is acquired at
``t(kp) = TE + polarity * kp * echo_spacing_s / acceleration``: polarity +1 (codes
``i``, ``j``, ``k``) traverses k-space towards increasing ``kp`` over time, -1 the
reverse; the centre line is acquired at the echo time.

In-plane acceleration R: the acquired lines are R steps of k-space apart and
``echo_spacing_s`` apart in time; the parallel-imaging reconstruction is modelled as
ideal (the missing lines carry the signal they would have at the time interpolated
between their acquired neighbours), so the effective echo spacing is
``echo_spacing_s / R``. Partial Fourier: only the last ``ceil(fraction * Np)`` lines of
the traversal are acquired (the early, outer lines are skipped, shortening the time
before the echo); the rest are zero-filled before reconstruction.

Noise is complex Gaussian, added to the acquired k-space samples and scaled so that
its standard deviation in each of the real and imaginary parts of the fully sampled
image is ``noise_sd``.

Examples
--------
>>> import numpy as np
>>> obj = np.ones((8, 16, 4))
>>> img = simulate_epi(obj, np.zeros_like(obj), pe_code="j", echo_spacing_s=5e-4,
...                    te_s=0.03, oversample=(2, 2, 2))
>>> img.shape, round(float(img.mean()), 6)
((4, 8, 2), 1.0)
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage

from ..errors import GeometryError, InputError
from ..geometry import parse_pe_code

__all__ = [
    "default_slice_axis",
    "fine_coordinates",
    "effective_echo_spacing_s",
    "epi_sidecar",
    "simulate_epi",
    "simulate_epi_run",
]


def default_slice_axis(pe_axis: int) -> int:
    """Slice axis used when none is given: the last axis that is not the PE axis."""
    return 2 if pe_axis != 2 else 1


def fine_coordinates(shape: tuple, oversample) -> list[np.ndarray]:
    """Positions, in output-voxel units, of the fine samples along each axis.

    Output voxel ``n`` spans ``[n - 1/2, n + 1/2]``; its ``o`` sub-samples sit at the
    centres of ``o`` equal parts.

    Examples
    --------
    >>> [c.tolist() for c in fine_coordinates((2,), 2)]
    [[-0.25, 0.25, 0.75, 1.25]]
    """
    factors = _factors(oversample, len(shape))
    return [(np.arange(n * o) + 0.5) / o - 0.5 for n, o in zip(shape, factors)]


def _factors(oversample, ndim: int) -> tuple[int, ...]:
    if np.isscalar(oversample):
        oversample = (int(oversample),) * ndim
    factors = tuple(int(o) for o in oversample)
    if len(factors) != ndim or any(o < 1 for o in factors):
        raise InputError(f"oversample must be {ndim} positive integers, got {oversample!r}")
    return factors


def effective_echo_spacing_s(echo_spacing_s: float, acceleration: int = 1) -> float:
    """Effective echo spacing: acquired-line spacing divided by the in-plane acceleration.

    Examples
    --------
    >>> effective_echo_spacing_s(0.001, 2)
    0.0005
    """
    return float(echo_spacing_s) / int(acceleration)


def epi_sidecar(pe_code: str, n_pe_lines: int, echo_spacing_s: float, te_s: float,
                acceleration: int = 1) -> dict:
    """BIDS timing keys describing a simulated run (seconds).

    Examples
    --------
    >>> epi_sidecar("j-", 65, 0.001, 0.03, 2)["TotalReadoutTime"]
    0.032
    """
    esp = effective_echo_spacing_s(echo_spacing_s, acceleration)
    return {
        "PhaseEncodingDirection": pe_code,
        "EffectiveEchoSpacing": esp,
        "TotalReadoutTime": esp * (int(n_pe_lines) - 1),
        "EchoTime": float(te_s),
        "ParallelReductionFactorInPlane": int(acceleration),
    }


def _dft_matrix(n_out: int, positions: np.ndarray, sign: float) -> np.ndarray:
    """exp(sign * 2 pi i * k * x / n_out) for k = -n_out//2 .. and the given positions."""
    k = np.arange(n_out) - n_out // 2
    return np.exp(sign * 2j * np.pi * np.outer(k, positions) / n_out)


def simulate_epi(
    object_fine: np.ndarray,
    b0_hz_fine: np.ndarray,
    *,
    pe_code: str,
    echo_spacing_s: float,
    te_s: float,
    oversample=2,
    acceleration: int = 1,
    partial_fourier: float = 1.0,
    slice_axis: int | None = None,
    t2star_s: float | None = None,
    noise_sd: float = 0.0,
    rng: np.random.Generator | None = None,
    complex_output: bool = False,
    spin_echo: bool = False,
) -> np.ndarray:
    """Simulate one EPI volume of an object in an inhomogeneous field.

    Parameters
    ----------
    object_fine : (F0, F1, F2) array
        Proton density (any units) on the fine grid; ``F_a = N_a * oversample_a``.
    b0_hz_fine : (F0, F1, F2) array
        Off-resonance in Hz on the same fine grid.
    pe_code : str
        BIDS phase-encode code (axis and polarity).
    echo_spacing_s : float
        Time between successively acquired k-space lines, s.
    te_s : float
        Time of the k-space centre line after excitation, s.
    oversample : int or 3 ints
        Fine samples per output voxel along each axis (those along the slice axis are
        the sub-slices of the through-slice integration).
    acceleration : int
        In-plane acceleration factor R (ideal parallel-imaging reconstruction).
    partial_fourier : float
        Fraction of PE lines acquired, 0.5 < fraction <= 1.
    slice_axis : int, optional
        Defaults to :func:`default_slice_axis`; the remaining axis is the readout.
    t2star_s : float, optional
        T2* relaxation during the readout (None: no decay).
    noise_sd : float
        Image-domain noise standard deviation (per real/imaginary part).
    rng : numpy.random.Generator, optional
        Needed when ``noise_sd > 0``.
    complex_output : bool
        Return the complex image instead of its magnitude.
    spin_echo : bool
        Reference the off-resonance phase to the echo time (a spin echo, see the module
        docstring): distortion stays, through-slice dephasing at the echo is refocused.

    Returns
    -------
    (N0, N1, N2) float64 magnitude (or complex128) image
    """
    obj = np.asarray(object_fine, float)
    field = np.asarray(b0_hz_fine, float)
    if obj.ndim != 3 or obj.shape != field.shape:
        raise GeometryError(f"object {obj.shape} and field {field.shape} must be 3D on the same fine grid")
    factors = _factors(oversample, 3)
    if any(f % o for f, o in zip(obj.shape, factors)):
        raise GeometryError(f"fine grid {obj.shape} is not a multiple of the oversampling {factors}")
    shape = tuple(f // o for f, o in zip(obj.shape, factors))
    pe_axis, polarity = parse_pe_code(pe_code)
    slice_axis = default_slice_axis(pe_axis) if slice_axis is None else int(slice_axis)
    if slice_axis == pe_axis or slice_axis not in (0, 1, 2):
        raise InputError(f"slice axis {slice_axis} must differ from the phase-encode axis {pe_axis}")
    readout_axis = 3 - pe_axis - slice_axis
    if not 0.5 < partial_fourier <= 1.0:
        raise InputError(f"partial Fourier fraction must be in (0.5, 1], got {partial_fourier}")
    if int(acceleration) < 1:
        raise InputError(f"acceleration must be a positive integer, got {acceleration}")
    if noise_sd > 0 and rng is None:
        raise InputError("noise needs a numpy Generator (rng) so the simulation is reproducible")

    order = (slice_axis, readout_axis, pe_axis)
    ns, nr, npe = (shape[a] for a in order)
    os_s, os_r, os_p = (factors[a] for a in order)
    # C-contiguous in (slice, sub-slice, readout, phase-encode) order: the per-line passes below
    # then stream through memory (a strided view of the input's order is several times slower).
    rho = np.ascontiguousarray(np.transpose(obj, order).reshape(ns, os_s, nr * os_r, npe * os_p)) / (os_s * os_r * os_p)
    f_hz = np.ascontiguousarray(np.transpose(field, order).reshape(ns, os_s, nr * os_r, npe * os_p))
    coords = fine_coordinates((nr, npe), (os_r, os_p))
    encode_r = _dft_matrix(nr, coords[0], -1.0)  # (nr, Fr)
    encode_p = _dft_matrix(npe, coords[1], -1.0)  # (npe, Fp)

    esp = effective_echo_spacing_s(echo_spacing_s, acceleration)
    k_lines = np.arange(npe) - npe // 2
    times = te_s + polarity * k_lines * esp  # acquisition time of each line
    n_acquired = int(math.ceil(partial_fourier * npe - 1e-9))
    traversal = np.argsort(times, kind="stable")  # lines in the order they are acquired
    acquired = np.zeros(npe, bool)
    acquired[traversal[npe - n_acquired:]] = True
    if times[acquired].min() < 0:
        raise InputError("the echo time is too short for this readout: the first line would precede excitation")

    kspace = np.zeros((ns, nr, npe), complex)
    first = traversal[npe - n_acquired]
    # Phase of every fine sample, advanced from line to line by a constant step.
    reference_s = te_s if spin_echo else 0.0
    current = rho * np.exp(-2j * np.pi * f_hz * (times[first] - reference_s))
    step = np.exp(-2j * np.pi * f_hz * esp)
    if t2star_s is not None:
        current = current * np.exp(-times[first] / t2star_s)
        step = step * np.exp(-esp / t2star_s)
    # Per line: the phase-encode sum over the fine samples (a matrix-vector product), the sum over
    # the sub-slices (through-slice integration), then the readout encoding; the phase advances in place.
    for line in traversal[npe - n_acquired:]:
        rows = (current @ encode_p[line]).sum(axis=1)  # PE sum, then through-slice integration: (ns, Fr)
        kspace[:, :, line] = rows @ encode_r.T
        current *= step
    if noise_sd > 0:
        scale = noise_sd * math.sqrt(nr * npe)
        noise = rng.normal(0.0, scale, kspace.shape) + 1j * rng.normal(0.0, scale, kspace.shape)
        kspace += noise * acquired[None, None, :]

    decode_r = _dft_matrix(nr, np.arange(nr), 1.0).T / nr  # (nr_image, nr_k)
    decode_p = _dft_matrix(npe, np.arange(npe), 1.0).T / npe
    image = np.einsum("ak,skl,bl->sab", decode_r, kspace, decode_p, optimize=True)
    image = np.transpose(image, np.argsort(order))
    return image if complex_output else np.abs(image)


def _rigid_matrix(rotation_deg: np.ndarray) -> np.ndarray:
    rx, ry, rz = np.deg2rad(rotation_deg)
    cx, sx, cy, sy, cz, sz = np.cos(rx), np.sin(rx), np.cos(ry), np.sin(ry), np.cos(rz), np.sin(rz)
    rot_x = np.array([[1, 0, 0], [0, cx, -sx], [0, sx, cx]])
    rot_y = np.array([[cy, 0, sy], [0, 1, 0], [-sy, 0, cy]])
    rot_z = np.array([[cz, -sz, 0], [sz, cz, 0], [0, 0, 1]])
    return rot_z @ rot_y @ rot_x


def _move(volume: np.ndarray, rotation_deg: np.ndarray, translation_fine: np.ndarray) -> np.ndarray:
    """Rigidly move a fine-grid volume about its centre (rotation in voxel axes, linear interp)."""
    matrix = _rigid_matrix(rotation_deg)
    centre = (np.array(volume.shape) - 1) / 2.0
    # Pull-back: output x takes the input at R^T (x - c - t) + c.
    inverse = matrix.T
    offset = centre - inverse @ (centre + translation_fine)
    return ndimage.affine_transform(volume, inverse, offset=offset, order=1, mode="nearest")


def simulate_epi_run(
    object_fine: np.ndarray,
    b0_hz_fine: np.ndarray,
    n_volumes: int,
    *,
    translation_sd_vox: float = 0.0,
    rotation_sd_deg: float = 0.0,
    noise_sd: float = 0.0,
    rng: np.random.Generator | None = None,
    **epi_options,
) -> tuple[np.ndarray, np.ndarray]:
    """Simulate a 4D EPI run with small rigid motion and noise.

    `epi_options` are the keywords of :func:`simulate_epi` (``pe_code``, ``echo_spacing_s``
    and ``te_s`` are required; ``oversample`` defaults to 2 as there).

    Each volume draws an independent small rigid displacement of the head (translation
    with standard deviation `translation_sd_vox` output voxels per axis, rotation with
    `rotation_sd_deg` per axis, about the grid centre, in voxel axes). The B0 map moves
    with the head (an approximation: the susceptibility field of a rigidly moving head
    is, to first order, carried along with it). Volumes are then simulated with
    :func:`simulate_epi`; noise is independent per volume. Deterministic for a given
    `rng` seed.

    Returns
    -------
    data : (N0, N1, N2, n_volumes) float32 magnitude
    motion : (n_volumes, 6) float64, translation (output voxels) and rotation (deg)
    """
    moving = translation_sd_vox > 0 or rotation_sd_deg > 0
    if (moving or noise_sd > 0) and rng is None:
        raise InputError("motion and noise need a numpy Generator (rng) so the simulation is reproducible")
    factors = np.array(_factors(epi_options.get("oversample", 2), 3), float)
    obj = np.asarray(object_fine, float)
    field = np.asarray(b0_hz_fine, float)
    shape = tuple(int(f // o) for f, o in zip(obj.shape, factors))
    data = np.empty(shape + (int(n_volumes),), np.float32)
    motion = np.zeros((int(n_volumes), 6))
    for t in range(int(n_volumes)):
        if moving:
            motion[t, :3] = rng.normal(0.0, translation_sd_vox, 3) if translation_sd_vox > 0 else 0.0
            motion[t, 3:] = rng.normal(0.0, rotation_sd_deg, 3) if rotation_sd_deg > 0 else 0.0
            moved_obj = _move(obj, motion[t, 3:], motion[t, :3] * factors)
            moved_field = _move(field, motion[t, 3:], motion[t, :3] * factors)
        else:
            moved_obj, moved_field = obj, field
        data[..., t] = simulate_epi(moved_obj, moved_field, noise_sd=noise_sd, rng=rng, **epi_options)
    return data, motion
