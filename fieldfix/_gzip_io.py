"""gzip streams for NIfTI files (ISA-L when installed, else zlib) and hashing file wrappers.

Private helpers of :mod:`fieldfix.io`: :func:`gzip_reader` / :func:`gzip_writer` wrap a
binary file in a gzip stream, :class:`HashingReader` / :class:`HashingWriter` keep the
SHA-256 of the bytes that pass through them, so a streamed input or output is hashed
without reading it a second time.
"""

from __future__ import annotations

import gzip
import hashlib
import io
import os
import zlib

from .errors import check_choice

try:  # ISA-L's deflate: the same gzip format, several times faster than zlib both ways
    from isal import igzip as _IGZIP
    from isal.isal_zlib import error as ISAL_ERROR
except ImportError:  # pragma: no cover - isal is a dependency; zlib's gzip is the fallback
    _IGZIP = None
    ISAL_ERROR = zlib.error

#: Compression effort of ``.nii.gz`` outputs -> (ISA-L level, zlib level). ``'fast'`` (the
#: default): ISA-L level 1, about 500 MiB/s on one core (zlib level 1: about 60 MiB/s), files
#: about the size of zlib level 6's; ``'small'``: ISA-L level 3, about 2.5 times slower, files
#: a few percent smaller for int16 runs (about the same for noisy float32, which deflate hardly
#: compresses at any level; measured on EPI-like runs). Without ISA-L, zlib levels 1
#: and 9. Every level writes standard gzip (RFC 1952) that any reader opens, with a zero
#: modification time, so equal voxels give equal files with the same library and level.
GZIP_EFFORTS = {"fast": (1, 1), "small": (3, 9)}


def check_effort(gzip_effort: str) -> None:
    check_choice("gzip_effort", gzip_effort, GZIP_EFFORTS)


def gzip_writer(raw, gzip_effort: str):
    """A gzip stream over the binary file `raw` (ISA-L when installed, else zlib)."""
    isal_level, zlib_level = GZIP_EFFORTS[gzip_effort]
    if _IGZIP is not None:
        return _IGZIP.IGzipFile(fileobj=raw, mode="wb", compresslevel=isal_level, mtime=0)
    return gzip.GzipFile(fileobj=raw, mode="wb", compresslevel=zlib_level, mtime=0)


def gzip_reader(raw):
    """A gzip stream reading the binary file `raw` (ISA-L when installed, else zlib)."""
    if _IGZIP is not None:
        return _IGZIP.IGzipFile(fileobj=raw, mode="rb")
    return gzip.GzipFile(fileobj=raw, mode="rb")


class HashingReader:
    """A binary file opened for reading that keeps the SHA-256 of the bytes read in order.

    nibabel and the gzip reader read through it; as long as they read front to back (a
    streamed pass over a run), :meth:`hexdigest` finishes the hash by reading whatever
    they left at the end and returns the file's SHA-256 without a second pass. After a
    seek elsewhere it returns None (the caller then hashes the file itself).
    """

    def __init__(self, path: str | os.PathLike):
        self._raw = open(path, "rb")
        self.name = str(path)
        self.mode = "rb"
        self._digest = hashlib.sha256()
        self._hashed = 0  # bytes from the start that went into the digest
        self._valid = True
        self._final: str | None = None

    def _note(self, start: int, data) -> None:
        end = start + len(data)
        if not self._valid or end <= self._hashed:
            return
        if start > self._hashed:  # a gap: the digest can no longer be the file's
            self._valid = False
            return
        self._digest.update(memoryview(data)[self._hashed - start:])
        self._hashed = end

    def read(self, size: int = -1) -> bytes:
        start = self._raw.tell()
        data = self._raw.read(size)
        self._note(start, data)
        return data

    def readinto(self, buffer) -> int:
        start = self._raw.tell()
        count = self._raw.readinto(buffer)
        self._note(start, memoryview(buffer).cast("B")[:count])
        return count

    def seek(self, offset: int, whence: int = 0) -> int:
        return self._raw.seek(offset, whence)

    def tell(self) -> int:
        return self._raw.tell()

    def write(self, data) -> int:
        raise io.UnsupportedOperation("HashingReader is read-only")

    def seekable(self) -> bool:
        return True

    def readable(self) -> bool:
        return True

    def close(self) -> None:
        self._raw.close()

    @property
    def closed(self) -> bool:
        return self._raw.closed

    def hexdigest(self) -> str | None:
        """SHA-256 of the whole file, or None when it was not read front to back."""
        if not self._valid:
            return None
        if self._final is not None:
            return self._final
        with open(self.name, "rb") as rest:  # the bytes after the last one read (a gzip trailer)
            rest.seek(self._hashed)
            for block in iter(lambda: rest.read(1 << 20), b""):
                self._digest.update(block)
                self._hashed += len(block)
        self._final = self._digest.hexdigest()
        return self._final


class HashingWriter:
    """A binary file opened for writing that keeps the SHA-256 of what went through it."""

    def __init__(self, raw):
        self._raw = raw
        self._digest = hashlib.sha256()
        self.name = raw.name
        self.mode = "wb"

    def write(self, data) -> int:
        self._digest.update(data)
        return self._raw.write(data)

    def flush(self) -> None:
        self._raw.flush()

    def close(self) -> None:
        self._raw.close()

    @property
    def closed(self) -> bool:
        return self._raw.closed

    def hexdigest(self) -> str:
        return self._digest.hexdigest()
