"""Reading and writing images and JSON: the file edge of fieldfix.

* :func:`load_image` opens NIfTI-1 and NIfTI-2 files (``.nii``, ``.nii.gz``) lazily through
  nibabel and reads the BIDS JSON sidecar beside them.
* :func:`save_image`, :func:`write_json` and :class:`StreamingWriter` write atomically: the
  data go to a hidden temporary file in the target folder that is renamed into place only
  when complete, so an interrupted or failed write leaves no partial output. None of them
  replaces a file that is an input of the same job, and none replaces an existing file
  unless asked to.
* :class:`Provenance` records the fieldfix version, the command or call, the parameters and
  every input's path and SHA-256; it is written as a JSON sidecar beside each output image.

Examples
--------
>>> import numpy as np, tempfile, os
>>> folder = tempfile.mkdtemp()
>>> path = save_image(os.path.join(folder, "b0.nii.gz"), np.zeros((4, 4, 4)), np.eye(4))
>>> load_image(path).shape
(4, 4, 4)
"""

from __future__ import annotations

import datetime as _dt
import gzip
import io
import math
import os
import struct
import weakref
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Sequence

import nibabel as nib
import numpy as np


from ._gzip_io import ISAL_ERROR, GZIP_EFFORTS, HashingReader, HashingWriter, check_effort, gzip_reader, gzip_writer
from ._headers import check_affine, check_data_type, check_voxel_sizes, unsupported_code
from ._memory import check_image_memory, check_inflation
from .errors import InputError, MemoryLimitError, OutputError
from .jsonfile import read_json, to_jsonable, write_json
from .outputs import CAUTION
from .outdir import (
    atomic_output,
    output_folder,
    output_paths_guard,
    output_transaction,
    new_temporary,
    put_in_place,
    sha256_file,
    write_failed,
)

__all__ = [
    "Image",
    "load_image",
    "read_sidecar",
    "sidecar_path",
    "image_stem",
    "save_image",
    "write_json",
    "read_json",
    "StreamingWriter",
    "atomic_output",
    "Provenance",
    "sha256_file",
    "output_paths_guard",
    "output_transaction",
    "output_folder",
    "NIFTI_INTENT_DISPVECT",
    "GZIP_EFFORTS",
    "HashingReader",
    "reopen_image",
]

#: NIfTI-1 intent code for a displacement vector field (nifti1.h: NIFTI_INTENT_DISPVECT).
NIFTI_INTENT_DISPVECT = 1006

_NIFTI_SUFFIXES = (".nii.gz", ".nii")
# Everything nibabel raises for damaged or nonsensical files (a corrupt header can give
# OverflowError from huge dimensions or an infinite offset, HeaderDataError from an unknown
# data type code or an invalid scaling).
_READ_ERRORS = (OSError, EOFError, ValueError, OverflowError, struct.error, zlib.error, ISAL_ERROR, gzip.BadGzipFile,
                nib.filebasedimages.ImageFileError, nib.spatialimages.HeaderDataError,
                nib.spatialimages.ImageDataError)
#: Upper bound of the deflate compression ratio (RFC 1951 blocks cannot exceed about 1032:1).
_MAX_DEFLATE_RATIO = 1032
#: Voxels read at once by :meth:`Image.get_fdata` (slabs along the last axis), about 64 MiB as float64.
_SLAB_VOXELS = 8 * 2 ** 20


def _out_of_memory(err: BaseException) -> bool:
    """A MemoryError, or a decompressor's report of one (zlib: Z_MEM_ERROR, "insufficient memory")."""
    return isinstance(err, MemoryError) or "memory" in str(err).lower()

