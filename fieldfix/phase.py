"""Phase images: unit detection, complex echo arithmetic and masks from magnitude.

Phase comes off scanners in several conventions: radians, degrees, or integer counts
spanning a range of 4096 or 8192 (12-bit phase, stored as 0..4095 or rescaled to
-4096..4094, are common practice, no source).  :func:`detect_phase_units` decides which
convention an image uses and refuses to guess when the values fit none or more than one;
:func:`phase_to_radians` converts any of them to radians in [-pi, pi).

Detection rule
--------------
A convention with period ``P`` (2*pi, 360, 4096 or 8192) *fits* the data when

* all finite values lie in ``[-P/2, P]`` (symmetric or zero-based storage), the spread
  ``max - min`` is at most ``P`` (plus 0.1 % tolerance), and
* for the integer conventions, every value is a whole number;

and it is *plausible* when, in addition, the spread covers more than half the period
(wrapped phase over a whole image -- including background noise -- covers almost
its full cycle).  Exactly one plausible convention is accepted; otherwise
:class:`fieldfix.errors.UnitError` asks for an explicit ``units`` override.

Mask rule
---------
:func:`magnitude_mask` thresholds the magnitude at Otsu's threshold (Otsu 1979, IEEE
Trans. Systems, Man and Cybernetics; :func:`otsu_threshold`, 256 bins, checked against
scikit-image) of the values clipped at their 99.5th percentile, scaled by ``threshold_scale``
(default 1.0); then removes connected pieces (26-connectivity) smaller than
``min_piece_fraction`` of the largest piece, fills enclosed holes, and optionally erodes.

Example
-------
>>> import numpy as np
>>> counts = np.array([0, 1024, 2048, 4095] * 8, dtype=float)
>>> detect_phase_units(counts).name
'counts4096'
>>> bool(np.allclose(phase_to_radians(counts[:3], "counts4096"), [0, np.pi / 2, -np.pi]))
True
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.ndimage as ndi

from .errors import InputError, UnitError

TWO_PI = 2.0 * np.pi

__all__ = [
    "PhaseUnits",
    "PHASE_UNITS",
    "detect_phase_units",
    "check_given_phase_units",
    "implied_field_spread_hz",
    "MIN_FIELD_SPREAD_HZ",
    "phase_units",
    "phase_to_radians",
    "complex_from_polar",
    "complex_from_real_imag",
    "phase_difference",
    "magnitude_mask",
    "otsu_threshold",
]


@dataclass(frozen=True)
class PhaseUnits:
    """A phase convention.

    Attributes
    ----------
    name : str
        ``"rad"``, ``"deg"``, ``"counts4096"`` or ``"counts8192"``.
    period : float
        Value range of one full cycle (2*pi, 360, 4096, 8192).
    integer : bool
        Whether values must be whole numbers.
    reason : str
        Why this convention was chosen (for summaries).
    """

    name: str
    period: float
    integer: bool
    reason: str = "given"

    @property
    def to_rad(self) -> float:
        """Factor from this unit to radians."""
        return TWO_PI / self.period


PHASE_UNITS = {
    "rad": PhaseUnits("rad", TWO_PI, False),
    "deg": PhaseUnits("deg", 360.0, False),
    "counts4096": PhaseUnits("counts4096", 4096.0, True),
    "counts8192": PhaseUnits("counts8192", 8192.0, True),
}
_ALIASES = {
    "radian": "rad", "radians": "rad", "rad": "rad",
    "degree": "deg", "degrees": "deg", "deg": "deg",
    "4096": "counts4096", "counts4096": "counts4096", "int4096": "counts4096",
    "8192": "counts8192", "counts8192": "counts8192", "int8192": "counts8192",
}


def phase_units(name: str | PhaseUnits) -> PhaseUnits:
    """Look up a phase convention by name (``rad``, ``deg``, ``counts4096``, ``counts8192``).

    Example
    -------
    >>> phase_units("degrees").period
    360.0
    """
    if isinstance(name, PhaseUnits):
        return name
    key = _ALIASES.get(str(name).strip().lower())
    if key is None:
        raise UnitError(f"unknown phase unit {name!r}; use one of rad, deg, counts4096, counts8192")
    return PHASE_UNITS[key]


#: Smallest spread of a field map across a head that any scanner gives, Hz: even a well shimmed
#: brain at 1.5 T spans tens of hertz from the sinuses to the vertex (common practice, no source).
#: A phase convention implying less than this is physically implausible.
MIN_FIELD_SPREAD_HZ = 10.0


def implied_field_spread_hz(spread: float, unit: PhaseUnits, delta_te_s: float) -> float:
    """The field spread (Hz) a phase spread means in convention `unit` for echoes `delta_te_s` apart.

    Examples
    --------
    >>> round(implied_field_spread_hz(np.pi, PHASE_UNITS["rad"], 0.0025), 1)
    200.0
    """
    return spread * unit.to_rad / (TWO_PI * delta_te_s)


def detect_phase_units(phase, *, min_coverage: float = 0.5, delta_te_s: float | None = None,
                       hint: str | None = None) -> PhaseUnits:
    """Decide the phase convention of an image by the rule in the module docstring.

    With `delta_te_s` (a phase difference) whose background is masked (more than 5% of the
    voxels exactly zero), physical plausibility decides as well: a convention under which the
    values would mean a field spread below :data:`MIN_FIELD_SPREAD_HZ` across the image is
    dropped, and one that fits the value range and implies a plausible field is accepted even
    when it covers under half of its cycle. `hint` (e.g. a sidecar's ``Units``)
    settles a choice between conventions that are both plausible.

    Parameters
    ----------
    phase : array_like
        Phase values as stored (after the header's scaling).
    min_coverage : float
        Fraction of the period the spread of values must exceed to be plausible.
    delta_te_s : float, optional
        Echo-time difference of a phase difference, s.
    hint : str, optional
        A convention named by the metadata.

    Returns
    -------
    PhaseUnits
        With ``reason`` describing the evidence.

    Raises
    ------
    UnitError
        When no convention, or more than one, is plausible.

    Example
    -------
    >>> detect_phase_units(np.linspace(-180, 179, 50)).name
    'deg'
    """
    values = np.asarray(phase, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size == 0:
        raise InputError("phase image has no finite values")
    lo, hi = float(values.min()), float(values.max())
    spread = hi - lo
    whole = bool(np.all(np.abs(values - np.round(values)) < 1e-3))
    plausible, fitting = [], []
    for unit in PHASE_UNITS.values():
        period = unit.period
        tol = 1e-3 * period
        fits = lo >= -period / 2 - tol and hi <= period + tol and spread <= period + tol
        if unit.integer and not whole:
            fits = False
        if fits:
            fitting.append(unit.name)
            if spread > min_coverage * period:
                plausible.append(unit)
    span_text = f"values span {lo:.6g}..{hi:.6g}"
    masked = np.count_nonzero(values == 0) > 0.05 * values.size  # zero outside the head
    if delta_te_s is not None and masked:
        physical = [PHASE_UNITS[n] for n in fitting
                    if implied_field_spread_hz(spread, PHASE_UNITS[n], delta_te_s) >= MIN_FIELD_SPREAD_HZ]
        plausible = [u for u in plausible if u in physical] or physical
        if len(plausible) == 1:
            unit = plausible[0]
            field = implied_field_spread_hz(spread, unit, delta_te_s)
            return PhaseUnits(unit.name, unit.period, unit.integer,
                              f"detected: {span_text}; in {unit.name} that is a field spread of {field:.0f} Hz, the "
                              f"only plausible reading")
    if len(plausible) > 1 and hint is not None:
        named = [u for u in plausible if u.name == phase_units(hint).name]
        if named:
            return PhaseUnits(named[0].name, named[0].period, named[0].integer,
                              f"{span_text} fits several conventions; the sidecar names {named[0].name}")
    if len(plausible) == 1:
        unit = plausible[0]
        return PhaseUnits(unit.name, unit.period, unit.integer,
                          f"detected: {span_text}, which fills a {unit.name} cycle of {unit.period:g}")
    if not plausible:
        hint = f" (would fit {', '.join(fitting)} but covers under {min_coverage:.0%} of its cycle)" if fitting else ""
        raise UnitError(f"cannot tell the phase units: {span_text}{hint}; "
                        "give them explicitly (rad, deg, counts4096 or counts8192)")
    names = ", ".join(u.name for u in plausible)
    raise UnitError(f"phase units are ambiguous: {span_text} fits {names}; give them explicitly")


def check_given_phase_units(phase, unit: PhaseUnits, delta_te_s: float) -> None:
    """Refuse a phase convention that the data contradict, with both readings in the message.

    Raises
    ------
    UnitError
        When the values fall outside the convention's range, or, read in it, mean a field spread
        below :data:`MIN_FIELD_SPREAD_HZ` (e.g. degrees given for an image spanning -pi..pi).
    """
    values = np.asarray(phase, dtype=np.float64)
    values = values[np.isfinite(values)]
    if values.size == 0:
        return
    lo, hi = float(values.min()), float(values.max())
    spread = hi - lo
    period = unit.period
    in_range = lo >= -period / 2 - 1e-3 * period and hi <= period * 1.001 and spread <= period * 1.001
    field = implied_field_spread_hz(spread, unit, delta_te_s)
    if in_range and field >= MIN_FIELD_SPREAD_HZ:
        return
    others = [u for u in PHASE_UNITS.values() if u.name != unit.name
              and -u.period / 2 <= lo and hi <= u.period * 1.001 and spread <= u.period * 1.001
              and implied_field_spread_hz(spread, u, delta_te_s) >= MIN_FIELD_SPREAD_HZ]
    other = (f"; read as {others[0].name} they mean {implied_field_spread_hz(spread, others[0], delta_te_s):.0f} Hz"
             if others else "")
    why = (f"in {unit.name} they would mean a field spread of {field:.1f} Hz across the image, which no scanner gives"
           if in_range else f"they do not fit the {unit.name} range")
    raise UnitError(f"phase units {unit.name} were given, but the values span {lo:.6g}..{hi:.6g}: {why}{other}; "
                    "check the units")


def phase_to_radians(phase, units: str | PhaseUnits):
    """Convert phase in the given convention to radians wrapped into [-pi, pi).

    Example
    -------
    >>> float(phase_to_radians(90.0, "deg"))
    1.5707963267948966
    """
    unit = phase_units(units)
    rad = np.asarray(phase, dtype=np.float64) * unit.to_rad
    return rad - TWO_PI * np.floor(rad / TWO_PI + 0.5)


def complex_from_polar(magnitude, phase_rad):
    """Complex signal ``magnitude * exp(i * phase)``.

    Example
    -------
    >>> complex(complex_from_polar(2.0, np.pi / 2)).imag
    2.0
    """
    return np.asarray(magnitude, dtype=np.float64) * np.exp(1j * np.asarray(phase_rad, dtype=np.float64))


def complex_from_real_imag(real, imag):
    """Complex signal from real and imaginary images (must have the same shape)."""
    real = np.asarray(real, dtype=np.float64)
    imag = np.asarray(imag, dtype=np.float64)
    if real.shape != imag.shape:
        raise InputError(f"real image shape {real.shape} differs from imaginary image shape {imag.shape}")
    return real + 1j * imag


def phase_difference(z1, z2):
    """Phase gained from echo 1 to echo 2 by the complex conjugate product.

    ``dphi = angle(z2 * conj(z1))`` is the wrapped difference without ever subtracting
    wrapped phases (so no spurious 2*pi jumps appear where either phase wraps), and
    ``weight = |z1| * |z2|`` is the magnitude of that product: a voxel's phase noise
    variance falls with it, so it serves as a weight (common practice, no source).

    Parameters
    ----------
    z1, z2 : complex arrays
        Echoes at the earlier and the later echo time.

    Returns
    -------
    dphi_rad : ndarray
        In (-pi, pi].
    weight : ndarray
        ``|z1 z2|``.

    Example
    -------
    >>> d, w = phase_difference(np.exp(3.0j), np.exp(-3.0j))
    >>> round(float(d), 6), round(float(w), 6)
    (0.283185, 1.0)
    """
    product = np.asarray(z2) * np.conj(np.asarray(z1))
    return np.angle(product), np.abs(product)


def otsu_threshold(values, n_bins: int = 256) -> float:
    """Otsu's threshold: the bin centre that maximises the between-class variance.

    Otsu 1979 (IEEE Trans. Syst. Man Cybern. 9(1)): over a histogram of `n_bins` equal
    bins spanning the values, choose the split maximising ``w1 w2 (m1 - m2)**2`` (class
    weights and means); the threshold is the centre of the last bin of the lower class.
    Written out here because scikit-image's version costs a third of a second of imports
    on its first call; the tests compare the two.

    Example
    -------
    >>> otsu_threshold(np.r_[np.zeros(50), np.ones(50)]) < 1.0
    True
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    lo, hi = float(v.min()), float(v.max())
    if lo == hi:
        return lo
    counts, edges = np.histogram(v, bins=n_bins, range=(lo, hi))
    centres = 0.5 * (edges[:-1] + edges[1:])
    counts = counts.astype(np.float64)
    w1 = np.cumsum(counts)
    w2 = np.cumsum(counts[::-1])[::-1]
    with np.errstate(invalid="ignore", divide="ignore"):
        m1 = np.cumsum(counts * centres) / w1
        m2 = (np.cumsum((counts * centres)[::-1]) / w2[::-1])[::-1]
    between = w1[:-1] * w2[1:] * (m1[:-1] - m2[1:]) ** 2
    return float(centres[int(np.nanargmax(between))])


def magnitude_mask(magnitude, *, threshold_scale: float = 1.0, min_piece_fraction: float = 0.05,
                   fill_holes: bool = True, erode_voxels: int = 0):
    """Object mask from a magnitude image by the rule in the module docstring.

    Parameters
    ----------
    magnitude : array_like, 3D
        Magnitude image (any scale).
    threshold_scale : float
        Multiplies Otsu's threshold (below 1 keeps more of the dim edge).
    min_piece_fraction : float
        Pieces smaller than this fraction of the largest piece are dropped.
    fill_holes : bool
        Fill holes enclosed by the mask.
    erode_voxels : int
        Erode by this many voxels at the end.

    Returns
    -------
    ndarray of bool

    Example
    -------
    >>> z, y, x = np.mgrid[:20, :20, :20]
    >>> mag = 100.0 * ((x - 10) ** 2 + (y - 10) ** 2 + (z - 10) ** 2 < 36) + 1.0
    >>> int(magnitude_mask(mag).sum()) == int(((x - 10) ** 2 + (y - 10) ** 2 + (z - 10) ** 2 < 36).sum())
    True
    """
    mag = np.abs(np.asarray(magnitude, dtype=np.float64))
    finite = np.isfinite(mag)
    if not finite.any():
        raise InputError("magnitude image has no finite values")
    vals = mag[finite]
    ceiling = np.percentile(vals, 99.5)
    clipped = np.minimum(vals, ceiling)
    if np.ptp(clipped) == 0:
        raise InputError("magnitude image is constant; cannot derive a mask from it (give a mask)")
    threshold = otsu_threshold(clipped) * threshold_scale
    mask = finite & (mag > threshold)
    labels, n = ndi.label(mask, structure=np.ones((3,) * mask.ndim))
    if n > 1:
        sizes = np.bincount(labels.ravel())[1:]
        keep = np.flatnonzero(sizes >= min_piece_fraction * sizes.max()) + 1
        mask = np.isin(labels, keep)
    if fill_holes:
        # holes: background pieces (6-connected, as scipy's binary_fill_holes) off the grid's edge
        background, n_pieces = ndi.label(~mask)
        edge = np.zeros(n_pieces + 1, bool)
        for axis in range(mask.ndim):
            for end in (0, -1):
                edge[np.take(background, end, axis=axis)] = True
        edge[0] = False  # label 0 is the mask itself
        mask = ~edge[background]
    if erode_voxels > 0:
        mask = ndi.binary_erosion(mask, iterations=int(erode_voxels))
    return mask
