"""Quantities with units, and physical constants.

fieldfix works in SI-like units inside: seconds, hertz, millimetres, degrees for
user-facing angles, tesla. User-given quantities must carry an explicit unit, because a
seconds/milliseconds mix-up is a silent factor of 1000.

Examples
--------
>>> parse_time_s("4.92ms")
0.00492
>>> parse_length_mm("0.25cm")
2.5
>>> parse_quantity_list("-30deg:30deg:10deg", "angle")
[-30.0, -20.0, -10.0, 0.0, 10.0, 20.0, 30.0]
"""

from __future__ import annotations

import math
import re

import scipy.constants

from .errors import UnitError

__all__ = [
    "GAMMA_HZ_PER_T",
    "GAMMA_RAD_PER_S_PER_T",
    "parse_quantity",
    "parse_quantity_list",
    "parse_time_s",
    "parse_length_mm",
    "parse_angle_deg",
    "parse_frequency_hz",
    "parse_field_t",
    "format_quantity",
    "PLAUSIBLE",
    "Plausible",
    "check_plausible",
    "parse_checked",
]

#: Proton gyromagnetic ratio divided by 2*pi, in Hz/T (CODATA, via scipy.constants).
GAMMA_HZ_PER_T: float = scipy.constants.physical_constants["proton gyromag. ratio in MHz/T"][0] * 1e6
#: Proton gyromagnetic ratio in rad/s/T (CODATA, via scipy.constants).
GAMMA_RAD_PER_S_PER_T: float = scipy.constants.physical_constants["proton gyromag. ratio"][0]

# dimension -> {unit spelling: factor to the canonical unit}
_UNITS: dict[str, dict[str, float]] = {
    "time": {"s": 1.0, "sec": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "μs": 1e-6},
    "length": {"mm": 1.0, "cm": 10.0, "m": 1000.0, "um": 1e-3, "µm": 1e-3, "μm": 1e-3},
    "angle": {"deg": 1.0, "°": 1.0, "rad": 180.0 / math.pi},
    "frequency": {"hz": 1.0, "khz": 1e3, "rad/s": 1.0 / (2.0 * math.pi)},
    "field": {"t": 1.0, "mt": 1e-3},
    # A gradient moment along the slice normal, canonical unit mT*ms/m.
    "moment": {"mt*ms/m": 1.0, "mt.ms/m": 1.0, "ut*s/m": 1.0},
}
_CANONICAL = {"time": "s", "length": "mm", "angle": "deg", "frequency": "Hz", "field": "T",
              "moment": "mT*ms/m"}
_EXAMPLES = {"time": "4.92ms, 0.00492s, 492us", "length": "2.5mm, 0.25cm", "angle": "15deg, 0.26rad",
             "frequency": "100Hz, 0.1kHz, 628rad/s", "field": "3T, 7T",
             "moment": "0.5mT*ms/m"}
_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_QUANTITY = re.compile(rf"^\s*({_NUMBER})\s*([^\s\d.+-][^\s]*)?\s*$")


def parse_quantity(text: str | float, dimension: str) -> float:
    """Parse a number with a unit and return it in the canonical unit of `dimension`.

    Parameters
    ----------
    text : str
        For example ``"4.92ms"``, ``"0.00492 s"``, ``"2.5mm"``, ``"15deg"``, ``"3T"``.
    dimension : {'time', 'length', 'angle', 'frequency', 'field', 'moment'}
        Canonical units: seconds, millimetres, degrees, hertz, tesla, mT*ms/m.

    Returns
    -------
    float
        The value in the canonical unit.

    Raises
    ------
    UnitError
        When the unit is missing (bare numbers are refused), unknown, or of another kind.

    Examples
    --------
    >>> parse_quantity("492us", "time")
    0.000492
    """
    if dimension not in _UNITS:
        raise ValueError(f"unknown dimension {dimension!r}")
    hint = f"give a {dimension} with its unit, for example {_EXAMPLES[dimension]}"
    if not isinstance(text, str):
        raise UnitError(f"{text!r} has no unit; {hint}")
    match = _QUANTITY.match(text)
    if not match:
        raise UnitError(f"cannot read {text!r} as a {dimension}; {hint}")
    number, unit = match.groups()
    if unit is None:
        raise UnitError(f"{text.strip()!r} has no unit; {hint}")
    factor = _UNITS[dimension].get(unit.lower() if unit not in ("µs", "μs", "µm", "μm") else unit)
    if factor is None:
        raise UnitError(f"{text.strip()!r}: unit {unit!r} is not a {dimension} unit; {hint}")
    value = float(number) * factor
    if not math.isfinite(value):
        raise UnitError(f"{text.strip()!r} is not a finite {dimension}")
    # Round away binary noise from the unit factor (1e-3 * 4.92 -> 0.00492).
    return float(f"{value:.12g}")