def _open_nifti(path: Path, *, hashing: bool = False):
    """nibabel image of a NIfTI file, lazily, its data read through one open handle.

    ``.nii.gz`` files are decompressed by ISA-L when installed; reading volume after volume
    through the proxy continues one open stream instead of decompressing the file from its
    start for every volume, which would make a streamed pass over a T-volume run cost O(T^2).
    With `hashing`, the compressed (or plain) bytes pass through a :class:`HashingReader`,
    returned second (else None).
    """
    compressed = path.name.endswith(".gz")
    klass = next((k for k in (nib.Nifti1Image, nib.Nifti2Image) if k.path_maybe_image(str(path))[0]), None)
    if klass is None or not (compressed or hashing):
        # not NIfTI (nibabel names what it is, or why it cannot tell), or a plain .nii: nibabel
        # keeps one handle open across reads and closes it with the proxy
        return nib.load(str(path), keep_file_open=True), None
    raw = HashingReader(path) if hashing else open(path, "rb")
    try:
        stream = gzip_reader(raw) if compressed else raw
        holder = nib.fileholders.FileHolder(filename=str(path), fileobj=stream)
        nifti = klass.from_file_map({"header": holder, "image": holder}, mmap=False)
    except (EOFError, zlib.error, ISAL_ERROR) as err:  # the header was there, the stream behind it is cut short
        raw.close()
        raise InputError(f"cannot read the image, the file may be truncated or corrupt ({_one_line(err)})",
                         path) from None
    except BaseException:
        raw.close()
        raise
    if stream is not raw:  # every proxy of the image holds the stream: close the file when the last goes
        weakref.finalize(stream, raw.close)
    return nifti, (raw if hashing else None)


def _version() -> str:
    from . import __version__

    return __version__


def image_stem(path: str | os.PathLike) -> str:
    """File name without its NIfTI suffix: ``sub-01_bold.nii.gz`` -> ``sub-01_bold``."""
    name = Path(path).name
    for suffix in _NIFTI_SUFFIXES:
        if name.endswith(suffix):
            return name[: -len(suffix)]
    return Path(name).stem


def sidecar_path(path: str | os.PathLike) -> Path:
    """Path of the JSON sidecar that belongs beside an image."""
    path = Path(path)
    return path.with_name(image_stem(path) + ".json")


def read_sidecar(path: str | os.PathLike) -> dict:
    """The BIDS JSON sidecar beside an image as a dict, or ``{}`` when there is none."""
    candidate = sidecar_path(path)
    return read_json(candidate) if candidate.is_file() else {}


