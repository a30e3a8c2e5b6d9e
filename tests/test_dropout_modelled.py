"""The dropout job without a field map: the field modelled as the planner models it.

Outside checks: signal loss in the brain next to the frontal sinus and ethmoid air cells at 3 T is
a fact of the trade (orbitofrontal dropout, e.g. Ojemann et al. 1997, NeuroImage; from memory);
the modelled field itself is checked against the library's own label-image route and against
``dropout --b0`` on the field file the planner writes (the same numbers, exactly).
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage
from scipy.constants import physical_constants

from fieldfix.errors import InputError
from fieldfix.plan_field import ModelledField, field_from_label_image, modelled_field
from fieldfix.susceptibility import HEAD_LABEL_SUSCEPTIBILITY_PPM, HEAD_LABELS, head_model
from fieldfix_cli.main import main as cli_main

PROTOCOL = ["--te", "30ms", "--thickness", "3mm", "--phase-encoding", "j", "--echo-spacing", "0.5ms"]
MODEL = ["--field-strength", "3T", "--pitch", "10deg"]


def _data(path):
    return np.asarray(nib.load(str(path)).dataobj)


def test_dropout_without_b0_loses_signal_by_the_sinuses_and_matches_the_planners_field(tmp_path, capsys):
    out = tmp_path / "drop"
    assert cli_main(["dropout", *PROTOCOL, *MODEL, "--out", str(out), "--json", "--quiet"]) == 0
    printed = json.loads(capsys.readouterr().out)
    summary = json.loads((out / "dropout.json").read_text())
    assert printed["field_source"] == summary["field_source"] == "modelled"
    assert summary["b0"] == printed["b0"] == "modelled: built-in head, 3 T, pitch 10 deg"
    assert summary["mask"] == "brain of the head model" and summary["b0_units"] == "Hz (modelled)"
    assert json.loads((out / "modelled_b0_hz.json").read_text())["Description"] == summary["b0"]

    model = modelled_field(ModelledField(field_strength_t=3.0, pitch_deg=10.0))
    assert np.array_equal(_data(out / "modelled_b0_hz.nii.gz"), model.b0_hz.astype(np.float32))
    assert summary["retention"]["voxels"] == int(model.brain_mask.sum())
    retention = _data(out / "retention.nii.gz")
    # brain within 12 mm of the frontal sinus or ethmoid cells, against the brain 30 mm inside its edge
    cavities = np.isin(model.labels, [HEAD_LABELS["frontal_sinus"], HEAD_LABELS["ethmoid_cells"]])
    voxel_mm = float(abs(model.affine[0, 0]))
    near = model.brain_mask & (ndimage.distance_transform_edt(~cavities, sampling=voxel_mm) <= 12.0)
    core = ndimage.distance_transform_edt(model.brain_mask, sampling=voxel_mm) >= 30.0
    assert near.sum() > 100 and core.sum() > 1000
    assert np.median(retention[near]) < 0.6 and np.mean(retention[near] < 0.5) > 0.3
    assert np.median(retention[core]) > 0.99 and retention[core].min() > 0.9

    # the planner's modelled field, given back as --b0 with the model's brain as mask: the same numbers
    roi = np.zeros(model.labels.shape, np.float32)
    i, j, k = np.argwhere(model.brain_mask).mean(axis=0).astype(int)
    roi[i - 2:i + 2, j - 2:j + 2, k - 2:k + 2] = 1.0
    nib.save(nib.Nifti1Image(roi, model.affine), str(tmp_path / "roi.nii.gz"))
    nib.save(nib.Nifti1Image(model.brain_mask.astype(np.float32), model.affine), str(tmp_path / "brain.nii.gz"))
    assert cli_main(["plan", "--roi", str(tmp_path / "roi.nii.gz"), "--te", "30ms", "--thickness", "3mm", *MODEL,
                     "--out", str(tmp_path / "plan"), "--quiet"]) == 0
    planned = tmp_path / "plan" / "plan_modelled_b0_hz.nii.gz"
    assert np.array_equal(_data(planned), _data(out / "modelled_b0_hz.nii.gz"))
    again = tmp_path / "again"
    assert cli_main(["dropout", "--b0", str(planned), *PROTOCOL, "--mask", str(tmp_path / "brain.nii.gz"),
                     "--out", str(again), "--quiet"]) == 0
    measured = json.loads((again / "dropout.json").read_text())
    assert measured["field_source"] == "measured" and not (again / "modelled_b0_hz.nii.gz").exists()
    for key in ("retention", "bold_sensitivity", "percent_echo_lost", "parameters", "frame", "pe_direction_world"):
        assert measured[key] == summary[key], key
    for name in ("retention.nii.gz", "bold_sensitivity.nii.gz"):
        assert np.array_equal(_data(again / name), _data(out / name)), name


def test_dropout_from_a_label_image_on_a_pilot_epi_grid(tmp_path, capsys):
    how = ModelledField(voxel_mm=6.0, shape=(30, 36, 36))
    hm = head_model(how.shape, how.voxel_mm)
    nib.save(nib.Nifti1Image(hm.labels.astype(np.float32), hm.affine), str(tmp_path / "labels.nii.gz"))
    epi_affine = np.diag([3.0, 3.0, 3.0, 1.0])
    epi_affine[:3, 3] = -(np.array([48, 60, 40]) - 1) / 2 * 3.0
    nib.save(nib.Nifti1Image(np.ones((48, 60, 40), np.float32), epi_affine), str(tmp_path / "pilot_bold.nii.gz"))
    (tmp_path / "pilot_bold.json").write_text(json.dumps({"PhaseEncodingDirection": "j-",
                                                          "EffectiveEchoSpacing": 0.0005}))
    table = ",".join(f"{k}={v}" for k, v in HEAD_LABEL_SUSCEPTIBILITY_PPM.items())
    out = tmp_path / "out"
    assert cli_main(["dropout", "--te", "30ms", "--thickness", "3mm", "--like", str(tmp_path / "pilot_bold.nii.gz"),
                     "--model-labels", str(tmp_path / "labels.nii.gz"), "--model-table", table, "--model-brain",
                     str(HEAD_LABELS["brain"]), "--out", str(out), "--json", "--quiet"]) == 0
    summary = json.loads((out / "dropout.json").read_text())
    assert summary["b0"] == "modelled: label image, 3 T, pitch 0 deg" and summary["field_source"] == "modelled"
    assert summary["epi_placement"].startswith("affines only: a modelled field")
    assert summary["parameters"]["pe_code"] == "j-" and summary["parameters"]["echo_spacing_s"] == 0.0005
    expected = field_from_label_image(hm.labels, hm.affine, HEAD_LABEL_SUSCEPTIBILITY_PPM, [HEAD_LABELS["brain"]], how)
    assert np.array_equal(_data(out / "modelled_b0_hz.nii.gz"), expected.b0_hz.astype(np.float32))
    assert nib.load(str(out / "retention.nii.gz")).shape == hm.labels.shape
    on_epi = _data(out / "retention_on_epi.nii.gz")
    assert on_epi.shape == (48, 60, 40) and 0.0 < on_epi.max() <= 1.0 + 1e-6
    assert (out / "bold_sensitivity_on_epi.nii.gz").is_file()
    # the report carries where the field came from, and its page says it
    from fieldfix.report import build_report

    page = build_report(out, tmp_path / "qc")
    entry = json.loads((tmp_path / "qc" / "report.json").read_text())["dropout"][0]
    assert entry["field_source"] == "modelled" and entry["mask"] == "brain of the head model"
    assert '<th scope="row">B0 field</th><td><span class="txt">modelled</span>' in page.read_text()


def test_field_strength_with_b0_reads_a_ppm_map(tmp_path, capsys):
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    i, j, k = np.meshgrid(*[np.linspace(-1, 1, 20)] * 3, indexing="ij")
    hz = 60.0 * np.exp(-3 * (i ** 2 + j ** 2 + (k - 0.3) ** 2)) + 5.0
    gamma_hz_per_t = physical_constants["proton gyromag. ratio over 2 pi"][0] * 1e6  # CODATA, MHz/T -> Hz/T
    nib.save(nib.Nifti1Image(hz.astype(np.float32), affine), str(tmp_path / "hz.nii.gz"))
    ppm = hz / (gamma_hz_per_t * 3.0) * 1e6
    nib.save(nib.Nifti1Image(ppm.astype(np.float32), affine), str(tmp_path / "ppm.nii.gz"))
    (tmp_path / "ppm.json").write_text(json.dumps({"Units": "ppm"}))
    common = ["--te", "30ms", "--thickness", "3mm", "--quiet"]
    assert cli_main(["dropout", "--b0", str(tmp_path / "hz.nii.gz"), *common, "--out", str(tmp_path / "a")]) == 0
    assert cli_main(["dropout", "--b0", str(tmp_path / "ppm.nii.gz"), "--field-strength", "3T", *common,
                     "--out", str(tmp_path / "b")]) == 0
    np.testing.assert_allclose(_data(tmp_path / "b" / "retention.nii.gz"), _data(tmp_path / "a" / "retention.nii.gz"),
                               atol=1e-5)
    capsys.readouterr()
    assert cli_main(["dropout", "--b0", str(tmp_path / "ppm.nii.gz"), *common, "--out", str(tmp_path / "c")]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1 and "ppm.nii.gz" in err[0] and "needs the field strength" in err[0], err


def test_library_refuses_a_model_beside_a_b0_map_and_map_settings_without_one(tmp_path):
    from fieldfix.workflows.dropout import run_dropout

    nib.save(nib.Nifti1Image(np.ones((8, 8, 8), np.float32), np.eye(4)), str(tmp_path / "b0.nii.gz"))
    with pytest.raises(InputError, match="not both"):
        run_dropout(tmp_path / "b0.nii.gz", tmp_path / "a", te_s=0.03, thickness_mm=3.0, model=ModelledField())
    with pytest.raises(InputError, match="none is given") as err:
        run_dropout(None, tmp_path / "b", te_s=0.03, thickness_mm=3.0, field_strength_t=7.0)
    assert err.value.parameter == "field_strength_t"
    assert not (tmp_path / "a").exists() and not (tmp_path / "b").exists()
