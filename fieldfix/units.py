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