@dataclass
class Image:
    """A NIfTI image opened lazily, with its BIDS sidecar.

    Attributes
    ----------
    path : Path
    nifti : nibabel image (Nifti1Image or Nifti2Image)
    sidecar : dict
        Contents of the JSON file beside the image (``{}`` if none).
    file_shape : tuple of int
        Shape as stored in the file. Trailing axes of length 1 are dropped on loading (a
        one-volume 4D run is read as 3D); writers use this to give such a file's outputs
        its own dimensionality back. Empty when unknown (then equal to ``shape``).
    file_zooms : tuple of float
        Voxel sizes (and TR) as stored in the file, for the same reason.
    """

    path: Path
    nifti: Any
    sidecar: dict = field(default_factory=dict)
    file_shape: tuple = ()
    file_zooms: tuple = ()

    @property
    def affine(self) -> np.ndarray:
        """4x4 voxel-to-world (RAS+ mm) matrix."""
        return np.asarray(self.nifti.affine, float)

    @property
    def header(self):
        return self.nifti.header

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(n) for n in self.nifti.shape)

    @property
    def ndim(self) -> int:
        return len(self.shape)

    @property
    def n_volumes(self) -> int:
        """Number of volumes along the fourth axis (1 for a 3D image)."""
        return self.shape[3] if self.ndim >= 4 else 1

    @property
    def zooms(self) -> tuple[float, ...]:
        """Voxel sizes in mm (and the fourth-axis step as stored in the header)."""
        return tuple(float(z) for z in self.header.get_zooms())

    @property
    def dataobj(self):
        """nibabel's lazy array proxy (slicing it reads only what is needed)."""
        return self.nifti.dataobj

    @property
    def tr_s(self) -> float | None:
        """Repetition time in seconds: sidecar ``RepetitionTime`` if present, else the header."""
        if "RepetitionTime" in self.sidecar:
            try:
                return float(self.sidecar["RepetitionTime"])
            except (TypeError, ValueError):
                raise InputError("RepetitionTime in the sidecar is not a number", sidecar_path(self.path)) from None
        zooms = self.header.get_zooms() if self.ndim >= 4 else self.file_zooms  # a one-volume run's TR
        if len(zooms) < 4:
            return None
        step = float(zooms[3])
        unit = self.header.get_xyzt_units()[1]
        scale = {"msec": 1e-3, "usec": 1e-6}.get(unit, 1.0)
        return step * scale if step > 0 else None

    def _read(self, getter):
        try:
            return getter()
        except (MemoryError, *_READ_ERRORS) as err:
            if _out_of_memory(err):
                raise MemoryLimitError(f"ran out of memory reading the image (shape {self.shape}, "
                                       f"{self.header.get_data_dtype()}); the file itself may be intact",
                                       self.path) from None
            raise InputError(f"cannot read image data, the file may be truncated or corrupt ({_one_line(err)})",
                             self.path) from None

    def get_fdata(self, dtype=np.float32) -> np.ndarray:
        """All voxels as floating point, with the header's scaling applied, read in bounded slabs.

        The result is allocated once in `dtype` (Fortran order, as NIfTI stores it) and filled
        slab by slab along the last axis, so reading a float32 result never holds the whole
        image in double precision. Values beyond the range of `dtype` become infinite (callers
        check for finite data).

        Raises
        ------
        MemoryLimitError
            Before reading, when the image does not fit the memory budget, or when a large image
            would inflate far beyond its file size (a decompression bomb; see :mod:`fieldfix._memory`).
        """
        check_image_memory(self.path, self.shape)
        stored = math.prod(self.shape) * self.header.get_data_dtype().itemsize
        check_inflation(self.path, self.shape, stored, self.path.stat().st_size)

        def read():
            shape = self.shape
            proxy = self.nifti.dataobj
            if not shape:  # a header with no axes: one value
                with np.errstate(over="ignore", invalid="ignore"):
                    return np.asarray(proxy, dtype=dtype)
            values = np.empty(shape, dtype=dtype, order="F")
            step = max(1, _SLAB_VOXELS // max(1, math.prod(shape[:-1])))
            with np.errstate(over="ignore", invalid="ignore"):
                for start in range(0, shape[-1], step):
                    values[..., start:start + step] = proxy[..., start:start + step]
            return values

        return self._read(read)

    def volume(self, t: int, dtype=np.float32) -> np.ndarray:
        """Volume `t` of a 4D image (scaled), read through the proxy; `t` must be 0 for 3D."""
        if self.ndim == 3:
            if t != 0:
                raise IndexError(t)
            return self.get_fdata(dtype)
        def read():
            with np.errstate(over="ignore", invalid="ignore"):
                return np.asarray(self.nifti.dataobj[..., t], dtype=dtype)

        return self._read(read)


def load_image(path: str | os.PathLike, *, ndim: Iterable[int] | None = None, sidecar: bool = True) -> Image:
    """Open a NIfTI-1 or NIfTI-2 image lazily and read its sidecar.

    Parameters
    ----------
    path : str or PathLike
        ``.nii`` or ``.nii.gz`` file.
    ndim : iterable of int, optional
        Accepted numbers of dimensions (for example ``(3,)`` or ``(3, 4)``); trailing
        singleton axes beyond the third are dropped before the check.
    sidecar : bool
        Read the JSON beside the image.

    Raises
    ------
    InputError
        For a missing or unreadable file, a file that is not NIfTI, or a wrong number of dimensions.
    """
    path = Path(path)
    if not path.exists():
        raise InputError("file not found", path)
    if not path.is_file():
        raise InputError("not a file", path)
    if not os.access(path, os.R_OK):
        raise InputError("file is not readable (permission denied)", path)
    try:
        nifti, _ = _open_nifti(path)
    except _READ_ERRORS as err:
        raise InputError(unsupported_code(err) or f"not a readable NIfTI image ({_one_line(err)})", path) from None
    if not isinstance(nifti, (nib.Nifti1Image, nib.Nifti2Image)):
        raise InputError(f"expected a NIfTI-1 or NIfTI-2 image, found {type(nifti).__name__}", path)
    try:
        check_data_type(path, nifti.header)
        _check_data_size(path, nifti)
        file_shape = tuple(int(n) for n in nifti.shape)
        file_zooms = tuple(float(z) for z in nifti.header.get_zooms())
        shape = nifti.shape
        while len(shape) > 3 and shape[-1] == 1:
            shape = shape[:-1]
        if len(shape) != len(nifti.shape):
            # Lazy: reshape the proxy (nibabel's squeeze_image would read every voxel).
            nifti = type(nifti)(nifti.dataobj.reshape(shape), nifti.affine, nifti.header)
    except _READ_ERRORS as err:
        raise InputError(f"not a readable NIfTI image ({_one_line(err)})", path) from None
    if ndim is not None:
        allowed = tuple(ndim)
        if len(shape) not in allowed:
            wanted = " or ".join(f"{n}D" for n in allowed)
            raise InputError(f"image is {len(shape)}D with shape {tuple(shape)}; a {wanted} image is needed", path)
    try:
        check_voxel_sizes(path, nifti)
    except _READ_ERRORS as err:
        raise InputError(f"not a readable NIfTI image ({_one_line(err)})", path) from None
    check_affine(path, nifti)
    check_image_memory(path, tuple(shape)[:3], "image (one volume)" if len(shape) > 3 else "image")
    return Image(path=path, nifti=nifti, sidecar=read_sidecar(path) if sidecar else {}, file_shape=file_shape,
                 file_zooms=file_zooms)


def reopen_image(image: Image, *, hashing: bool = False) -> tuple[Image, "HashingReader | None"]:
    """The same image through a fresh open handle, positioned at the start of its data.

    For a streamed pass over the volumes in order (each compressed byte is decompressed
    once). With `hashing`, the file's bytes are hashed as they are read: the returned
    :class:`HashingReader` gives the file's SHA-256 after the pass.
    """
    try:
        nifti, reader = _open_nifti(image.path, hashing=hashing)
    except _READ_ERRORS as err:
        raise InputError(f"not a readable NIfTI image ({_one_line(err)})", image.path) from None
    if tuple(nifti.shape) != image.shape:
        nifti = type(nifti)(nifti.dataobj.reshape(image.shape), nifti.affine, nifti.header)
    return Image(path=image.path, nifti=nifti, sidecar=image.sidecar, file_shape=image.file_shape,
                 file_zooms=image.file_zooms), reader


def _one_line(err: BaseException) -> str:
    return " ".join(str(err).split()) or type(err).__name__


def _check_data_size(path: Path, nifti) -> None:
    """Refuse a file too small to hold the data its header describes (truncated or corrupt)."""
    header = nifti.header
    shape = tuple(int(n) for n in header.get_data_shape())
    if any(n < 0 for n in shape):
        raise InputError(f"the header gives negative dimensions {shape}", path)
    needed = int(header.get_data_offset()) + math.prod(shape) * header.get_data_dtype().itemsize
    size = path.stat().st_size
    compressed = path.name.endswith(".gz")
    limit = size * _MAX_DEFLATE_RATIO if compressed else size
    if needed > limit:
        what = "cannot hold" if compressed else "is too small for"
        raise InputError(f"the file {what} the {needed} bytes its header describes (shape {shape}, "
                         f"{header.get_data_dtype()}); it is truncated or corrupt", path)


class Provenance:
    """Where an output came from: fieldfix version, command, parameters, inputs and their hashes.

    Input hashes are computed once, on first use, and shared by every output written
    with the same object; an input hashed while it was streamed (:meth:`record_hash`) is
    not read again.

    Parameters
    ----------
    command : str
        The command line or library call that made the outputs.
    parameters : dict
        Parameters used, in SI units (names carry units).
    inputs : sequence of paths
    """

    def __init__(self, command: str | None, parameters: dict | None = None, inputs: Sequence = ()):
        self.command = command or "fieldfix (library call)"
        self.parameters = dict(parameters or {})
        self.inputs = [Path(p) for p in inputs if p is not None]
        self._hashes: list[dict] | None = None
        self._known: dict[str, str] = {}

    def record_hash(self, path: str | os.PathLike, sha256: str) -> None:
        """Use `sha256` for the input at `path` (hashed while it was read) instead of reading it again."""
        self._known[str(Path(path).resolve())] = sha256

    def input_records(self) -> list[dict]:
        if self._hashes is None:
            records = []
            for p in self.inputs:
                where = str(p.resolve())
                records.append({"path": where, "sha256": self._known.get(where) or sha256_file(p)})
            self._hashes = records
        return self._hashes

    def as_dict(self) -> dict:
        return {
            "GeneratedBy": {"Name": "fieldfix", "Version": _version()},
            "Command": self.command,
            "Parameters": to_jsonable(self.parameters),
            "Inputs": self.input_records(),
            "Created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
            "Caution": CAUTION,
        }


def _header_for(data_shape, affine, template, dtype, intent):
    """A fresh NIfTI header of the template's flavour, carrying its units, codes and TR."""
    klass = nib.Nifti2Image if isinstance(getattr(template, "nifti", template), nib.Nifti2Image) else nib.Nifti1Image
    header = klass.header_class()
    source = getattr(template, "nifti", template)
    header.set_data_shape(data_shape)
    header.set_data_dtype(dtype)
    affine = np.asarray(affine, float)
    if source is not None:
        src_header = source.header
        header.set_xyzt_units(*src_header.get_xyzt_units())
        q_code = int(src_header["qform_code"]) or 1
        s_code = int(src_header["sform_code"]) or 1
        zooms = list(src_header.get_zooms())
        if len(getattr(template, "file_zooms", ())) > len(zooms):  # axes of length 1 dropped on loading
            zooms = list(template.file_zooms)
        if len(data_shape) >= 4 and len(zooms) >= 4 and len(data_shape) == len(zooms):
            header.set_zooms(tuple(zooms[:3]) + tuple(zooms[3:len(data_shape)]))
    else:
        header.set_xyzt_units("mm", "sec")
        q_code = s_code = 1
    header.set_qform(affine, code=q_code)
    header.set_sform(affine, code=s_code)
    if intent is not None:
        header.set_intent(intent)
    header["scl_slope"] = 1.0
    header["scl_inter"] = 0.0
    return klass, header


def save_image(
    path: str | os.PathLike,
    data: np.ndarray,
    affine: np.ndarray,
    *,
    template=None,
    intent=None,
    dtype=np.float32,
    inputs: Iterable = (),
    overwrite: bool = False,
    provenance: Provenance | None = None,
    sidecar_extra: dict | None = None,
    gzip_effort: str = "fast",
) -> Path:
    """Write an image atomically, with an optional provenance sidecar.

    Parameters
    ----------
    path : str or PathLike
        ``.nii.gz`` (gzip, see `gzip_effort`) or ``.nii`` (uncompressed).
    data : array
        Written with `dtype` (no scaling); booleans become uint8.
    affine : (4, 4) array
    template : Image or nibabel image, optional
        Supplies the flavour (NIfTI-1/2), spatial/temporal units, qform/sform codes and
        the repetition time of 4D data.
    intent : int or str, optional
        NIfTI intent code, e.g. :data:`NIFTI_INTENT_DISPVECT` (vector in the fifth axis).
    inputs : iterable of paths
        Paths this output must never replace.
    overwrite : bool
        Replace an existing output (never an input).
    provenance : Provenance, optional
        Written, with `sidecar_extra`, as ``<stem>.json`` beside the image.
    gzip_effort : {'fast', 'small'}
        Compression of a ``.nii.gz`` (:data:`GZIP_EFFORTS`); ignored for ``.nii``.

    Returns
    -------
    Path
    """
    path = Path(path)
    if not path.name.endswith(_NIFTI_SUFFIXES):
        raise OutputError("image outputs must end in .nii or .nii.gz", path)
    check_effort(gzip_effort)
    inputs = list(inputs)
    if provenance is not None:
        output_paths_guard([sidecar_path(path)], inputs, overwrite)
    array = np.asarray(data)
    if array.dtype == bool:
        dtype = np.uint8
    array = array.astype(dtype, copy=False)
    klass, header = _header_for(array.shape, affine, template, array.dtype, intent)
    image = klass(array, np.asarray(affine, float), header=header)
    with atomic_output(path, inputs, overwrite) as temporary:
        _write_nifti(image, temporary, gzip_effort)
    if provenance is not None:
        record = provenance.as_dict()
        if sidecar_extra:
            record.update(to_jsonable(sidecar_extra))
        write_json(sidecar_path(path), record, inputs=inputs, overwrite=True)
    return path


def _write_nifti(image, path: Path, gzip_effort: str) -> None:
    """Write a nibabel image to `path` (``.nii.gz``: through :func:`gzip_writer`)."""
    if not path.name.endswith(".gz"):
        nib.save(image, str(path))
        return
    with open(path, "wb") as raw, gzip_writer(raw, gzip_effort) as stream:
        holder = nib.fileholders.FileHolder(filename=str(path), fileobj=stream)
        image.to_file_map({"header": holder, "image": holder})


class StreamingWriter:
    """Write a 4D image volume by volume, atomically, with bounded memory.

    The header goes first, then each volume in turn; the file is renamed into place
    only when the context exits cleanly after all volumes were written. On any error or
    interruption (including KeyboardInterrupt) the temporary file is removed and no
    output exists.

    Parameters
    ----------
    path : str or PathLike
        ``.nii.gz`` (gzip, see `gzip_effort`) or ``.nii``.
    shape : tuple of 4 ints
    affine : (4, 4) array
    template : Image or nibabel image, optional
        As in :func:`save_image` (carries the repetition time).
    dtype : numpy dtype
    inputs, overwrite, provenance, sidecar_extra, gzip_effort
        As in :func:`save_image`.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> target = os.path.join(tempfile.mkdtemp(), "run.nii.gz")
    >>> with StreamingWriter(target, (2, 2, 2, 3), np.eye(4)) as writer:
    ...     for t in range(3):
    ...         writer.write(np.full((2, 2, 2), t))
    >>> load_image(target).shape
    (2, 2, 2, 3)
    """

    def __init__(self, path, shape, affine, *, template=None, dtype=np.float32, inputs=(), overwrite=False,
                 provenance: Provenance | None = None, sidecar_extra: dict | None = None, gzip_effort: str = "fast"):
        self.path = Path(path)
        if not self.path.name.endswith(_NIFTI_SUFFIXES):
            raise OutputError("image outputs must end in .nii or .nii.gz", self.path)
        check_effort(gzip_effort)
        self.gzip_effort = gzip_effort
        if len(shape) != 4:
            raise ValueError("StreamingWriter writes 4D images")
        self.shape = tuple(int(n) for n in shape)
        self.dtype = np.dtype(dtype)
        self.affine = np.asarray(affine, float)
        self.template = template
        self.inputs = list(inputs)
        self.overwrite = overwrite
        self.provenance = provenance
        self.sidecar_extra = sidecar_extra
        self.written = 0
        self._temporary: Path | None = None
        self._raw = None
        self._stream = None

    def __enter__(self) -> "StreamingWriter":
        output_paths_guard([self.path], self.inputs, self.overwrite)
        if self.provenance is not None:
            output_paths_guard([sidecar_path(self.path)], self.inputs, self.overwrite)
        klass, header = _header_for(self.shape, self.affine, self.template, self.dtype, None)
        offset = 544 if klass is nib.Nifti2Image else 352
        header.set_data_offset(offset)
        self._temporary = new_temporary(self.path)
        try:
            self._raw = HashingWriter(open(self._temporary, "wb"))
            self._stream = gzip_writer(self._raw, self.gzip_effort) if self.path.name.endswith(".gz") else self._raw
            buffer = io.BytesIO()
            header.write_to(buffer)  # nibabel writes the header and the empty extension flag
            block = buffer.getvalue()
            self._stream.write(block + b"\x00" * (offset - len(block)))
        except BaseException as err:
            self._close_streams()
            self._temporary.unlink(missing_ok=True)
            if isinstance(err, OSError):
                raise write_failed(err, self.path) from None
            raise
        return self

    def write(self, volume: np.ndarray) -> None:
        """Append the next 3D volume (cast to the writer's dtype)."""
        volume = np.asarray(volume)
        if volume.shape != self.shape[:3]:
            raise ValueError(f"volume shape {volume.shape} does not match {self.shape[:3]}")
        if self.written >= self.shape[3]:
            raise ValueError("all volumes were written already")
        block = np.asarray(volume, dtype=self.dtype)
        if not block.flags.f_contiguous:
            block = np.asfortranarray(block)
        self._stream.write(memoryview(block.T.reshape(-1)).cast("B"))  # Fortran order, as NIfTI stores it
        self.written += 1

    def _close_streams(self):
        for stream in (self._stream, self._raw):
            if stream is not None and not stream.closed:
                stream.close()

    def __exit__(self, exc_type, exc, tb):
        error: BaseException | None = None
        try:
            self._close_streams()
        except OSError as err:  # for example a full disk on the final flush
            error = write_failed(err, self.path)
        if exc_type is None and error is None and self.written != self.shape[3]:
            error = OutputError(f"only {self.written} of {self.shape[3]} volumes were written", self.path)
        if exc_type is None and error is None:
            try:
                put_in_place(self._temporary, self.path, self._raw.hexdigest())
            except BaseException:
                self._temporary.unlink(missing_ok=True)
                raise
            if self.provenance is not None:
                record = self.provenance.as_dict()
                if self.sidecar_extra:
                    record.update(to_jsonable(self.sidecar_extra))
                write_json(sidecar_path(self.path), record, inputs=self.inputs, overwrite=True)
            return False
        self._temporary.unlink(missing_ok=True)
        if error is not None:
            raise error
        if isinstance(exc, OSError):
            raise write_failed(exc, self.path) from None
        return False