def parse_quantity_list(text: str, dimension: str) -> list[float]:
    """Parse a comma-separated list or a ``start:stop:step`` range of quantities.

    Each element carries its unit. A range includes its stop value when the steps
    reach it.

    Examples
    --------
    >>> parse_quantity_list("25ms,30ms", "time")
    [0.025, 0.03]
    >>> parse_quantity_list("2mm:3mm:0.5mm", "length")
    [2.0, 2.5, 3.0]
    """
    text = text.strip()
    if ":" in text and "," not in text:
        parts = text.split(":")
        if len(parts) != 3:
            raise UnitError(f"{text!r}: a range is start:stop:step, for example -30deg:30deg:10deg")
        start, stop, step = (parse_quantity(p, dimension) for p in parts)
        if step <= 0:
            raise UnitError(f"{text!r}: the step of a range must be positive")
        if stop < start:
            raise UnitError(f"{text!r}: a range must not end before it starts")
        count = int(math.floor((stop - start) / step + 1e-9)) + 1
        if count > 10000:
            raise UnitError(f"{text!r}: the range has more than 10000 values")
        return [float(f"{start + k * step:.12g}") for k in range(count)]
    items = [p for p in text.split(",") if p.strip()]
    if not items:
        raise UnitError(f"{text!r}: expected one or more {dimension} values")
    return [parse_quantity(p, dimension) for p in items]


def parse_time_s(text: str) -> float:
    """Parse a time (``"4.92ms"``) and return seconds."""
    return parse_quantity(text, "time")


def parse_length_mm(text: str) -> float:
    """Parse a length (``"2.5mm"``) and return millimetres."""
    return parse_quantity(text, "length")


def parse_angle_deg(text: str) -> float:
    """Parse an angle (``"15deg"``, ``"0.2rad"``) and return degrees."""
    return parse_quantity(text, "angle")


def parse_frequency_hz(text: str) -> float:
    """Parse a frequency (``"100Hz"``, ``"628rad/s"``) and return hertz."""
    return parse_quantity(text, "frequency")


def parse_field_t(text: str) -> float:
    """Parse a magnetic field strength (``"3T"``) and return tesla."""
    return parse_quantity(text, "field")


def format_quantity(value: float, dimension: str) -> str:
    """Format a canonical-unit value the way :func:`parse_quantity` reads it back.

    Times are written in milliseconds, everything else in its canonical unit.

    Examples
    --------
    >>> format_quantity(0.00492, "time")
    '4.92ms'
    """
    if dimension == "time":
        return f"{value * 1e3:.6g}ms"
    return f"{value:.6g}{_CANONICAL[dimension]}"


class Plausible:
    """The plausible range of one quantity, and how to say it.

    Attributes
    ----------
    dimension : str
        The quantity's dimension (its canonical unit: see :func:`parse_quantity`).
    low, high : float
        Inclusive bounds in the canonical unit.
    what : str
        Words for the quantity in messages.
    why : str
        Where the bounds come from.
    """

    def __init__(self, dimension: str, low: float, high: float, what: str, why: str):
        self.dimension, self.low, self.high, self.what, self.why = dimension, low, high, what, why

    def contains(self, value) -> bool:
        """Whether `value` is a finite number (not a bool) within the bounds.

        >>> PLAUSIBLE["te_s"].contains(0.03), PLAUSIBLE["te_s"].contains(30.0), PLAUSIBLE["te_s"].contains(True)
        (True, False, False)
        """
        return (isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
                and self.low <= value <= self.high)

    def text(self) -> str:
        """``"1ms to 200ms"`` in the units a user types."""
        return f"{format_quantity(self.low, self.dimension)} to {format_quantity(self.high, self.dimension)}"


