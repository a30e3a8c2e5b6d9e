"""The modelled field of a job run without a B0 map (plan, dropout).

The field comes from :mod:`fieldfix.plan_field`: the built-in head, or a user's label image (read
and checked here: whole numbers, every label with a susceptibility) with its table. It is held in
single precision, as it is written (``modelled_b0_hz``), so a job given the written file as its B0
map reproduces the numbers of the job that modelled it.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io import Provenance, load_image, save_image
from ..plan_field import FieldModel, ModelledField, field_from_label_image, modelled_field

__all__ = ["read_modelled_field", "save_modelled_field", "model_inputs", "MODEL_BRAIN"]

#: How the summaries name the brain mask of a modelled field.
MODEL_BRAIN = "brain of the head model"


def model_inputs(model: ModelledField | None) -> list[Path]:
    """The input files of a field model (its label image), which no output may replace."""
    return [Path(model.labels_path)] if model is not None and model.labels_path is not None else []


def read_modelled_field(model: ModelledField | None) -> FieldModel:
    """The modelled field (float32 Hz): of the label image `model` names, else of the built-in head.

    Raises
    ------
    InputError
        For a label image that is not whole numbers, a label without a susceptibility or a
        brain label not in the image (naming the image).

    Example
    -------
    >>> f = read_modelled_field(ModelledField(field_strength_t=7.0, voxel_mm=8.0, shape=(22, 26, 26)))
    >>> f.b0_hz.dtype.name, f.source
    ('float32', 'modelled: built-in head, 7 T, pitch 0 deg')
    """
    model = model if model is not None else ModelledField()
    if model.labels_path is None:
        field = modelled_field(model)
    else:
        image = load_image(model.labels_path, ndim=(3,))
        data = image.get_fdata(np.float32)
        if not np.isfinite(data).all() or not np.allclose(data, np.rint(data)):
            raise InputError("the label image must hold whole numbers", model.labels_path)
        try:
            field = field_from_label_image(np.rint(data), image.affine, dict(model.table_ppm), model.brain_labels,
                                           model)
        except InputError as err:
            raise InputError(err.message, model.labels_path) from None
    return dataclasses.replace(field, b0_hz=field.b0_hz.astype(np.float32))


def save_modelled_field(path, field: FieldModel, *, inputs, overwrite: bool, provenance: Provenance) -> Path:
    """Write the modelled field (Hz) with its provenance; the sidecar says how it was modelled."""
    return save_image(path, field.b0_hz, field.affine, inputs=inputs, overwrite=overwrite, provenance=provenance,
                      sidecar_extra={"Description": field.source, "Units": "Hz"})
