"""Joint restoration of runs acquired with opposite phase-encode polarity (an unwarping option).

Where one polarity compresses signal into a few voxels, the other stretches it; a least-squares
restoration over both (:func:`fieldfix.pairs.restore_jointly`, after Andersson, Skare and
Ashburner 2003, NeuroImage) recovers what neither unwarped run can on its own. The runs are
read volume by volume side by side and the combined run is streamed to disk, so memory stays at
a few volumes.
"""

from __future__ import annotations

from .._progress import progress_bar
from ..errors import GeometryError, InputError
from ..geometry import parse_pe_code, same_grid
from ..io import Provenance, StreamingWriter, image_stem, save_image
from ..jsonfile import write_json
from ..outputs import CombinedFiles, CombinedSummary, JobOptions
from ..pairs import RESTORE_PENALTY, PhaseEncoding, restore_jointly
from ._run_checks import finite_volume
from ._stream import BackgroundWriter, sequential

__all__ = ["check_combinable", "write_combined_run", "COMBINE_METHOD", "COMBINE_PENALTY"]

#: Smoothness penalty of the restoration: dimensionless, relative to the data term (the library default).
COMBINE_PENALTY = RESTORE_PENALTY
COMBINE_METHOD = ("least squares over both polarities of one undistorted image (a cubic B-spline) whose band-limited "
                  "distortions match the runs, each sample weighted by its squared Jacobian, folded samples left out "
                  "(after Andersson, Skare and Ashburner 2003, NeuroImage)")


def check_combinable(plans) -> None:
    """Refuse runs that cannot be restored jointly: not two, not opposite, other grids or lengths."""
    if len(plans) != 2:
        raise InputError(f"joint restoration takes exactly two runs of opposite polarity, got {len(plans)}",
                         parameter="combine_polarities")
    first, second = plans
    (axis_a, sign_a), (axis_b, sign_b) = parse_pe_code(first.pe_code), parse_pe_code(second.pe_code)
    if axis_a != axis_b or sign_a == sign_b:
        raise GeometryError(f"joint restoration needs opposite codes on one axis; {first.image.path.name} is "
                            f"{first.pe_code} and this run is {second.pe_code}", second.image.path)
    if not same_grid(first.image.shape[:3], first.image.affine, second.image.shape[:3], second.image.affine):
        raise GeometryError(f"joint restoration needs both runs on one grid; this run's grid differs from "
                            f"{first.image.path.name}'s", second.image.path)
    if first.image.n_volumes != second.image.n_volumes:
        raise GeometryError(f"joint restoration needs runs of equal length; this run has {second.image.n_volumes} "
                            f"volumes, {first.image.path.name} {first.image.n_volumes}", second.image.path)


def write_combined_run(plans, job: JobOptions, inputs, provenance: Provenance) -> CombinedSummary:
    """Restore every volume pair jointly and write the combined run and its summary."""
    first, second = plans
    files = CombinedFiles.named(image_stem(first.image.path), job.tag)
    encodings = [PhaseEncoding(p.pe_code, p.timing.echo_spacing_s, p.timing.n_pe_lines) for p in plans]
    field_hz = first.field_hz  # both runs share the grid, so the resampled field is the same

    def combine(a, b):
        return restore_jointly([a, b], encodings, field_hz, penalty=COMBINE_PENALTY)

    image, path = first.image, job.path(files.corrected)
    sources = [sequential(p.image) for p in plans]
    n_volumes = image.n_volumes
    if image.ndim == 4:
        with StreamingWriter(path, image.shape, image.affine, template=image, inputs=inputs,
                             overwrite=job.overwrite, provenance=provenance) as writer:
            background = BackgroundWriter(writer)
            try:
                for t in progress_bar(range(n_volumes), total=n_volumes, desc="combined", enabled=job.progress,
                                      unit="vol"):
                    a, b = (finite_volume(p.image, s.volume(t), t) for p, s in zip(plans, sources))
                    background.put(combine(a, b))
            finally:
                background.close()
    else:
        a, b = (finite_volume(p.image, s.volume(0), 0) for p, s in zip(plans, sources))
        volume = combine(a, b)
        save_image(path, volume[..., None] if len(image.file_shape) == 4 else volume, image.affine, template=image,
                   inputs=inputs, overwrite=job.overwrite, provenance=provenance)
    summary = CombinedSummary(runs=[str(p.image.path) for p in plans], pe_codes=[p.pe_code for p in plans],
                              n_volumes=int(n_volumes), penalty=COMBINE_PENALTY, method=COMBINE_METHOD,
                              outputs=files)
    write_json(job.path(files.summary), summary.to_json(), inputs=inputs, overwrite=job.overwrite)
    return summary

