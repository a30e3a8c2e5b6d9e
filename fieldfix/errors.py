"""Exceptions raised by fieldfix.

Every error that a user can cause carries a message that names the problem and, when
one is involved, the file. The command-line layer prints ``str(err)`` on one line and
exits with status 2.

Examples
--------
>>> from fieldfix.errors import InputError
>>> str(InputError("contains NaN values", path="sub-01_phasediff.nii.gz"))
'sub-01_phasediff.nii.gz: contains NaN values'
"""

from __future__ import annotations

import os

__all__ = [
    "check_choice",
    "FieldfixError",
    "InputError",
    "UnitError",
    "MetadataError",
    "GeometryError",
    "OutputError",
    "MemoryLimitError",
]


class FieldfixError(Exception):
    """Base class of all errors fieldfix raises on purpose.

    Parameters
    ----------
    message : str
        What is wrong, in one line.
    path : str or os.PathLike, optional
        The file the problem is about.
    parameter : str, optional
        The parameter (of the library call) the problem is about, when no file is; the
        command line shows the option that sets it instead.
    """

    def __init__(self, message: str, path: str | os.PathLike | None = None, parameter: str | None = None):
        self.message = " ".join(str(message).split())
        self.path = os.fspath(path) if path is not None else None
        self.parameter = parameter
        super().__init__(str(self))

    def __str__(self) -> str:
        if self.path:
            return f"{self.path}: {self.message}"
        return f"{self.parameter}: {self.message}" if self.parameter else self.message


class InputError(FieldfixError):
    """An input file or value cannot be used as given."""


class UnitError(InputError):
    """A quantity has no unit, an unknown unit, or a unit of the wrong kind."""


class MetadataError(InputError):
    """Timing or geometry metadata is missing, implausible or contradictory."""


class GeometryError(InputError):
    """Grids do not overlap, shapes disagree, or shifts are implausibly large."""


class OutputError(FieldfixError):
    """An output cannot be written (it would replace an input, exists, or the write failed)."""


def check_choice(parameter: str, value, choices, what: str | None = None) -> None:
    """Refuse `value` unless it is one of `choices`, naming `parameter` and the choices.

    Examples
    --------
    >>> check_choice("interp", "cubic", ("linear", "cubic"), "interpolation")
    >>> check_choice("interp", "sinc", ("linear", "cubic"), "interpolation")
    Traceback (most recent call last):
    fieldfix.errors.InputError: interp: unknown interpolation 'sinc'; choose one of linear, cubic
    """
    if value not in choices:
        what = what or parameter.replace("_", " ")
        raise InputError(f"unknown {what} {value!r}; choose one of {', '.join(map(str, choices))}",
                         parameter=parameter)


class MemoryLimitError(FieldfixError):
    """There is not enough memory for the work (an image too large for this machine, or memory ran out)."""