#: Plausible ranges of the quantities users give (canonical units). A value outside is almost always
#: a unit slip (30us for 30ms, 3cm for 3mm) and is refused. The bounds are generous limits of human
#: MRI practice (common practice, no source), not recommendations.
PLAUSIBLE: dict[str, Plausible] = {
    "te_s": Plausible("time", 1e-3, 0.2, "an EPI echo time", "gradient-echo EPI echo times are 10-80 ms"),
    "echo_times_s": Plausible("time", 0.2e-3, 0.1, "a field-map echo time",
                              "gradient-echo field maps use echoes of a few milliseconds"),
    "echo_spacing_s": Plausible("time", 10e-6, 5e-3, "an effective echo spacing",
                                "EPI lines are 0.2-1.5 ms apart, less with in-plane acceleration"),
    "readout_time_s": Plausible("time", 1e-3, 0.3, "a total readout time",
                                "EPI readouts last 10-100 ms; BIDS gives them in seconds"),
    "thickness_mm": Plausible("length", 0.3, 10.0, "a slice thickness", "EPI slices are 1-5 mm thick"),
    "inplane_mm": Plausible("length", 0.2, 10.0, "an in-plane voxel size", "EPI voxels are 1-4 mm across"),
    "smooth_mm": Plausible("length", 0.0, 50.0, "a smoothing width (FWHM)", "field maps are smoothed by a few mm"),
    "slice_gap_mm": Plausible("length", 0.0, 20.0, "a gap between slices", "slice gaps are 0-100% of a slice"),
    "tilt_deg": Plausible("angle", -60.0, 60.0, "a slice tilt",
                          "slices are tilted by tens of degrees at most; larger tilts change the orientation"),
    "field_strength_t": Plausible("field", 0.05, 12.0, "a main field strength", "human MRI runs at 0.05-11.7 T"),
    "time_per_slice_s": Plausible("time", 5e-3, 1.0, "a time per slice", "one EPI slice takes 20-150 ms"),
    "max_tr_s": Plausible("time", 0.1, 30.0, "a repetition time", "fMRI repetition times are 0.3-5 s"),
    "t2star_s": Plausible("time", 5e-3, 0.2, "a T2*", "T2* of brain tissue is 20-80 ms at 1.5-7 T"),
    "zshim_mtms_per_m": Plausible("moment", -10.0, 10.0, "a z-shim moment",
                                  "z-shim moments are a few mT*ms/m"),
}


def check_plausible(name: str, value: float, typed: str | None = None, parameter: str | None = None) -> float:
    """Refuse a value outside the plausible range of quantity `name` (see :data:`PLAUSIBLE`).

    Parameters
    ----------
    name : str
        Key of :data:`PLAUSIBLE` (the library's parameter name, units in it).
    value : float
        In the canonical unit.
    typed : str, optional
        The text the user typed, quoted in the message instead of the converted value.
    parameter : str, optional
        The parameter the error names (default `name`).

    Raises
    ------
    UnitError
        With the range and where it comes from.

    Examples
    --------
    >>> check_plausible("te_s", 0.03)
    0.03
    >>> check_plausible("te_s", 30e-6, typed="30us")  # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    fieldfix.errors.UnitError: te_s: 30us is not plausible as an EPI echo time ...
    """
    rule = PLAUSIBLE[name]
    if not rule.contains(value):
        shown = typed.strip() if isinstance(typed, str) else (format_quantity(value, rule.dimension)
                                                               if isinstance(value, (int, float)) else repr(value))
        raise UnitError(f"{shown} is not plausible as {rule.what} (expected {rule.text()}: {rule.why}); check the "
                        "unit", parameter=parameter or name)
    return float(value)


def parse_checked(text: str, name: str, parameter: str | None = None) -> float:
    """Parse a quantity typed for parameter `name` and check its plausible range, quoting the text.

    Examples
    --------
    >>> parse_checked("3mm", "thickness_mm")
    3.0
    """
    rule = PLAUSIBLE[name]
    try:
        value = parse_quantity(text, rule.dimension)
    except UnitError as err:
        raise UnitError(err.message, parameter=parameter or name) from None
    return check_plausible(name, value, typed=text, parameter=parameter)
