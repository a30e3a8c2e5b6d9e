"""Trustworthy on real data: units read as they are, plausible ranges, hints, one mask rule, raw datasets.

Each case here failed on an earlier main (silent nonsense with exit 0, or a false refusal); the
refusals run in-process through `fieldfix_cli.main.main` and check one line naming the file or
the option, exit status 2 and nothing written.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from fieldfix.errors import UnitError
from fieldfix.units import GAMMA_HZ_PER_T
from fieldfix_cli.main import main
from test_bad_input import (
    SHAPE,
    TE1_S,
    TE2_S,
    field_hz,
    grid_affine,
    head,
    make_b0,
    make_magnitude,
    make_phasediff,
    make_run,
    write_image,
)


def _refused(capsys, argv, *names):
    capsys.readouterr()  # what earlier calls of the test printed
    status = main([str(a) for a in argv])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1, err
    for name in names:
        assert str(name) in err[0], (name, err[0])
    return err[0]


# ----------------------------------------------------------------------------- B0 map units
def test_b0_units_from_the_sidecar_and_phase_images_refused(tmp_path, capsys):
    run = make_run(tmp_path)
    hz = field_hz()
    reference = tmp_path / "ref"
    assert main(["unwarp", str(run), "--b0", str(make_b0(tmp_path)), "--out", str(reference), "--no-report",
                 "--quiet"]) == 0
    expected = nib.load(reference / "sub-01_task-rest_bold_shift_vox.nii.gz").get_fdata()
    for name, values, sidecar in (("rads.nii.gz", hz * 2 * np.pi, {"Units": "rad/s"}),
                                  ("ppm.nii.gz", hz / (GAMMA_HZ_PER_T * 3e-6), {"Units": "ppm",
                                                                                   "MagneticFieldStrength": 3}),
                                  ("tesla.nii.gz", hz / GAMMA_HZ_PER_T, {"Units": "T"})):
        b0 = write_image(tmp_path / name, values, sidecar=sidecar)
        out = tmp_path / name.split(".")[0]
        assert main(["unwarp", str(run), "--b0", str(b0), "--out", str(out), "--no-report", "--quiet"]) == 0
        shift = nib.load(out / "sub-01_task-rest_bold_shift_vox.nii.gz").get_fdata()
        np.testing.assert_allclose(shift, expected, atol=1e-3, err_msg=name)
        assert json.loads((out / "sub-01_task-rest_bold_unwarp.json").read_text())["b0_units"].startswith(
            sidecar["Units"])
    phase = write_image(tmp_path / "phase.nii.gz", np.angle(np.exp(1j * hz * 0.01)), sidecar={"Units": "rad"})
    assert "phase image, not a field map" in _refused(capsys, ["unwarp", run, "--b0", phase, "--out",
                                                               tmp_path / "no"], phase)
    named = write_image(tmp_path / "sub-01_phasediff.nii.gz", hz * 0)
    _refused(capsys, ["unwarp", run, "--b0", named, "--out", tmp_path / "no"], named)
    ppm = write_image(tmp_path / "ppm_nofield.nii.gz", hz, sidecar={"Units": "ppm"})
    assert "field strength" in _refused(capsys, ["unwarp", run, "--b0", ppm, "--out", tmp_path / "no"], ppm)
    assert not (tmp_path / "no").exists()


# ----------------------------------------------------------------------------- phase units
def test_masked_phase_difference_is_read_by_the_field_it_implies(tmp_path, capsys):
    """Zero outside the head, -0.39..2.09 rad inside: covers under half a cycle, yet only radians
    give a field a scanner can produce (in degrees it would span under 3 Hz)."""
    dphi = np.where(head() > 0, -0.39 + 2.48 * (field_hz() / field_hz().max()), 0.0)
    pd = make_phasediff(tmp_path, values=dphi)
    mag = make_magnitude(tmp_path)
    assert main(["fieldmap", "--phase-diff", str(pd), "--magnitude", str(mag), "--smooth", "0mm", "--keep-outliers",
                 "--out", str(tmp_path / "o"), "--quiet"]) == 0
    summary = json.loads((tmp_path / "o" / "b0_summary.json").read_text())
    assert summary["phase_units"][0]["units"] == "rad" and "Hz" in summary["phase_units"][0]["how"]
    b0 = nib.load(tmp_path / "o" / "b0_hz.nii.gz").get_fdata()
    inside = nib.load(tmp_path / "o" / "b0_mask.nii.gz").get_fdata() > 0
    # field = phase / (2 pi dTE), the definition of a phase-difference field map (common practice, no source)
    np.testing.assert_allclose(b0[inside], dphi[inside] / (2 * np.pi * (TE2_S - TE1_S)), atol=0.5)


def test_given_phase_units_that_the_data_contradict_are_refused_with_both_readings(tmp_path, capsys):
    pd, mag = make_phasediff(tmp_path), make_magnitude(tmp_path)  # -pi..pi radians
    line = _refused(capsys, ["fieldmap", "--phase-diff", pd, "--magnitude", mag, "--phase-units", "deg", "--out",
                             tmp_path / "o"], pd)
    assert "phase units deg were given" in line and "read as rad they mean" in line
    side = make_phasediff(tmp_path / "side", sidecar={"EchoTime1": TE1_S, "EchoTime2": TE2_S, "Units": "deg"})
    line = _refused(capsys, ["fieldmap", "--phase-diff", side, "--magnitude", mag, "--out", tmp_path / "o"], side)
    assert "deg" in line and "rad" in line
    assert not (tmp_path / "o").exists()


def test_ppm_output_takes_the_field_strength_from_the_sidecar(tmp_path):
    pd = make_phasediff(tmp_path, sidecar={"EchoTime1": TE1_S, "EchoTime2": TE2_S, "MagneticFieldStrength": 3})
    mag = make_magnitude(tmp_path)
    assert main(["fieldmap", "--phase-diff", str(pd), "--magnitude", str(mag), "--also", "ppm", "--out",
                 str(tmp_path / "o"), "--quiet"]) == 0
    summary = json.loads((tmp_path / "o" / "b0_summary.json").read_text())
    assert summary["field_strength_t"] == 3 and (tmp_path / "o" / "b0_ppm.nii.gz").is_file()


# ----------------------------------------------------------------------------- plausible ranges
@pytest.mark.parametrize("option, text", [("--te", "30us"), ("--thickness", "3cm"), ("--tilt", "95deg"),
                                          ("--echo-spacing", "0.52us")])
def test_implausible_quantities_are_refused_quoting_what_was_typed(tmp_path, capsys, option, text):
    b0 = make_b0(tmp_path)
    argv = {"--te": "30ms", "--thickness": "3mm", "--tilt": "0deg"}
    argv[option] = text
    line = _refused(capsys, ["dropout", "--b0", b0, *[x for kv in argv.items() for x in kv], "--out",
                             tmp_path / "o"], option, text)
    assert "not plausible" in line and "expected" in line


def test_field_strength_range_and_the_library_guard(tmp_path, capsys):
    pd, mag = make_phasediff(tmp_path), make_magnitude(tmp_path)
    _refused(capsys, ["fieldmap", "--phase-diff", pd, "--magnitude", mag, "--field-strength", "30T", "--out",
                      tmp_path / "o"], "--field-strength", "30T")
    from fieldfix import shift_vox_from_field

    with pytest.raises(UnitError, match="echo_spacing_s.*not plausible"):
        shift_vox_from_field(np.zeros((4, 4, 4)), "j", echo_spacing_s=0.5)


@pytest.mark.parametrize("code, hint", [("-j", "write j-"), ("y", "did you mean j"), ("AP", "not anatomical")])
def test_phase_encode_near_misses_get_a_hint(tmp_path, capsys, code, hint):
    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    line = _refused(capsys, ["unwarp", run, "--b0", b0, "--phase-encoding", code, "--out", tmp_path / "o"])
    assert hint in line and "expected one of" in line


# ----------------------------------------------------------------------------- one mask rule
def test_dropout_statistics_use_the_field_maps_mask(tmp_path):
    """The extended field is non-zero everywhere: 'non-zero voxels' would mean the whole grid."""
    pd, mag = make_phasediff(tmp_path), make_magnitude(tmp_path)
    fm = tmp_path / "fm"
    assert main(["fieldmap", "--phase-diff", str(pd), "--magnitude", str(mag), "--out", str(fm), "--quiet"]) == 0
    out = tmp_path / "dr"
    assert main(["dropout", "--b0", str(fm / "b0_hz.nii.gz"), "--te", "30ms", "--thickness", "3mm", "--out",
                 str(out), "--quiet"]) == 0
    summary = json.loads((out / "dropout.json").read_text())
    mask = nib.load(fm / "b0_mask.nii.gz").get_fdata() > 0
    assert summary["retention"]["voxels"] == int(mask.sum()) < np.prod(SHAPE)
    assert "b0_mask.nii.gz" in summary["mask"] and "field map's mask" in summary["mask"]


def test_a_mask_that_is_not_binary_is_refused(tmp_path, capsys):
    b0 = make_b0(tmp_path)
    labels = write_image(tmp_path / "labels.nii.gz", np.round(head() / 1000 * 3), dtype=np.int16)
    line = _refused(capsys, ["dropout", "--b0", b0, "--te", "30ms", "--thickness", "3mm", "--mask", labels,
                             "--out", tmp_path / "o"], labels)
    assert "not a binary mask" in line


# ----------------------------------------------------------------------------- raw datasets
def test_outputs_are_refused_inside_a_raw_bids_dataset_but_not_in_its_derivatives(tmp_path, capsys):
    dataset = tmp_path / "study"
    (dataset / "sub-01" / "func").mkdir(parents=True)
    (dataset / "dataset_description.json").write_text(json.dumps({"Name": "x", "BIDSVersion": "1.9.0"}))
    run, b0 = make_run(dataset / "sub-01" / "func"), make_b0(tmp_path)
    line = _refused(capsys, ["unwarp", run, "--b0", b0, "--out", dataset / "sub-01" / "func", "--no-report"],
                    dataset / "sub-01" / "func")
    assert "raw BIDS dataset" in line and "derivatives" in line
    assert main(["unwarp", str(run), "--b0", str(b0), "--out", str(dataset / "derivatives" / "mine"), "--no-report",
                 "--quiet"]) == 0
    from fieldfix.outdir import raw_dataset_holding

    assert raw_dataset_holding(dataset / "code") == dataset.resolve()
    assert raw_dataset_holding(dataset / "derivatives" / "mine") is None
