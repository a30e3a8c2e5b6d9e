"""The signal an EPI keeps under the field, and the alignment that compares it with the field-map magnitude."""

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import _align_data as data
from fieldfix.align import align_fieldmap
from fieldfix.dropout import epi_signal_fraction, frame_from_affine
from fieldfix.io import Image
from fieldfix.shift import Readout
from fieldfix.workflows._placement import expected_epi_signal

SHAPE = (12, 12, 10)
AFFINE = np.diag([2.0, 2.0, 3.0, 1.0])


def _slice_ramp(hz_per_mm: float) -> np.ndarray:
    """A field rising linearly across the slices (k, 3 mm voxels): hz_per_mm along world z."""
    return hz_per_mm * 3.0 * np.indices(SHAPE, dtype=float)[2]


def _image(values: np.ndarray, sidecar: dict, affine=AFFINE) -> Image:
    return Image(Path("run_bold.nii.gz"), nib.Nifti1Image(values.astype(np.float32), affine), sidecar)


def test_signal_fraction_follows_the_sinc_law_of_a_rectangular_slice():
    # Through-plane dephasing of a rectangular slice profile: |sinc(g * TE * thickness)| (the sinc law,
    # common practice, no source); with no in-plane gradient the echo stays at TE.
    frame = frame_from_affine(AFFINE, 2, 1, shape=SHAPE)
    for g in (2.0, 5.0, 9.0):
        kept = epi_signal_fraction(_slice_ramp(g), AFFINE, frame, te_s=0.03, thickness_mm=3.0, pe_sign=-1,
                                   echo_spacing_s=5e-4)
        assert kept[6, 6, 5] == pytest.approx(abs(np.sinc(g * 0.03 * 3.0)), abs=2e-3)


def test_signal_fraction_is_zero_where_the_echo_never_forms():
    # A field step of -40 Hz per voxel along j with j+ polarity: Q = -40 * 12 * 5e-3 = -2.4, 1 + Q < 0,
    # so the echo of those voxels never forms (Deichmann et al. 2002, NeuroImage 15:120-135).
    field_hz = -40.0 * np.indices(SHAPE, dtype=float)[1]
    frame = frame_from_affine(AFFINE, 2, 1, shape=SHAPE)
    kept = epi_signal_fraction(field_hz, AFFINE, frame, te_s=0.03, thickness_mm=3.0, pe_sign=1,
                               echo_spacing_s=5e-3)
    assert np.all(kept[:, 2:-2, :] == 0.0)
    flipped = epi_signal_fraction(field_hz, AFFINE, frame, te_s=0.03, thickness_mm=3.0, pe_sign=-1,
                                  echo_spacing_s=5e-3)
    # the other polarity: Q = +2.4, the echo forms early (TE / 3.4 = 8.8 ms), still inside the window that
    # starts at TE - 6 lines * 5 ms = 0; with no slice gradient nothing is lost
    assert np.allclose(flipped[:, 2:-2, :], 1.0)


def test_expected_signal_uses_the_runs_own_echo_time_and_slices():
    magnitude = np.ones(SHAPE)
    field = _slice_ramp(5.0)
    readout, b0 = Readout("j-", 5e-4), _image(field, {})
    short, words = expected_epi_signal(_image(magnitude, {"EchoTime": 0.02}), readout, b0, field, magnitude)
    long, _ = expected_epi_signal(_image(magnitude, {"EchoTime": 0.04}), readout, b0, field, magnitude)
    # longer echo times lose more to the same through-plane gradient (common practice, no source)
    assert long[6, 6, 5] < short[6, 6, 5] < 1.0
    assert short[6, 6, 5] == pytest.approx(abs(np.sinc(5.0 * 0.02 * 3.0)), abs=2e-3)
    assert "TE 20 ms" in words and "3 mm slices along k" in words
    thin, _ = expected_epi_signal(_image(magnitude, {"EchoTime": 0.04, "SliceThickness": 1.5}), readout, b0, field,
                                  magnitude)
    # thinner slices lose less signal to through-plane gradients (common practice, no source)
    assert thin[6, 6, 5] > long[6, 6, 5]


def test_expected_signal_without_an_echo_time_is_the_magnitude_and_says_so():
    magnitude = np.arange(np.prod(SHAPE), dtype=float).reshape(SHAPE)
    field = _slice_ramp(5.0)
    same, words = expected_epi_signal(_image(magnitude, {}), Readout("j-", 5e-4), _image(field, {}), field, magnitude)
    assert same is magnitude and "no usable EchoTime" in words


def test_zero_background_of_a_scanner_map_does_not_read_as_dropout():
    # A map that is 0 outside its mask: the step at the mask's edge is no field gradient.
    magnitude = np.ones(SHAPE)
    field = np.zeros(SHAPE)
    field[2:-2, 2:-2, 2:-2] = 80.0
    kept, _ = expected_epi_signal(_image(magnitude, {"EchoTime": 0.03}), Readout("j-", 5e-4), _image(field, {}),
                                  field, magnitude)
    assert np.allclose(kept, 1.0)


@pytest.mark.slow
def test_weighted_alignment_still_recovers_a_known_move():
    # The acceptance case of tests/test_align.py (k-space EPI at TE 30 ms of a head pitched 3 deg,
    # moved 4 mm anterior and 3 mm superior), aligned as the unwarp command aligns it.
    scan = data.moved_head_scan(5e-4)
    run = _image(scan["run"].epi, {"EchoTime": 0.03}, scan["run_affine"])
    readout = Readout("j-", 5e-4)
    expected, _ = expected_epi_signal(run, readout, _image(scan["b0_hz"], {}, scan["fm_affine"]), scan["b0_hz"],
                                      scan["magnitude"])
    assert expected.max() < scan["magnitude"].max() * 1.0001 and (expected < scan["magnitude"]).any()
    result = align_fieldmap(expected, scan["b0_hz"], scan["fm_affine"], scan["run"].epi, scan["run_affine"], readout)
    assert np.max(np.abs(np.subtract(result.translation_mm, data.MOVE_MM))) < 0.2
    assert np.max(np.abs(np.subtract(result.rotation_deg, data.MOVE_DEG))) < 0.35
    assert result.measure_after > result.measure_before
