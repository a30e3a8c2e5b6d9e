"""Tests of the scenario generator: determinism, BIDS layout and sidecars, ground truth consistency."""

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from fieldfix import scenarios
from fieldfix.scenario_spec import parse_definition
from fieldfix.errors import InputError, OutputError, UnitError
from fieldfix.units import GAMMA_HZ_PER_T  # noqa: F401  (imported to check the constants module exists)

TINY = {
    "name": "tiny-test",
    "title": "tiny invented test scenario",
    "field_strength": "3T",
    "head": {"pitch": "5deg", "pitch_jitter": "3deg", "scale_jitter": 0.02},
    "model": {"voxel_size": "6mm"},
    "fieldmap": {"kind": "phasediff", "echo_times": ["4.92ms", "7.38ms"], "voxel_size": "8mm",
                 "shape": [22, 26, 26], "center": ["0mm", "0mm", "0mm"], "snr": 200, "t2star": "40ms"},
    "runs": [{"task": "rest", "voxel_size": "8mm", "shape": [20, 24, 8], "center": ["0mm", "0mm", "-10mm"],
              "phase_encoding_direction": "j-", "echo_spacing": "0.6ms", "echo_time": "30ms",
              "repetition_time": "2s", "volumes": 2, "noise": 0.01, "motion_translation": "0.5mm"}],
    "roi": {"name": "orbitofrontal", "center": ["0mm", "45mm", "-27mm"],
            "semi_axes": ["24mm", "20mm", "12mm"]},
}


def _arrays(root: Path) -> dict:
    return {str(p.relative_to(root)): np.asanyarray(nib.load(p).dataobj)
            for p in sorted(root.rglob("*.nii.gz"))}


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    root = tmp_path_factory.mktemp("scen") / "ds"
    scenarios.generate_scenario(TINY, root, seed=7)
    return root


def test_layout_and_sidecars(tiny):
    m = scenarios.load_manifest(tiny)
    assert m.scenario == "tiny-test" and m.seed == 7
    (entry,) = m.entries
    assert (tiny / "dataset_description.json").is_file()
    assert (tiny / "participants.tsv").read_text().startswith("participant_id")
    files = entry.fieldmap.files
    assert set(files) == {"phasediff", "magnitude1", "magnitude2"}
    pd_json = json.loads((tiny / files["phasediff"].replace(".nii.gz", ".json")).read_text())
    assert pd_json["EchoTime1"] == pytest.approx(0.00492) and pd_json["EchoTime2"] == pytest.approx(0.00738)
    (run,) = entry.runs
    # IntendedFor is relative to the subject folder and names the run that exists
    assert pd_json["IntendedFor"] == ["func/sub-01_task-rest_bold.nii.gz"]
    assert (tiny / "sub-01" / pd_json["IntendedFor"][0]).is_file()
    bold = tiny / run.bold
    side = json.loads(bold.with_name(bold.name.replace(".nii.gz", ".json")).read_text())
    assert side["PhaseEncodingDirection"] == "j-"
    # TotalReadoutTime = effective echo spacing x (PE lines - 1) (BIDS definition)
    assert side["TotalReadoutTime"] == pytest.approx(0.0006 * 23)
    assert side["RepetitionTime"] == 2.0
    img = nib.load(bold)
    assert img.shape == (20, 24, 8, 2)
    assert img.header.get_zooms()[3] == pytest.approx(2.0)
    for key in ("truth_b0_hz", "brain_mask", "undistorted", "roi_mask"):
        assert (tiny / getattr(run, key)).is_file(), key
    roi = np.asanyarray(nib.load(tiny / run.roi_mask).dataobj) > 0
    brain = np.asanyarray(nib.load(tiny / run.brain_mask).dataobj) > 0
    assert roi.any() and not (roi & ~brain).any()


def test_manifest_is_typed_and_a_renamed_key_is_refused(tiny, tmp_path):
    m = scenarios.load_manifest(tiny)
    assert m.entries[0].runs[0].roi_mask and m.entries[0].truth.roi_mask and m.roi_name == "orbitofrontal"
    data = json.loads((tiny / scenarios.TRUTH_DIR / "manifest.json").read_text())
    data["entries"][0]["runs"][0]["bold_image"] = data["entries"][0]["runs"][0].pop("bold")
    copy = tmp_path / scenarios.TRUTH_DIR / "manifest.json"
    copy.parent.mkdir(parents=True)
    copy.write_text(json.dumps(data))
    with pytest.raises(InputError, match="bold_image"):
        scenarios.load_manifest(tmp_path)
    with pytest.raises(InputError, match="no manifest"):
        scenarios.load_manifest(tmp_path / "elsewhere")


def test_deterministic_same_seed_same_arrays(tiny, tmp_path):
    again = scenarios.generate_scenario(TINY, tmp_path / "again", seed=7)
    a, b = _arrays(tiny), _arrays(again)
    assert a.keys() == b.keys() and len(a) >= 10
    for k in a:
        assert a[k].tobytes() == b[k].tobytes(), k
    other = scenarios.generate_scenario(TINY, tmp_path / "other", seed=8)
    c = _arrays(other)
    bold = "sub-01/func/sub-01_task-rest_bold.nii.gz"
    assert a[bold].tobytes() != c[bold].tobytes()


