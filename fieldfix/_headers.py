"""Refusals of NIfTI headers that cannot describe a usable image, before any voxel is read.

* Data types: real integers and floats up to 64 bits are read; complex data (one voxel is two
  numbers, and taking its real part silently loses the other), colour (RGB24, RGBA32) and
  extended-precision floats are refused with what to do instead.
* Voxel sizes: ``pixdim[1..3]`` of the spatial axes must be positive and finite as stored in the
  file (nibabel repairs 0 to 1 mm and negative to positive on reading, so the raw header bytes
  are read again here; NIfTI-1 standard, nifti1.h, pixdim field).
* Geometry: the voxel-to-world affine (sform, qform or the voxel sizes alone, as nibabel picks
  it) must be finite and its three voxel axes must span space (not singular).

Each refusal is an :class:`fieldfix.errors.InputError` naming the file.
"""

from __future__ import annotations

import io
import re
from pathlib import Path

import nibabel as nib
import numpy as np

from ._gzip_io import gzip_reader
from .errors import InputError

__all__ = ["check_data_type", "check_voxel_sizes", "check_affine", "unsupported_code"]

_AXES = ("first (i)", "second (j)", "third (k)")
#: Smallest |det| of the affine's 3x3 part relative to the product of its column lengths.
_SINGULAR_RTOL = 1e-6


def check_data_type(path: Path, header) -> None:
    """Refuse complex, colour and other data types whose voxels are not one real number."""
    dtype = header.get_data_dtype()
    code = int(header["datatype"])
    label = nib.nifti1.data_type_codes.label.get(code, str(code))
    if dtype.fields is not None:
        raise InputError(f"the image holds colour data ({label.upper()}), not one value per voxel; fieldfix reads "
                         "grey-value images (integers or floats)", path)
    if dtype.kind == "c":
        raise InputError(f"the image holds complex data ({dtype.name}); fieldfix does not take one part of it "
                         "silently: give magnitude and phase (or real and imaginary parts) as separate images", path)
    if dtype.kind == "f" and dtype.itemsize > 8:
        raise InputError(f"the image holds extended-precision floats ({dtype.name}); save it as float32 or float64",
                         path)
    if dtype.kind not in "iuf":
        raise InputError(f"the image's data type {label} ({dtype}) is not supported; use integers or floats", path)


def unsupported_code(err: BaseException) -> str | None:
    """The one-line refusal when nibabel cannot open a file for its data type code, else None."""
    match = re.search(r"data code (\d+) not supported", str(err))
    if match is None:
        return None
    code = int(match.group(1))
    label = nib.nifti1.data_type_codes.label.get(code, f"code {code}")
    return f"the image's data type {label} is not supported; use integers or floats (float32 or float64)"


def raw_header(path: Path, klass):
    """The header as stored in the file, without nibabel's repairs (``check=False``)."""
    size = 540 if klass is nib.Nifti2Image else 348
    with open(path, "rb") as raw:
        stream = gzip_reader(raw) if path.name.endswith(".gz") else raw
        block = stream.read(size)
    return klass.header_class.from_fileobj(io.BytesIO(block), check=False)


def check_voxel_sizes(path: Path, nifti) -> None:
    """Refuse a spatial voxel size (pixdim) that is zero, negative or not finite as stored."""
    header = raw_header(path, type(nifti))
    n_spatial = min(int(header["dim"][0]), 3)
    for axis in range(n_spatial):
        size = float(header["pixdim"][axis + 1])
        if not np.isfinite(size) or size <= 0:
            raise InputError(f"the header's voxel size along the {_AXES[axis]} axis (pixdim[{axis + 1}]) is "
                             f"{size:g}; voxel sizes must be positive, finite millimetres", path)


def _form(header) -> str:
    if int(header["sform_code"]) > 0:
        return "sform"
    if int(header["qform_code"]) > 0:
        return "qform"
    return "voxel sizes (no sform or qform)"


def check_affine(path: Path, nifti) -> None:
    """Refuse a voxel-to-world affine with NaN or infinite entries, or whose voxel axes do not span space."""
    affine = np.asarray(nifti.affine, float)
    form = _form(nifti.header)
    if not np.all(np.isfinite(affine)):
        raise InputError(f"the image's position in space is undefined: its voxel-to-world affine ({form}) has NaN "
                         "or infinite entries", path)
    if len(nifti.shape) < 3:
        return
    linear = affine[:3, :3]
    lengths = np.linalg.norm(linear, axis=0)
    with np.errstate(all="ignore"):
        spread = abs(np.linalg.det(linear)) / np.prod(lengths) if np.all(lengths > 0) else 0.0
    if not spread > _SINGULAR_RTOL:
        raise InputError(f"the image's voxel-to-world affine ({form}) is singular: its voxel axes do not span "
                         "three dimensions, so voxel positions in the scanner cannot be computed", path)
