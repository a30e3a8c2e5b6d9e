"""Streaming a 4D run through a per-volume correction with bounded memory.

Volumes are read in order through one open file handle (a compressed file is decompressed
once), corrected one at a time, and handed to a writer thread that compresses them into a
:class:`fieldfix.io.StreamingWriter`. Memory is a few volumes whatever the run's length.
"""

from __future__ import annotations

import queue
import threading
from typing import Callable

import nibabel as nib
import numpy as np

from .._progress import progress_bar
from ..io import Image, StreamingWriter, image_stem, save_image
from ._run_checks import finite_volume

__all__ = ["BackgroundWriter", "sequential", "write_corrected_run"]


class BackgroundWriter:
    """Feed a StreamingWriter from a second thread through a short queue.

    Compressing the output (zlib releases the GIL) then overlaps with reading,
    decompressing and correcting the next volumes. At most `depth` volumes wait in the
    queue, so memory stays at a few volumes. An error in the writing thread is raised in
    the caller at the next :meth:`put` or at :meth:`close`; :meth:`close` always waits for
    the thread, so the writer's context can then clean up.
    """

    def __init__(self, writer: StreamingWriter, depth: int = 2):
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


def sequential(image: Image) -> Image:
    """The same image with a proxy that keeps its file open across volume reads.

    nibabel reopens a file for every proxy slice by default; for ``.nii.gz`` each read of
    volume t would then decompress everything before it. With one open handle, reading
    volumes in order decompresses the file once.
    """
    nifti = nib.load(str(image.path), keep_file_open=True)
    if tuple(nifti.shape) != image.shape:
        nifti = type(nifti)(nifti.dataobj.reshape(image.shape), nifti.affine, nifti.header)
    return Image(path=image.path, nifti=nifti, sidecar=image.sidecar, file_shape=image.file_shape,
                 file_zooms=image.file_zooms)


def write_corrected_run(image: Image, correct: Callable[[np.ndarray], np.ndarray], path, *, inputs, overwrite: bool,
                        provenance, progress: bool) -> int:
    """Correct every volume of `image` with `correct` and write the result to `path`.

    A 4D run is streamed volume by volume; a 3D image is corrected at once (a one-volume
    4D file stays 4D). Volumes with NaN or infinite voxels stop the job (the unfinished
    output is removed). Returns the number of volumes.
    """
    source = sequential(image)
    affine = image.affine
    if image.ndim == 4:
        n_volumes = image.shape[3]
        with StreamingWriter(path, image.shape, affine, template=image, inputs=inputs, overwrite=overwrite,
                             provenance=provenance) as writer:
            background = BackgroundWriter(writer)
            try:
                for t in progress_bar(range(n_volumes), total=n_volumes, desc=image_stem(image.path),
                                      enabled=progress, unit="vol"):
                    background.put(correct(finite_volume(image, source.volume(t), t)))
            finally:
                background.close()
        return n_volumes
    corrected = correct(finite_volume(image, source.volume(0), 0))
    if len(image.file_shape) == 4:  # a one-volume run stays a 4D file, as it came
        corrected = corrected[..., None]
    save_image(path, corrected, affine, template=image, inputs=inputs, overwrite=overwrite, provenance=provenance)
    return 1
