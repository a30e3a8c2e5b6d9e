"""Dual- and multi-echo gradient-echo simulator with a known B0 map.

Signal model for echo ``n`` at echo time ``TE_n`` (common practice, no source):

``s_n(x) = M(x) * exp(-TE_n / T2*) * exp(i * (phi0(x) + 2*pi * b0_hz(x) * TE_n)) + noise``

where ``M`` is the object magnitude, ``phi0`` a smooth receiver phase offset that is
the same for all echoes, and the noise is complex Gaussian with standard deviation
``sigma`` in the real and in the imaginary channel.  The SNR is defined as the mean
noise-free magnitude of the first echo inside the object divided by ``sigma``.

All randomness comes from a ``numpy.random.Generator`` (or a seed), so a call is
reproducible.

Example
-------
>>> data = simulate_gradient_echo(head_field_hz((24, 24, 16), amplitude_hz=80.0),
...                               [4.92e-3, 7.38e-3], magnitude=ellipsoid_magnitude((24, 24, 16)),
...                               snr=30.0, rng=1)
>>> len(data.echoes), data.echoes[0].shape
(2, (24, 24, 16))
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage as ndi

__all__ = [
    "GradientEchoData",
    "simulate_gradient_echo",
    "ellipsoid_magnitude",
    "head_field_hz",
    "smooth_random_phase",
]


@dataclass(frozen=True)
class GradientEchoData:
    """Simulated echoes and their ground truth.

    Attributes
    ----------
    echoes : list of complex ndarray
        One complex image per echo (noise included).
    echo_times_s : tuple of float
    b0_hz : ndarray
        The true field.
    receiver_phase_rad : ndarray
        The echo-independent phase offset.
    magnitude : ndarray
        Noise-free object magnitude at TE = 0.
    object_mask : ndarray of bool
        Where the object is (``magnitude > 0``).
    noise_sigma : float
        Standard deviation of the noise per real/imaginary channel.
    """

    echoes: list
    echo_times_s: tuple
    b0_hz: np.ndarray
    receiver_phase_rad: np.ndarray
    magnitude: np.ndarray
    object_mask: np.ndarray
    noise_sigma: float

    def magnitudes(self):
        """``|s_n|`` per echo."""
        return [np.abs(z) for z in self.echoes]

    def phases_rad(self):
        """``angle(s_n)`` per echo, in (-pi, pi]."""
        return [np.angle(z) for z in self.echoes]


def _rng(rng):
    return rng if isinstance(rng, np.random.Generator) else np.random.default_rng(rng)


def ellipsoid_magnitude(shape, *, radii_fraction=(0.4, 0.45, 0.4), inner_fraction=0.55,
                        inner_contrast=0.7):
    """A head-like magnitude: an ellipsoid (value 1) with a dimmer inner ellipsoid.

    Parameters
    ----------
    shape : tuple of 3 int
    radii_fraction : 3 floats
        Semi-axes as fractions of the grid size.
    inner_fraction, inner_contrast : float
        Size (relative) and value of the inner ellipsoid.

    Example
    -------
    >>> m = ellipsoid_magnitude((16, 16, 16))
    >>> float(m.max()), float(m.min())
    (1.0, 0.0)
    """
    grids = np.meshgrid(*[np.arange(n) - (n - 1) / 2 for n in shape], indexing="ij")
    r2 = sum((g / (f * n)) ** 2 for g, f, n in zip(grids, radii_fraction, shape))
    mag = np.where(r2 < 1.0, 1.0, 0.0)
    mag[r2 < inner_fraction**2] = inner_contrast
    return mag


def head_field_hz(shape, *, amplitude_hz=100.0, centre_fraction=(0.5, 0.75, 0.3), width_fraction=0.25,
                  gradient_hz=(20.0, -10.0, 15.0)):
    """A smooth field with a focal susceptibility-like bump plus linear terms, in Hz.

    ``amplitude_hz * exp(-r^2 / (2 w^2))`` centred at ``centre_fraction`` of the grid
    (by default low and frontal, where sinus air sits), plus a linear ramp whose total
    change across each axis is ``gradient_hz``.

    Example
    -------
    >>> f = head_field_hz((16, 16, 16), amplitude_hz=50.0, gradient_hz=(0, 0, 0))
    >>> 45 < float(f.max()) <= 50
    True
    """
    grids = np.meshgrid(*[np.arange(n, dtype=np.float64) for n in shape], indexing="ij")
    r2 = sum(((g - c * (n - 1)) / (width_fraction * n)) ** 2
             for g, c, n in zip(grids, centre_fraction, shape))
    field = amplitude_hz * np.exp(-0.5 * r2)
    for g, n, slope in zip(grids, shape, gradient_hz):
        field += slope * (g / max(n - 1, 1) - 0.5)
    return field


def smooth_random_phase(shape, *, amplitude_rad=np.pi, smoothness_vox=6.0, rng=None):
    """A smooth random phase map (Gaussian-filtered noise scaled to ``amplitude_rad`` peak).

    Example
    -------
    >>> p = smooth_random_phase((16, 16, 8), amplitude_rad=1.0, rng=0)
    >>> round(float(np.abs(p).max()), 6)
    1.0
    """
    gen = _rng(rng)
    raw = ndi.gaussian_filter(gen.standard_normal(shape), smoothness_vox, mode="wrap")
    peak = np.abs(raw).max()
    return raw * (amplitude_rad / peak) if peak > 0 else raw


def simulate_gradient_echo(b0_hz, echo_times_s, *, magnitude=None, t2star_s=0.04, receiver_phase_rad=None,
                           snr=30.0, frequency_adjust=True, rng=None):
    """Simulate complex gradient-echo images at several echo times.

    Parameters
    ----------
    b0_hz : ndarray, 3D
        True off-resonance field in Hz.
    echo_times_s : sequence of float
        Echo times in seconds.
    magnitude : ndarray, optional
        Object magnitude at TE = 0 (default: :func:`ellipsoid_magnitude`).
    t2star_s : float or ndarray or None
        T2* decay constant in seconds (None: no decay).
    receiver_phase_rad : ndarray or None
        Echo-independent phase offset; default a smooth random map of amplitude pi.
    snr : float or None
        Mean first-echo magnitude in the object over the noise sigma; None for no noise.
    frequency_adjust : bool
        Subtract the median field inside the object first, as the scanner's centre
        frequency adjustment does (common practice, no source); the returned
        ``b0_hz`` is the adjusted field.
    rng : numpy.random.Generator or int or None
        Source of randomness (seed allowed).

    Returns
    -------
    GradientEchoData
    """
    gen = _rng(rng)
    b0_hz = np.asarray(b0_hz, dtype=np.float64)
    shape = b0_hz.shape
    tes = tuple(float(t) for t in echo_times_s)
    if len(tes) < 1:
        raise ValueError("need at least one echo time")
    mag = ellipsoid_magnitude(shape) if magnitude is None else np.asarray(magnitude, dtype=np.float64)
    if mag.shape != shape:
        raise ValueError(f"magnitude shape {mag.shape} differs from field shape {shape}")
    obj = mag > 0
    if frequency_adjust and obj.any():
        b0_hz = b0_hz - np.median(b0_hz[obj])
    phi0 = (smooth_random_phase(shape, amplitude_rad=np.pi, rng=gen)
            if receiver_phase_rad is None else np.asarray(receiver_phase_rad, dtype=np.float64))
    decay0 = 1.0 if t2star_s is None else np.exp(-tes[0] / np.asarray(t2star_s, dtype=np.float64))
    first = mag * decay0
    if snr is None:
        sigma = 0.0
    else:
        mean_signal = float(np.mean(np.broadcast_to(first, shape)[obj])) if obj.any() else 1.0
        sigma = mean_signal / float(snr)
    echoes = []
    for te in tes:
        decay = 1.0 if t2star_s is None else np.exp(-te / np.asarray(t2star_s, dtype=np.float64))
        z = mag * decay * np.exp(1j * (phi0 + 2.0 * np.pi * b0_hz * te))
        if sigma > 0:
            z = z + sigma * (gen.standard_normal(shape) + 1j * gen.standard_normal(shape))
        echoes.append(z)
    return GradientEchoData(echoes, tes, b0_hz, phi0, mag, obj, sigma)
