"""Protocol timing and the BOLD figure of merit of the planner.

Timing (SI units, seconds)
--------------------------
The readout of one slice samples ``lines = round(pe_lines * partial_fourier)`` phase-encode lines
at the *effective* echo spacing (the BIDS ``EffectiveEchoSpacing``, already divided by the in-plane
acceleration), so ``readout_s = lines * echo_spacing_s``; the k-space centre is reached at TE, the
last line ``pe_lines/2 * echo_spacing_s`` after it. One slice takes
``overhead_s + TE + pe_lines/2 * echo_spacing_s`` (excitation, slice rewinder and spoiler in the
overhead; default 6 ms, common practice, no source) and a volume ``ceil(n_slices / multiband)``
slices. The default TR limit is 3 s (the upper end of whole-brain fMRI repetition times, common
practice, no source).

Figure of merit (relative; no absolute SNR is claimed)
------------------------------------------------------
BOLD contrast-to-noise per unit time of one protocol::

    merit = m * TE * tSNR(SNR0) * sqrt(1 / TR)
    SNR0  = SNR_ref * (V / V_ref) * sqrt(readout_s / readout_ref_s) * d * exp(-TE / T2*)
    tSNR  = SNR0 / sqrt(1 + lambda^2 * SNR0^2)

* ``TE * exp(-TE/T2*)``: the signal change for a small change of R2* is ``dS = -S0 TE exp(-TE/T2*)
  dR2*``, largest at TE = T2* (textbook result, e.g. Menon and Kim 1999, Trends Cogn Sci; from memory).
* ``m``: the ROI median of the sweep's signal metric (through-slice retention, with the local echo
  time effect when the echo spacing is given; :mod:`fieldfix.dropout`).
* ``V / V_ref``: voxel volume against 3 x 3 x 3 mm; ``sqrt(readout_s / readout_ref_s)``: noise
  bandwidth falls as the sampling time grows (reference 30 ms); ``d``: the mean of
  ``exp(-(t - t0)/T2*)`` over the readout window (t0 its start), the share of k-space sampled before
  T2* decay blurs the point-spread function (a simple model of this project, no source).
* ``tSNR``: physiological noise proportional to the signal, Krueger and Glover 2001 (Magn Reson Med
  46:631) and Triantafyllou et al. 2005 (NeuroImage 26:243). Defaults from memory, order of
  magnitude: ``lambda = 0.011`` and ``SNR_ref = 200 * B0/3T`` for the reference voxel (Triantafyllou
  et al. report image SNR of a few hundred and tSNR near 1/lambda ~ 90 at 3 T).
* ``sqrt(1/TR)``: the noise of an effect estimated from N volumes falls as sqrt(N).

Only ratios between protocols matter: the sweep divides the merit by its largest value.

Examples
--------
>>> round(float(bold_contrast(0.045, 0.045) / bold_contrast(0.03, 0.045)), 4)  # 1.5 exp(-1/3)
1.0748
>>> readout_s(64, 0.0005, 0.75)
0.024
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .units import PLAUSIBLE

__all__ = ["Physiology", "T2STAR_GREY_MATTER_S", "default_t2star_s", "bold_contrast", "readout_s",
           "slice_time_s", "volume_tr_s", "readout_decay", "tsnr", "bold_merit", "DEFAULT_MAX_TR_S",
           "DEFAULT_OVERHEAD_S"]

#: Grey-matter T2* by field strength (T -> s), from memory: about 60 ms at 1.5 T, 45 ms at 3 T and
#: 27 ms at 7 T (R2* grows roughly linearly with B0).
T2STAR_GREY_MATTER_S = {1.5: 0.060, 3.0: 0.045, 7.0: 0.027}
#: Longest TR used when none is given (common practice, no source).
DEFAULT_MAX_TR_S = 3.0
#: Excitation, slice rewinder and spoiler time of one slice (common practice, no source).
DEFAULT_OVERHEAD_S = 0.006


@dataclass(frozen=True)
class Physiology:
    """Tissue and noise model of the figure of merit.

    Attributes
    ----------
    t2star_s : float
        T2* of the tissue (s).
    field_strength_t : float
        Main field (T); scales the reference SNR linearly.
    lambda_physio : float
        Physiological noise as a fraction of the signal (Krueger and Glover 2001); 0 for thermal
        noise only.
    snr_reference : float
        Image SNR of a 3 x 3 x 3 mm voxel, 30 ms readout, TE 0, at 3 T.
    """

    t2star_s: float = 0.045
    field_strength_t: float = 3.0
    lambda_physio: float = 0.011
    snr_reference: float = 200.0

    def __post_init__(self):
        rule = PLAUSIBLE["t2star_s"]
        if not rule.low <= self.t2star_s <= rule.high:
            raise InputError(f"t2star_s: {self.t2star_s * 1e3:g} ms is not plausible as a T2* "
                             f"(expected {rule.text()})")
        if self.lambda_physio < 0 or self.snr_reference <= 0 or self.field_strength_t <= 0:
            raise InputError("lambda_physio must be >= 0, snr_reference and field_strength_t positive")

    @classmethod
    def at(cls, field_strength_t: float = 3.0, t2star_s: float | None = None, **changes) -> "Physiology":
        """Model at a field strength, T2* defaulting to :func:`default_t2star_s`."""
        t2 = default_t2star_s(field_strength_t) if t2star_s is None else t2star_s
        return cls(t2star_s=t2, field_strength_t=field_strength_t, **changes)


def default_t2star_s(field_strength_t: float) -> float:
    """Grey-matter T2* (s) at a field strength: R2* interpolated linearly in B0 through the table.

    >>> default_t2star_s(3.0)
    0.045
    """
    b = np.array(sorted(T2STAR_GREY_MATTER_S))
    r2 = np.array([1.0 / T2STAR_GREY_MATTER_S[k] for k in b])
    slope = (r2[-1] - r2[0]) / (b[-1] - b[0])
    if field_strength_t in T2STAR_GREY_MATTER_S:
        return T2STAR_GREY_MATTER_S[field_strength_t]
    value = np.interp(field_strength_t, b, r2) if b[0] <= field_strength_t <= b[-1] else \
        r2[0] + slope * (field_strength_t - b[0])
    return float(1.0 / max(value, 1.0 / 0.2))


def bold_contrast(te_s, t2star_s: float):
    """BOLD signal change per unit R2* change, ``TE * exp(-TE / T2*)`` (s); peaks at TE = T2*."""
    te = np.asarray(te_s, float)
    return te * np.exp(-te / t2star_s)


def readout_s(pe_lines: int, echo_spacing_s: float, partial_fourier: float = 1.0) -> float:
    """Sampling time of one slice: acquired lines times the effective echo spacing (s)."""
    if pe_lines < 2 or echo_spacing_s <= 0 or not 0.5 <= partial_fourier <= 1.0:
        raise InputError("pe_lines must be >= 2, echo_spacing_s positive and partial_fourier in [0.5, 1]")
    return float(f"{round(pe_lines * partial_fourier) * echo_spacing_s:.12g}")


def slice_time_s(te_s, pe_lines: int, echo_spacing_s: float, overhead_s: float = DEFAULT_OVERHEAD_S):
    """Time of one slice: overhead, TE, and the lines after the k-space centre (s)."""
    return overhead_s + np.asarray(te_s, float) + pe_lines / 2 * echo_spacing_s


def volume_tr_s(n_slices, slice_s, multiband: int = 1):
    """TR of a volume: ``ceil(n_slices / multiband)`` slice times (s)."""
    if multiband < 1:
        raise InputError("multiband must be at least 1")
    return np.ceil(np.asarray(n_slices) / multiband) * np.asarray(slice_s, float)


def readout_decay(readout_time_s: float, t2star_s: float) -> float:
    """Mean of ``exp(-t / T2*)`` over a readout of length T: ``T2*/T * (1 - exp(-T/T2*))``."""
    x = readout_time_s / t2star_s
    return 1.0 if x < 1e-12 else float((1.0 - math.exp(-x)) / x)


def tsnr(snr0, lambda_physio: float):
    """Temporal SNR with physiological noise (Krueger and Glover 2001): ``SNR0 / sqrt(1 + l^2 SNR0^2)``."""
    s = np.asarray(snr0, float)
    return s / np.sqrt(1.0 + (lambda_physio * s) ** 2)


def bold_merit(metric, te_s, voxel_mm3, readout_time_s, tr_s, physiology: Physiology):
    """BOLD contrast-to-noise per sqrt(second), relative units (see the module notes).

    Parameters
    ----------
    metric : array
        ROI median of the signal metric (0-1) per protocol.
    te_s, voxel_mm3, tr_s : arrays
        Echo time (s), voxel volume (mm^3), TR (s) per protocol.
    readout_time_s : float or array
        Sampling time of one slice (s).
    physiology : Physiology

    Returns
    -------
    (merit, tsnr) arrays.
    """
    p = physiology
    te = np.asarray(te_s, float)
    decay = np.vectorize(readout_decay)(np.asarray(readout_time_s, float), p.t2star_s)
    snr0 = (p.snr_reference * p.field_strength_t / 3.0 * np.asarray(voxel_mm3, float) / 27.0
            * np.sqrt(np.asarray(readout_time_s, float) / 0.03) * decay * np.exp(-te / p.t2star_s))
    t = tsnr(snr0, p.lambda_physio)
    return np.asarray(metric, float) * te * t / np.sqrt(np.asarray(tr_s, float)), t
