"""Streaming a 4D run through a per-volume correction with bounded memory.

Three threads overlap: a reader thread reads the volumes in order through one open file
handle (a compressed file is decompressed once, by ISA-L when installed) and hashes the
file's bytes as they pass; the calling thread corrects one volume at a time; a writer
thread compresses the corrected volumes into a :class:`fieldfix.io.StreamingWriter`.
Decompression, compression and the numba kernels release the GIL, so on two or more cores
the three stages run side by side. Short queues between them keep memory at a few volumes
whatever the run's length.
"""

from __future__ import annotations

import queue
import threading
from typing import Callable

import numpy as np

from .._progress import progress_bar
from ..io import Image, StreamingWriter, image_stem, reopen_image, save_image
from ._run_checks import finite_volume

__all__ = ["BackgroundReader", "BackgroundWriter", "sequential", "write_corrected_run"]

#: Volumes waiting between two stages (read -> correct, correct -> write).
QUEUE_DEPTH = 2


class BackgroundWriter:
    """Feed a StreamingWriter from a second thread through a short queue.

    Compressing the output (ISA-L and zlib release the GIL) then overlaps with reading,
    decompressing and correcting the next volumes. At most `depth` volumes wait in the
    queue, so memory stays at a few volumes. An error in the writing thread is raised in
    the caller at the next :meth:`put` or at :meth:`close`; :meth:`close` always waits for
    the thread, so the writer's context can then clean up.
    """

    def __init__(self, writer: StreamingWriter, depth: int = QUEUE_DEPTH):
        self._writer = writer
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._error: BaseException | None = None
        self._thread = threading.Thread(target=self._work, name="fieldfix-writer", daemon=True)
        self._thread.start()

    def _work(self) -> None:
        while True:
            item = self._queue.get()
            if item is None:
                return
            if self._error is None:  # after a failure, keep draining so the caller never blocks
                try:
                    self._writer.write(item)
                except BaseException as err:  # noqa: BLE001 - handed to the caller
                    self._error = err

    def put(self, volume: np.ndarray) -> None:
        if self._error is not None:
            raise self._error
        self._queue.put(volume)

    def close(self) -> None:
        self._queue.put(None)
        self._thread.join()
        if self._error is not None:
            raise self._error

    def abort(self) -> None:
        """Stop after a failure or an interruption: drop what waits, end the thread, never block long."""
        self._error = self._error or RuntimeError("aborted")
        while True:
            try:
                self._queue.get_nowait()
            except queue.Empty:
                break
        try:
            self._queue.put(None, timeout=1.0)
        except queue.Full:
            pass
        self._thread.join(timeout=10.0)


class BackgroundReader:
    """Read the volumes of an image in order in a second thread, at most `depth` ahead.

    Iterating yields ``(t, volume)`` in order. An error while reading (a truncated or
    corrupt file) is raised in the caller when it reaches the volume that failed.
    :meth:`close` stops the thread early (after an error elsewhere) and waits for it.
    """

    _END = object()

    def __init__(self, image: Image, depth: int = QUEUE_DEPTH):
        self._image = image
        self._queue: queue.Queue = queue.Queue(maxsize=depth)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._work, name="fieldfix-reader", daemon=True)
        self._thread.start()

    def _offer(self, item) -> bool:
        while not self._stop.is_set():
            try:
                self._queue.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def _work(self) -> None:
        try:
            for t in range(self._image.n_volumes):
                if not self._offer((t, self._image.volume(t))):
                    return
        except BaseException as err:  # noqa: BLE001 - handed to the caller
            self._offer(err)
            return
        self._offer(self._END)

    def __iter__(self):
        while True:
            item = self._queue.get()
            if item is self._END:
                return
            if isinstance(item, BaseException):
                raise item
            yield item

    def close(self) -> None:
        self._stop.set()
        while True:  # unblock a reader waiting on a full queue
            try:
                self._queue.get_nowait()
            except queue.Empty:
                break
        self._thread.join(timeout=10.0)


def sequential(image: Image) -> Image:
    """The same image through a fresh open handle, for reading its volumes in order.

    Each read of volume t then continues the one open stream: a ``.nii.gz`` is
    decompressed once, not from its start for every volume.
    """
    return reopen_image(image)[0]


def write_corrected_run(image: Image, correct: Callable[[np.ndarray], np.ndarray], path, *, inputs, overwrite: bool,
                        provenance, progress: bool, gzip_effort: str = "fast") -> int:
    """Correct every volume of `image` with `correct` and write the result to `path`.

    A 4D run is streamed volume by volume (reader thread, this thread, writer thread); a
    3D image is corrected at once (a one-volume 4D file stays 4D). The run's file is hashed
    while it is read, and the hash goes to `provenance`, so it is not read a second time.
    Volumes with NaN or infinite voxels stop the job (the unfinished output is removed).
    Returns the number of volumes.
    """
    source, hashing = reopen_image(image, hashing=True)
    try:
        if image.ndim == 4:
            _stream_4d(image, source, correct, path, hashing, inputs=inputs, overwrite=overwrite,
                       provenance=provenance, progress=progress, gzip_effort=gzip_effort)
            return image.shape[3]
        corrected = correct(finite_volume(image, source.volume(0), 0))
        _record_hash(provenance, image, hashing)
    finally:
        hashing.close()
    if len(image.file_shape) == 4:  # a one-volume run stays a 4D file, as it came
        corrected = corrected[..., None]
    save_image(path, corrected, image.affine, template=image, inputs=inputs, overwrite=overwrite,
               provenance=provenance, gzip_effort=gzip_effort)
    return 1


def _stream_4d(image, source, correct, path, hashing, *, inputs, overwrite, provenance, progress, gzip_effort):
    n_volumes = image.shape[3]
    with StreamingWriter(path, image.shape, image.affine, template=image, inputs=inputs, overwrite=overwrite,
                         provenance=provenance, gzip_effort=gzip_effort) as writer:
        background = BackgroundWriter(writer)
        reader = BackgroundReader(source)
        try:
            volumes = progress_bar(reader, total=n_volumes, desc=image_stem(image.path), enabled=progress,
                                   unit="vol")
            for t, volume in volumes:
                background.put(correct(finite_volume(image, volume, t)))
        except BaseException:  # an error or an interruption: stop both threads without waiting on them
            reader.close()
            background.abort()
            raise
        reader.close()
        background.close()
        _record_hash(provenance, image, hashing)  # before the writer's exit writes the sidecar


def _record_hash(provenance, image: Image, hashing) -> None:
    digest = hashing.hexdigest() if hashing is not None else None
    if provenance is not None and digest is not None:
        provenance.record_hash(image.path, digest)