def test_phasediff_encodes_the_true_field(tiny):
    # The field follows from the phase gained between the two echo times (fact of the trade):
    # b0 = dphi / (2 pi dTE), valid where |b0| < 1 / (2 dTE) (no wrap).
    entry = scenarios.load_manifest(tiny).entries[0]
    dphi = nib.load(tiny / entry.fieldmap.files["phasediff"]).get_fdata()
    truth = nib.load(tiny / entry.truth.b0_hz).get_fdata()
    brain = nib.load(tiny / entry.truth.brain_mask).get_fdata() > 0
    dte = 0.00738 - 0.00492
    ok = brain & (np.abs(truth) < 0.4 / dte)
    est = dphi / (2 * np.pi * dte)
    assert ok.sum() > 100
    assert np.median(np.abs(est[ok] - truth[ok])) < 3.0


def test_epi_shows_distortion_relative_to_reference(tiny):
    run = scenarios.load_manifest(tiny).entries[0].runs[0]
    bold = nib.load(tiny / run.bold).get_fdata()[..., 0]
    ref = nib.load(tiny / run.undistorted).get_fdata()
    assert bold.shape == ref.shape
    # Same object: distortion moves signal without creating it, and through-slice dephasing
    # (dropout) only removes some, so the total is somewhat lower, never higher; not the same image.
    assert 0.7 < bold.sum() / ref.sum() < 1.02
    assert np.abs(bold - ref).max() > 0.2 * ref.max()


def test_multi_subject_sessions_and_batch_discovery(tmp_path):
    root = scenarios.generate_scenario(TINY | {"fieldmap": TINY["fieldmap"] | {"kind": "phase-pair"}},
                                       tmp_path / "multi", subjects=2, sessions=2, seed=1)
    m = scenarios.load_manifest(root)
    assert [(e.subject, e.session) for e in m.entries] == [("01", "1"), ("01", "2"), ("02", "1"), ("02", "2")]
    # the same subject keeps its head size; sessions differ in pitch (repositioning)
    assert m.entries[0].head_scale == m.entries[1].head_scale
    assert m.entries[0].pitch_deg != m.entries[1].pitch_deg
    p1 = json.loads((root / "sub-02/ses-2/fmap/sub-02_ses-2_phase1.json").read_text())
    assert p1["EchoTime"] == pytest.approx(0.00492)
    assert p1["IntendedFor"] == ["ses-2/func/sub-02_ses-2_task-rest_bold.nii.gz"]
    batch = pytest.importorskip("fieldfix.batch")
    inv = batch.discover(root)
    kinds = sorted(f.kind for f in inv.fieldmaps)
    assert kinds == ["phase-pair"] * 4
    assert all(len(f.targets) == 1 and not f.problems for f in inv.fieldmaps)


def test_definition_errors(tmp_path):
    with pytest.raises(UnitError):
        scenarios.load_definition(TINY | {"field_strength": "3"})
    bad = json.loads(json.dumps(TINY))
    bad["fieldmap"]["echo_times"] = ["7ms", "5ms"]
    with pytest.raises(InputError, match="increasing"):
        scenarios.load_definition(bad)
    bad = json.loads(json.dumps(TINY))
    bad["fieldmap"]["kind"] = "spin-echo"
    with pytest.raises(InputError, match="kind"):
        scenarios.load_definition(bad)
    with pytest.raises(InputError, match="no scenario named"):
        scenarios.scenario_path("no-such-scenario")
    f = tmp_path / "broken.json"
    f.write_text("{not json")
    with pytest.raises(InputError) as err:
        scenarios.load_definition(f)
    assert str(f) in str(err.value)


def test_refuses_non_empty_folder(tmp_path):
    (tmp_path / "x").mkdir()
    (tmp_path / "x" / "keep.txt").write_text("mine")
    with pytest.raises(OutputError):
        scenarios.generate_scenario(TINY, tmp_path / "x")
    assert (tmp_path / "x" / "keep.txt").read_text() == "mine"


def test_sample_scenarios_are_valid():
    names = scenarios.list_scenarios()
    assert len(names) >= 2
    for name in names:
        d = scenarios.load_definition(name)
        folder = scenarios.scenario_path(name).parent
        readme = (folder / "README.md").read_text()
        assert "invented" in readme.lower()
        assert parse_definition(d).runs, name


def test_field_map_workflow_recovers_modelled_field_through_wraps(tmp_path):
    # 7 T, echoes 2 ms apart: brain fields beyond +-250 Hz wrap in the phase difference; the field-map
    # workflow (phase pair -> unwrap -> Hz) must recover the modelled field there too.
    from fieldfix.io import load_image
    from fieldfix.workflows.fieldmap import run_fieldmap

    d = json.loads(json.dumps(TINY))
    d.update({"field_strength": "7T", "head": {"pitch": "10deg"}})
    d["model"]["voxel_size"] = "4mm"
    d["fieldmap"].update({"kind": "phase-pair", "echo_times": ["4ms", "6ms"], "voxel_size": "5mm",
                          "shape": [34, 42, 42], "snr": 100})
    root = scenarios.generate_scenario(d, tmp_path / "ds")
    e = scenarios.load_manifest(root).entries[0]
    f = {k: root / v for k, v in e.fieldmap.files.items()}
    truth = load_image(root / e.truth.b0_hz).get_fdata()
    brain = load_image(root / e.truth.brain_mask).get_fdata() > 0
    wrapped = brain & (np.abs(truth) > 250.0)
    assert wrapped.sum() >= 20
    run_fieldmap(tmp_path / "fm", phase=[f["phase1"], f["phase2"]], magnitude=[f["magnitude1"], f["magnitude2"]],
                 smooth_mm=0.0, reject_outliers=False)
    est = load_image(tmp_path / "fm" / "b0_hz.nii.gz").get_fdata()
    err = np.abs(est - truth)
    assert np.median(err[brain]) < 3.0
    assert np.median(err[wrapped]) < 5.0
    assert np.percentile(err[wrapped], 90) < 10.0
