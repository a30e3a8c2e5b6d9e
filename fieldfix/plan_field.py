"""A modelled B0 field for planning before anyone is scanned.

The field comes from :mod:`fieldfix.susceptibility`: the built-in procedural head (or a user's label
image with a table of susceptibilities in ppm) is turned into a field offset by the Fourier dipole
kernel for a field strength and head pitch, and a second-order shim fitted in the brain is removed
(a scanner's shim does this; common practice, no source). The result is a prediction of the
subject-independent part of the field, labelled "modelled" in every output.

Example
-------
>>> f = modelled_field(ModelledField(field_strength_t=3.0, voxel_mm=8.0, shape=(22, 26, 26)))
>>> f.b0_hz.shape == f.brain_mask.shape and bool(f.brain_mask.any())
True
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from .errors import InputError
from .susceptibility import (
    HEAD_LABELS,
    b0_direction_from_pitch,
    field_from_susceptibility,
    head_model,
    shim_field,
    susceptibility_from_labels,
)

__all__ = ["ModelledField", "FieldModel", "modelled_field", "field_from_label_image"]


@dataclass(frozen=True)
class ModelledField:
    """How to model the field: field strength (T), head pitch (degrees), grid and shim order of the
    built-in head, or a user's label image (`labels_path`, read by the planning job) with its
    label -> susceptibility (ppm) table and the labels that are brain (the shim's region)."""

    field_strength_t: float = 3.0
    pitch_deg: float = 0.0
    voxel_mm: float = 4.0
    shape: tuple = (44, 54, 54)
    shim_order: int = 2
    labels_path: str | None = None
    table_ppm: tuple = ()
    brain_labels: tuple = ()


@dataclass(frozen=True)
class FieldModel:
    """A modelled field (Hz), its affine (mm), the brain mask and the labels it came from."""

    b0_hz: np.ndarray
    affine: np.ndarray
    brain_mask: np.ndarray
    labels: np.ndarray
    source: str


def _shimmed(chi_ppm, affine, brain, how: ModelledField) -> np.ndarray:
    if how.field_strength_t <= 0:
        raise InputError("field_strength_t must be positive")
    field = field_from_susceptibility(chi_ppm, affine, field_t=how.field_strength_t,
                                      b0_direction=b0_direction_from_pitch(how.pitch_deg))
    return np.asarray(shim_field(field, brain, affine, order=how.shim_order)[0], float)


def modelled_field(how: ModelledField = ModelledField()) -> FieldModel:
    """Field of the built-in head model, shimmed in its brain (Hz on a grid centred on the head)."""
    hm = head_model(how.shape, how.voxel_mm)
    b0 = _shimmed(hm.chi_ppm, hm.affine, hm.brain_mask, how)
    return FieldModel(b0_hz=b0, affine=hm.affine, brain_mask=hm.brain_mask,
                      labels=hm.labels, source=f"modelled: built-in head, {how.field_strength_t:g} T, "
                                               f"pitch {how.pitch_deg:g} deg")


def field_from_label_image(labels: np.ndarray, affine: np.ndarray, table_ppm: Mapping[int, float],
                           brain_labels, how: ModelledField = ModelledField()) -> FieldModel:
    """Field of a user's label image: label -> susceptibility (ppm) from `table_ppm`.

    Raises
    ------
    InputError
        When a label of the image has no susceptibility or a brain label is not in the image.
    """
    labels = np.asarray(labels).astype(np.int64)
    present = set(np.unique(labels).tolist())
    missing = sorted(present - {int(k) for k in table_ppm})
    if missing:
        raise InputError(f"table_ppm: labels {missing} of the label image have no susceptibility")
    absent = sorted({int(b) for b in brain_labels} - present)
    if absent:
        raise InputError(f"brain_labels: {absent} not present in the label image")
    chi = susceptibility_from_labels(labels, {int(k): float(v) for k, v in table_ppm.items()})
    brain = np.isin(labels, list(brain_labels))
    return FieldModel(b0_hz=_shimmed(chi, affine, brain, how), affine=np.asarray(affine, float), brain_mask=brain,
                      labels=labels, source=f"modelled: label image, {how.field_strength_t:g} T, "
                                            f"pitch {how.pitch_deg:g} deg")


#: Label of brain in the built-in head model.
BRAIN_LABEL = HEAD_LABELS["brain"]
