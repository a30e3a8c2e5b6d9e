"""The field map placed where the head is, through the plain command lines (the acceptance case).

A head pitched 3 degrees and moved 4 mm anterior and 3 mm superior between the field map and the
run (k-space EPI simulation, fieldfix.simulate.epi, with a gradient-echo magnitude of another
contrast for the field map; tests/_align_data.py). The field-map folder is made by `fieldfix
fieldmap` (a ready map in Hz with its magnitude), and the run is corrected by the plain `fieldfix
unwarp RUN --b0 fmap/b0_hz.nii.gz`: the correction must leave about the error that the exactly
placed field leaves, where the shift gradient is modest, far less than the scanner coordinates
alone.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

import _align_data as data
from fieldfix.align import align_field_to_run
from fieldfix.shift import shift_vox_from_field
from fieldfix.unwarp import unwarp_volume
from fieldfix_cli.main import main

RUN_SHAPE, ESP = data.MOVED_RUN[0], 5e-4
MOVE_MM, MOVE_DEG = data.MOVE_MM, data.MOVE_DEG
#: The run's sidecar as a scanner's BIDS conversion writes it (the simulated echo time is 30 ms).
SIDECAR = {"PhaseEncodingDirection": "j-", "EffectiveEchoSpacing": ESP, "RepetitionTime": 2.0, "EchoTime": 0.03}
#: The allowance of the acceptance case: the command may leave 0.40 of the uncorrected error where the
#: exactly placed field leaves 0.37 (the figures of the issue that asked for the alignment).
ALLOWANCE = 0.40 / 0.37


@pytest.fixture(scope="module")
def scan(tmp_path_factory):
    folder = tmp_path_factory.mktemp("moved")
    scan = data.moved_head_scan(ESP)
    run, run_affine, fm_affine = scan["run"], scan["run_affine"], scan["fm_affine"]
    magnitude, b0_hz = scan["magnitude"], scan["b0_hz"]
    nib.save(nib.Nifti1Image(np.stack([run.epi, run.epi], -1).astype(np.float32), run_affine),
             folder / "sub-01_task-rest_bold.nii.gz")
    (folder / "sub-01_task-rest_bold.json").write_text(json.dumps(SIDECAR))
    nib.save(nib.Nifti1Image(b0_hz.astype(np.float32), fm_affine), folder / "map_hz.nii.gz")
    nib.save(nib.Nifti1Image(magnitude.astype(np.float32), fm_affine), folder / "map_magnitude.nii.gz")
    return dict(scan, folder=folder)


def _fieldmap_folder(folder):
    """The field-map folder as `fieldfix fieldmap` leaves it (a ready map in Hz with its magnitude), made once."""
    if not (folder / "fmap" / "b0_hz.nii.gz").exists():
        assert main(["fieldmap", "--b0", str(folder / "map_hz.nii.gz"), "--b0-units", "hz", "--magnitude",
                     str(folder / "map_magnitude.nii.gz"), "--smooth", "0mm", "--out", str(folder / "fmap"),
                     "--quiet"]) == 0


def _ratio(scan, corrected):
    """RMS error left (against the same acquisition without any field) over the uncorrected error,
    in head voxels where the true shift gradient is modest (|d shift / d y| < 0.3)."""
    run, still = scan["run"], scan["still"]
    true_shift = shift_vox_from_field(run.field_run_hz, "j-", ESP)
    modest = (np.abs(np.gradient(true_shift, axis=1)) < 0.3) & (run.truth > 0.1)
    return np.sqrt(np.mean((corrected - still.epi)[modest] ** 2)) / np.sqrt(np.mean((run.epi - still.epi)[modest] ** 2))


def _placed(scan, matrix):
    b0_run, _ = align_field_to_run(scan["b0_hz"], scan["fm_affine"], RUN_SHAPE, scan["run_affine"], matrix)
    return unwarp_volume(scan["run"].epi, shift_vox_from_field(b0_run, "j-", ESP), 1, interp="cubic")


@pytest.mark.slow
def test_plain_unwarp_puts_the_field_where_the_head_is(scan):
    folder = scan["folder"]
    _fieldmap_folder(folder)
    assert main(["unwarp", str(folder / "sub-01_task-rest_bold.nii.gz"), "--b0", str(folder / "fmap" / "b0_hz.nii.gz"),
                 "--out", str(folder / "out"), "--no-report", "--quiet"]) == 0
    corrected = nib.load(folder / "out" / "sub-01_task-rest_bold_corrected.nii.gz").get_fdata()[..., 0]
    summary = json.loads((folder / "out" / "sub-01_task-rest_bold_unwarp.json").read_text())
    assert summary["field_placement"].startswith("aligned")
    alignment = summary["alignment"]
    assert alignment["signal_model"].startswith("magnitude times the signal kept at TE 30 ms")
    assert np.max(np.abs(np.subtract(alignment["translation_mm"], MOVE_MM))) < 0.5
    assert np.max(np.abs(np.subtract(alignment["rotation_deg"], MOVE_DEG))) < 0.5
    assert alignment["measure_after"] > alignment["measure_before"]
    achieved = _ratio(scan, corrected)
    exact = _ratio(scan, _placed(scan, scan["pose"]))
    affines_only = _ratio(scan, _placed(scan, np.eye(4)))
    # This phantom keeps k-space ringing that no unwarping removes, so even the exact placement leaves a
    # larger share than a scanner's image would; the command must come within the allowance of it (most
    # of the gap is the field-map job's masked map continued outside the brain, not the pose: measured
    # 0.765 for the command given the exact pose), and beat the affines alone.
    assert achieved <= exact * ALLOWANCE, (achieved, exact)
    assert affines_only - achieved > 0.3, (affines_only, achieved)


@pytest.mark.slow
def test_without_an_echo_time_the_magnitude_alone_is_aligned_and_the_option_gives_one(tmp_path, scan):
    folder = scan["folder"]
    _fieldmap_folder(folder)
    run = tmp_path / "sub-01_task-rest_bold.nii.gz"
    run.symlink_to(folder / "sub-01_task-rest_bold.nii.gz")
    run.with_name("sub-01_task-rest_bold.json").write_text(json.dumps(
        {key: value for key, value in SIDECAR.items() if key != "EchoTime"}))
    exact = _ratio(scan, _placed(scan, scan["pose"]))
    for name, extra, model in (("alone", [], "magnitude alone (no echo time given"),
                               ("given", ["--te", "30ms"], "magnitude times the signal kept at TE 30 ms")):
        assert main(["unwarp", str(run), "--b0", str(folder / "fmap" / "b0_hz.nii.gz"), *extra, "--out",
                     str(tmp_path / name), "--no-report", "--quiet"]) == 0
        summary = json.loads((tmp_path / name / "sub-01_task-rest_bold_unwarp.json").read_text())
        alignment = summary["alignment"]
        assert alignment["signal_model"].startswith(model), name
        assert summary["field_placement"].startswith("aligned"), name
        assert np.max(np.abs(np.subtract(alignment["translation_mm"], MOVE_MM))) < 0.5, name
        assert np.max(np.abs(np.subtract(alignment["rotation_deg"], MOVE_DEG))) < 0.5, name
        corrected = nib.load(tmp_path / name / "sub-01_task-rest_bold_corrected.nii.gz").get_fdata()[..., 0]
        assert _ratio(scan, corrected) <= exact * ALLOWANCE, name


@pytest.mark.slow
def test_alignment_off_uses_the_scanner_coordinates_and_says_so(scan):
    folder = scan["folder"]
    _fieldmap_folder(folder)
    assert main(["unwarp", str(folder / "sub-01_task-rest_bold.nii.gz"), "--b0", str(folder / "fmap" / "b0_hz.nii.gz"),
                 "--no-align", "--out", str(folder / "plain"), "--no-report", "--quiet"]) == 0
    summary = json.loads((folder / "plain" / "sub-01_task-rest_bold_unwarp.json").read_text())
    assert summary["field_placement"] == "affines only (alignment turned off)" and summary["alignment"] is None


@pytest.mark.slow
def test_motion_through_the_run_is_followed_and_tabled(tmp_path, scan):
    """Three volumes; the second moved 1.5 mm right, the third turned 1.5 degrees about z (k-space EPI)."""
    run_affine = scan["run_affine"]
    centre = run_affine[:3, :3] @ ((np.array(RUN_SHAPE) - 1) / 2) + run_affine[:3, 3]
    moves = [((0.0, 0.0, 0.0), (0.0, 0.0, 0.0)), ((1.5, 0.0, 0.0), (0.0, 0.0, 0.0)),
             ((0.0, 0.0, 0.0), (0.0, 0.0, 1.5))]
    volumes = [data.acquire_epi(RUN_SHAPE, run_affine, data.pose(t, r, centre) @ scan["pose"], echo_spacing_s=ESP,
                                noise_sd=0.005, seed=k).epi for k, (t, r) in enumerate(moves)]
    run = tmp_path / "sub-01_task-moving_bold.nii.gz"
    nib.save(nib.Nifti1Image(np.stack(volumes, -1).astype(np.float32), run_affine), str(run))
    run.with_name("sub-01_task-moving_bold.json").write_text(json.dumps(SIDECAR))
    folder = scan["folder"]
    _fieldmap_folder(folder)
    assert main(["unwarp", str(run), "--b0", str(folder / "fmap" / "b0_hz.nii.gz"), "--motion", "--out",
                 str(tmp_path / "out"), "--no-report", "--quiet"]) == 0
    table = (tmp_path / "out" / "sub-01_task-moving_bold_motion.tsv").read_text().splitlines()
    header = table[0].split("\t")
    assert header[1:7] == ["shift_x_mm", "shift_y_mm", "shift_z_mm", "turn_x_deg", "turn_y_deg", "turn_z_deg"]
    rows = np.array([[float(v) for v in line.split("\t")] for line in table[1:]])
    assert rows.shape == (3, 8)
    np.testing.assert_allclose(rows[0, 1:7], 0.0, atol=1e-6)
    assert abs(rows[1, 1] - 1.5) < 0.3 and abs(rows[2, 6] - 1.5) < 0.3  # moves recovered, world mm / degrees
    assert rows[1, 7] > 1.0  # framewise displacement (Power et al. 2012) sees the step
    summary = json.loads((tmp_path / "out" / "sub-01_task-moving_bold_unwarp.json").read_text())
    assert summary["motion"]["volumes"] == 3 and summary["outputs"]["motion"].endswith("_motion.tsv")
    corrected = nib.load(tmp_path / "out" / "sub-01_task-moving_bold_corrected.nii.gz").get_fdata()
    head = scan["run"].truth > 0.1
    # the corrected volumes are back where the first is: they agree better than the moved inputs did (the
    # rest is cubic resampling of this phantom's sharp edges and its k-space ringing; measured 0.63)
    moved = np.sqrt(np.mean((volumes[1] - volumes[0])[head] ** 2))
    back = np.sqrt(np.mean((corrected[..., 1] - corrected[..., 0])[head] ** 2))
    assert back < 0.75 * moved, (back, moved)


@pytest.mark.slow
def test_dropout_maps_on_the_run_grid_follow_the_head(scan):
    """dropout --like: the maps resampled onto the EPI grid are placed on the run's anatomy."""
    folder = scan["folder"]
    _fieldmap_folder(folder)
    assert main(["dropout", "--b0", str(folder / "fmap" / "b0_hz.nii.gz"), "--te", "30ms", "--thickness", "3.5mm",
                 "--like", str(folder / "sub-01_task-rest_bold.nii.gz"), "--out", str(folder / "drop"),
                 "--quiet"]) == 0
    summary = json.loads((folder / "drop" / "dropout.json").read_text())
    assert summary["epi_placement"].startswith("aligned")
    on_epi = nib.load(folder / "drop" / "retention_on_epi.nii.gz")
    retention = nib.load(folder / "drop" / "retention.nii.gz")
    # the map on the EPI grid equals the field-map-grid map moved by the head's pose (world mm)
    expected, _ = align_field_to_run(retention.get_fdata(), retention.affine, RUN_SHAPE, scan["run_affine"],
                                     scan["pose"], order=1)
    head = scan["run"].truth > 0.1
    assert np.median(np.abs(on_epi.get_fdata() - expected)[head]) < 0.02
