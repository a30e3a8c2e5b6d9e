"""Protocol geometry and timing of a pilot EPI image, for ``plan --like``.

From the image: the slice orientation (the voxel axis nearest the world axis of the slice normal,
the third voxel axis unless the sidecar's ``SliceEncodingDirection`` says otherwise), the
phase-encode world axis and the number of phase-encode lines (from the sidecar's
``PhaseEncodingDirection``, else the second voxel axis), the in-plane voxel size along phase
encoding and the slice thickness. From the sidecar (BIDS keys): ``EffectiveEchoSpacing``,
``EchoTime`` and ``PartialFourier`` when present. Given values the user typed win over them.
"""

from __future__ import annotations

import dataclasses

import numpy as np

from ..errors import InputError
from ..geometry import axis_direction_world, parse_pe_code, voxel_sizes_mm
from ..io import load_image, read_sidecar

__all__ = ["spec_from_pilot"]

_ORIENTATION = {0: "sagittal", 1: "coronal", 2: "axial"}


def _nearest_world(affine, axis: int) -> int:
    return int(np.argmax(np.abs(axis_direction_world(affine, axis))))


def pilot_changes(path) -> dict:
    """SweepSpec fields read from a pilot image and its sidecar."""
    image = load_image(path, ndim=(3, 4))
    meta = read_sidecar(path)
    pe_axis, _ = parse_pe_code(str(meta.get("PhaseEncodingDirection", "j")))
    slice_axis, _ = parse_pe_code(str(meta.get("SliceEncodingDirection", "k")))
    if slice_axis == pe_axis:
        raise InputError("the phase-encode and slice axes of the pilot are the same", path)
    sizes = voxel_sizes_mm(image.affine)
    changes = {"orientation": _ORIENTATION[_nearest_world(image.affine, slice_axis)],
               "pe_world_axis": "xyz"[_nearest_world(image.affine, pe_axis)],
               "pe_lines": int(image.shape[pe_axis]), "inplane_mm": float(sizes[pe_axis]),
               "thickness_mm": (float(sizes[slice_axis]),)}
    if "EffectiveEchoSpacing" in meta:
        changes["echo_spacing_s"] = float(meta["EffectiveEchoSpacing"])
    if "EchoTime" in meta:
        changes["te_s"] = (float(meta["EchoTime"]),)
    if "PartialFourier" in meta:
        changes["partial_fourier"] = float(meta["PartialFourier"])
    return changes


def spec_from_pilot(path, spec, given=()):
    """`spec` with the pilot's geometry and timing, except the fields named in `given`.

    Example
    -------
    ``spec_from_pilot("sub-01_bold.nii.gz", SweepSpec(), given={"te_s"})``
    """
    changes = {k: v for k, v in pilot_changes(path).items() if k not in set(given)}
    return dataclasses.replace(spec, **changes)
