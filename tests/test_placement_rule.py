"""When the field map is aligned to a run and when the scanner coordinates place it.

The phantom of tests/_align_data.py (k-space EPI of an invented head, a gradient-echo magnitude of
another contrast for the field map): a head that did not move between the scans keeps the scanner
coordinates, because its alignment cannot raise the match by more than the rule's margin; a head
pitched 0.7 degrees and moved 1.1 mm is aligned, and its field follows the head.
"""

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import _align_data as data
from fieldfix.align import align_field_to_run
from fieldfix.io import Image
from fieldfix.shift import Readout
from fieldfix.workflows._placement import MIN_MATCH_GAIN, place_field

RUN_SHAPE = data.MOVED_RUN[0]
RUN_AFFINE = data.grid_affine(*data.MOVED_RUN)
MAP_AFFINE = data.grid_affine(*data.MOVED_FIELDMAP)
CENTRE = RUN_AFFINE[:3, :3] @ ((np.array(RUN_SHAPE) - 1) / 2.0) + RUN_AFFINE[:3, 3]


def _place(move):
    magnitude, b0_hz = data.fieldmap(data.MOVED_FIELDMAP[0], MAP_AFFINE)
    b0 = Image(Path("map_hz.nii.gz"), nib.Nifti1Image(b0_hz.astype(np.float32), MAP_AFFINE), {})
    acquisition = data.acquire_epi(RUN_SHAPE, RUN_AFFINE, move, noise_sd=0.005)
    run = Image(Path("run_bold.nii.gz"), nib.Nifti1Image(acquisition.epi.astype(np.float32), RUN_AFFINE),
                {"EchoTime": 0.03})
    placement = place_field(run, acquisition.epi, Readout("j-", 5e-4), b0, b0_hz, magnitude,
                            Path("map_magnitude.nii.gz"), True)
    return placement, b0_hz, acquisition


@pytest.mark.slow
def test_a_head_that_did_not_move_keeps_the_scanner_coordinates():
    placement, b0_hz, _ = _place(np.eye(4))
    record = placement.alignment
    assert record.measure_after - record.measure_before <= MIN_MATCH_GAIN
    assert placement.how.startswith("affines only: aligning map_magnitude.nii.gz did not improve the match")
    assert np.array_equal(placement.matrix, np.eye(4))
    scanner, _ = align_field_to_run(b0_hz, MAP_AFFINE, RUN_SHAPE, RUN_AFFINE, np.eye(4), order=1)
    assert np.allclose(placement.field_hz, scanner)


@pytest.mark.slow
def test_a_head_moved_by_a_millimetre_is_aligned_and_its_field_follows():
    move = data.pose((0.0, 1.0, 0.5), (0.7, 0.0, 0.0), CENTRE)
    placement, b0_hz, acquisition = _place(move)
    record = placement.alignment
    assert placement.how == "aligned to the run (map_magnitude.nii.gz)"
    assert record.measure_after - record.measure_before > MIN_MATCH_GAIN
    assert np.max(np.abs(np.subtract(record.translation_mm, (0.0, 1.0, 0.5)))) < 0.3
    assert abs(record.rotation_deg[0] - 0.7) < 0.35
    head = acquisition.truth > 0.1
    placed_error = np.abs(placement.field_hz - acquisition.field_run_hz)[head]
    scanner, _ = align_field_to_run(b0_hz, MAP_AFFINE, RUN_SHAPE, RUN_AFFINE, np.eye(4), order=1)
    scanner_error = np.abs(scanner - acquisition.field_run_hz)[head]
    assert np.percentile(placed_error, 90) < 0.6 * np.percentile(scanner_error, 90)
