"""Reading a B0 map given to a job (unwarp, dropout, plan) in the units it is really in.

The map's units come from, in this order: the job's ``b0_units`` setting, the sidecar's
``Units`` (BIDS field maps say ``Hz``, ``rad/s``, ``ppm`` or ``T``), else Hz. A ppm map needs
the field strength: the setting, else the sidecar's ``MagneticFieldStrength``. An image that
is a phase, not a field (its sidecar says ``rad`` or ``deg``, or it is named as a BIDS
phase-difference or phase image), is refused with what to do instead: a phase image read as
hertz gives a uselessly small correction with no error.
"""

from __future__ import annotations

import re

import numpy as np

from ..errors import InputError, MetadataError, UnitError
from ..fieldmap import field_to_hz
from ..io import Image, sidecar_path
from ..plan_field import FieldModel
from ..units import check_plausible

__all__ = ["read_field_hz", "field_strength_from", "measured_field"]

_PHASE_UNITS = {"rad", "radian", "radians", "deg", "degree", "degrees"}
_PHASE_NAME = re.compile(r"_(phasediff|phase\d*)\.nii(\.gz)?$")


def field_strength_from(image: Image, given: float | None) -> float | None:
    """The main field in T: `given`, else the sidecar's ``MagneticFieldStrength`` (checked), else None."""
    if given is not None:
        return check_plausible("field_strength_t", given)
    value = image.sidecar.get("MagneticFieldStrength")
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise MetadataError(f"MagneticFieldStrength {value!r} in the sidecar is not a number of tesla",
                            sidecar_path(image.path))
    try:
        return check_plausible("field_strength_t", float(value))
    except UnitError as err:
        raise MetadataError(err.message, sidecar_path(image.path)) from None


def read_field_hz(image: Image, units: str | None = None, field_strength_t: float | None = None, *,
                  finite_everywhere: bool = True) -> tuple[np.ndarray, str]:
    """The B0 map's values in Hz (float32) and a phrase saying how its units were known.

    With ``finite_everywhere=False`` NaN and infinite voxels are kept (the caller checks its mask).

    Raises
    ------
    InputError
        For a phase image given as a field map, unknown units, non-finite values, or a ppm
        map without a field strength (each naming the file).
    """
    side = image.sidecar.get("Units")
    if units is None and isinstance(side, str) and side.strip().lower() in _PHASE_UNITS or \
            units is None and _PHASE_NAME.search(image.path.name):
        raise InputError("this is a phase image, not a field map in Hz; make a field map from it first "
                         "(the fieldmap command or run_fieldmap, given the phase difference)", image.path)
    chosen = units if units is not None else side if isinstance(side, str) else "Hz"
    how = "given" if units is not None else "the sidecar's Units" if isinstance(side, str) else \
        "no Units in the sidecar: read as Hz"
    values = image.get_fdata(np.float32)  # single precision: half the memory, and 1e-7 relative is plenty
    if finite_everywhere and not np.all(np.isfinite(values)):
        raise InputError("the B0 map contains NaN or infinite values; it must be defined (extended) everywhere",
                         image.path)
    try:
        return field_to_hz(values, chosen, field_strength_t=field_strength_from(image, field_strength_t)), \
            f"{chosen} ({how})"
    except UnitError as err:
        raise UnitError(err.message, image.path) from None


def measured_field(image: Image, units: str | None = None, field_strength_t: float | None = None) -> tuple[FieldModel, str]:
    """A B0 map as a :class:`fieldfix.plan_field.FieldModel` in Hz (no brain mask, source "measured:
    <path>"), the form a modelled field has too, and how its units were known (see :func:`read_field_hz`;
    non-finite voxels are kept for the caller's mask)."""
    b0_hz, how = read_field_hz(image, units, field_strength_t, finite_everywhere=False)
    return FieldModel(b0_hz=b0_hz, affine=image.affine, brain_mask=None, labels=None,
                      source=f"measured: {image.path}"), how
