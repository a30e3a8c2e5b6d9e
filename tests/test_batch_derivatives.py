"""What the batch hands a downstream pipeline, and the options and plans around it.

* Every derivative name is parsed here with the BIDS file-name rules, written out
  independently of fieldfix.batch.bids: entities ``key-label`` (labels of letters and
  digits) in the order of the BIDS entity table, a known suffix, a known extension, in the
  subject / session / datatype folder its entities name (BIDS specification 1.9, sections
  "File name structure", "Entity table" and "BIDS Derivatives"; Gorgolewski et al. 2016,
  Scientific Data 3:160044). Maps on the field map's grid carry ``space-``, every JSON file
  is a sidecar of an image or a job summary, the corrected series' sidecar carries the raw
  run's metadata forward.
* The dry run lists each EPI run without reading image data; processing options (command
  line or config file) redo exactly the tasks they affect; reversed phase-encode field maps
  are discovered, grouped and planned.
"""

from __future__ import annotations

import dataclasses
import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))

from _batch_dataset import dataset, pristine  # noqa: E402,F401 (fixtures)
from test_batch import fake_workflows  # noqa: E402,F401  (fixture)

from fieldfix import batch  # noqa: E402
from fieldfix.outputs import UnwarpSummary  # noqa: E402

EXE = Path(sys.executable).with_name("fieldfix")
#: The BIDS entity table's order (specification 1.9, from memory), written out apart from the library's.
ORDER = ["sub", "ses", "sample", "task", "tracksys", "acq", "nuc", "voi", "ce", "trc", "stain", "rec", "dir", "run",
         "mod", "echo", "flip", "inv", "mt", "part", "proc", "hemi", "space", "split", "recording", "chunk", "seg",
         "res", "den", "label", "desc"]
SUFFIXES = {"bold", "sbref", "dwi", "asl", "m0scan", "cbv", "fieldmap", "mask", "magnitude", "shift", "jacobian",
            "displacement", "retention", "boldsensitivity", "summary"}
NAME = re.compile(r"^(?P<entities>(?:[a-z]+-[a-zA-Z0-9]+_)+)(?P<suffix>[a-zA-Z0-9]+)(?P<ext>\.nii\.gz|\.json)$")


@pytest.fixture(scope="module")
def derivatives(pristine, tmp_path_factory):
    """sub-01 corrected with the real workflows, its runs with slice timing in the root sidecar."""
    root = tmp_path_factory.mktemp("real") / "study"
    shutil.copytree(pristine, root)
    sidecar = root / "task-rest_bold.json"
    sidecar.write_text(json.dumps(json.loads(sidecar.read_text()) | {"SliceTiming": [0.0, 1.0] * 6}))
    out = root / "derivatives" / "fieldfix"
    summary = batch.run_batch(root, out, participant_labels=["01"])
    assert summary.exit_status == 0, summary.failures
    return root, out


def _parse(name: str) -> tuple[list[tuple[str, str]], str, str]:
    match = NAME.match(name)
    assert match, f"{name} is not key-label_..._suffix.ext"
    entities = [tuple(part.split("-", 1)) for part in match["entities"].rstrip("_").split("_")]
    return entities, match["suffix"], match["ext"]


def _bids_files(out: Path) -> list[Path]:
    return sorted(p for p in out.rglob("*") if p.is_file() and not p.name.startswith(".")
                  and p.relative_to(out).parts[0].startswith("sub-"))


def test_every_derivative_name_follows_the_bids_rules(derivatives):
    _, out = derivatives
    files = _bids_files(out)
    assert len(files) > 30
    for path in files:
        entities, suffix, ext = _parse(path.name)
        keys = [k for k, _ in entities]
        assert keys == sorted(keys, key=ORDER.index), path.name  # unknown keys fail here too
        assert len(set(keys)) == len(keys) and keys[0] == "sub" and suffix in SUFFIXES, path.name
        folders = path.relative_to(out).parts[:-1]
        values = dict(entities)
        assert folders[0] == f"sub-{values['sub']}"
        assert ("ses" in values) == folders[1].startswith("ses-") and folders[-1] in ("fmap", "func"), path
        if ext == ".json" and suffix != "summary":
            assert path.with_suffix("").with_suffix(".nii.gz").name in {p.name for p in files} or \
                path.with_name(path.name[:-5] + ".nii.gz").is_file(), f"{path.name} is a sidecar without an image"
        if suffix == "summary":
            assert not path.with_name(path.name[:-5] + ".nii.gz").exists()
    # reports in a folder of our own naming, outside the BIDS subject folders
    assert (out / "inspection" / "sub-01" / "report.html").is_file()
    assert (out / ".bidsignore").read_text().split() == ["group/", "logs/", "inspection/"]


def test_maps_say_which_grid_they_are_on(derivatives):
    root, out = derivatives
    func = out / "sub-01/ses-1/func"
    run = nib.load(root / "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz")
    fmap = nib.load(root / "sub-01/ses-1/fmap/sub-01_ses-1_phasediff.nii.gz")
    for path in func.glob("*.nii.gz"):
        image = nib.load(path)
        entities, suffix, _ = _parse(path.name)
        if dict(entities).get("space") == "fieldmap":
            assert image.shape[:3] == fmap.shape and np.allclose(image.affine, fmap.affine)
            sidecar = json.loads(path.with_name(path.name[:-7] + ".json").read_text())
            assert sidecar["SpatialReference"] == "bids:raw:sub-01/ses-1/fmap/sub-01_ses-1_phasediff.nii.gz"
        else:
            assert image.shape[:3] == run.shape[:3] and np.allclose(image.affine, run.affine)
        # only the corrected series is named as the run's kind, and only it has the run's volumes
        assert (suffix == "bold") == (len(image.shape) == 4 and image.shape[3] == run.shape[3]), path.name


def test_the_corrected_series_sidecar_is_complete(derivatives):
    root, out = derivatives
    corrected = out / "sub-01/ses-2/func/sub-01_ses-2_task-rest_desc-corrected_bold.json"
    sidecar = json.loads(corrected.read_text())
    # copied forward from the raw run's (inherited) sidecars
    for key, value in {"RepetitionTime": 2.0, "TaskName": "rest", "EchoTime": 0.03, "PhaseEncodingDirection": "j-",
                       "TotalReadoutTime": 0.03, "SliceTiming": [0.0, 1.0] * 6}.items():
        assert sidecar[key] == value, key
    assert sidecar["Sources"] == ["bids:raw:sub-01/ses-2/func/sub-01_ses-2_task-rest_bold.nii.gz",
                                  "bids::sub-01/ses-2/fmap/sub-01_ses-2_desc-b0hz_fieldmap.nii.gz"]
    correction = sidecar["FieldfixCorrection"]
    summary = UnwarpSummary.read(corrected.with_name("sub-01_ses-2_task-rest_desc-boldunwarp_summary.json"))
    assert correction["MaxAbsShiftVoxels"] == summary.max_abs_shift_vox and correction["JacobianModulation"]
    # how the field map was placed on the run, with the transform when it was aligned
    assert correction["FieldMapPlacement"] == summary.field_placement
    if summary.alignment is not None:
        assert correction["FieldMapToRunTransform"]["Matrix"] == summary.alignment.matrix
        # the run's EchoTime (0.03 s, inherited) set the signal the magnitude was weighted by
        assert correction["FieldMapToRunTransform"]["SignalModel"] == summary.alignment.signal_model
        assert "TE 30 ms" in summary.alignment.signal_model
    assert "B0FieldSource" not in sidecar and "IntendedFor" not in sidecar  # needs no further correction
    # the summary names its outputs relative to its own folder, by their derivative names
    assert (corrected.parent / summary.outputs.corrected).is_file()
    displacement = json.loads((corrected.parent / "sub-01_ses-2_task-rest_desc-bold_displacement.json").read_text())
    assert displacement["Units"] == "mm" and "RAS" in displacement["VectorLayout"]
    assert "distorted run" in displacement["DisplacementConvention"]
    description = json.loads((out / "dataset_description.json").read_text())
    assert description["DatasetLinks"]["raw"] == root.resolve().as_uri()  # what bids:raw: refers to


def test_dry_run_lists_each_run_without_reading_images_and_writes_nothing(dataset, tmp_path):
    (dataset / "sub-03/func/sub-03_task-rest_bold.nii.gz").write_bytes(b"not an image at all")
    pd = dataset / "sub-01/ses-2/fmap/sub-01_ses-2_phasediff.json"
    pd.write_text(json.dumps({k: v for k, v in json.loads(pd.read_text()).items() if k != "EchoTime2"}))
    done = subprocess.run([str(EXE), "batch", str(dataset), "--out", str(tmp_path / "out"), "--dry-run", "--json"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    entries = {e["run"]: e for e in json.loads(done.stdout)}
    assert len(entries) == 5 and all(set(e) == {"run", "fieldmap", "action", "reason"} for e in entries.values())
    assert entries["sub-03/func/sub-03_task-rest_bold.nii.gz"]["action"] == "correct"
    assert entries["sub-03/func/sub-03_task-rest_bold.nii.gz"]["fieldmap"] == [
        "sub-03/fmap/sub-03_magnitude1.nii.gz", "sub-03/fmap/sub-03_magnitude2.nii.gz",
        "sub-03/fmap/sub-03_phasediff.nii.gz"]
    unusable = entries["sub-01/ses-2/func/sub-01_ses-2_task-rest_bold.nii.gz"]
    assert unusable["action"] == "skip" and "EchoTime2" in unusable["reason"]
    assert entries["sub-02/func/sub-02_task-motor_bold.nii.gz"] == {
        "run": "sub-02/func/sub-02_task-motor_bold.nii.gz", "fieldmap": [], "action": "skip",
        "reason": "no field map is intended for this run"}
    assert not (tmp_path / "out").exists()


def test_a_run_with_an_unusable_field_map_is_a_failure(dataset, tmp_path, fake_workflows):  # noqa: F811
    pd = dataset / "sub-01/ses-2/fmap/sub-01_ses-2_phasediff.json"
    pd.write_text(json.dumps({k: v for k, v in json.loads(pd.read_text()).items() if k != "EchoTime2"}))
    summary = batch.run_batch(dataset, tmp_path / "out", participant_labels=["01"], reports=False)
    assert summary.exit_status == 1
    run = next(r for r in summary.runs if "ses-2" in r.run)
    assert run.action == "failed" and "EchoTime2" in run.reason
    log = batch.BatchLog.read(tmp_path / "out" / summary.log)  # read strictly: every key named
    assert log.summary == summary  # the log holds the same typed record
    assert {t.task_id: t.status for t in log.tasks}["fieldmap:sub-01_ses-2"] == "failed"
    assert log.inventory["root"] == str(dataset.resolve()) and log.started <= log.finished


def test_magnitude2_alone_is_used_with_a_warning(dataset, tmp_path):
    for suffix in (".nii.gz", ".json"):
        (dataset / f"sub-01/ses-1/fmap/sub-01_ses-1_magnitude1{suffix}").unlink()
    summary = batch.run_batch(dataset, tmp_path / "out", participant_labels=["01"], reports=False)
    assert summary.exit_status == 0, summary.failures
    assert any("no magnitude1" in w and "magnitude2" in w for w in summary.warnings)
    sidecar = json.loads((tmp_path / "out/sub-01/ses-1/fmap/sub-01_ses-1_desc-b0_magnitude.json").read_text())
    assert sorted(Path(i["path"]).name for i in sidecar["Inputs"]) == ["sub-01_ses-1_magnitude2.nii.gz",
                                                                        "sub-01_ses-1_phasediff.nii.gz"]


def _statuses(out: Path, summary) -> dict[str, str]:
    return {t.task_id: t.status for t in batch.BatchLog.read(out / summary.log).tasks}


def test_options_from_the_command_line_or_a_config_redo_exactly_the_affected_tasks(dataset, tmp_path, capsys,
                                                                                   fake_workflows):  # noqa: F811
    from fieldfix_cli.main import main

    out = tmp_path / "out"
    base = ["batch", str(dataset), "--out", str(out), "--participant-label", "02", "--json", "--quiet"]
    assert main(base) == 0
    capsys.readouterr()
    config = tmp_path / "options.toml"
    config.write_text('smooth = "2mm"\n# a comment\n')
    assert main(base + ["--config", str(config)]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["config"]["path"] == str(config.resolve()) and summary["options"] == {"smooth_mm": 2.0}
    import hashlib

    assert summary["config"]["sha256"] == hashlib.sha256(config.read_bytes()).hexdigest()
    log = json.loads((out / summary["log"]).read_text())
    redone = sorted(t["task_id"] for t in log["tasks"] if t["status"] == "done")
    # smoothing changes every field map, hence everything made from them
    assert redone == ["dropout:sub-02_task-rest_bold", "fieldmap:sub-02", "fieldmap:sub-02_acq-spare",
                      "report:sub-02", "unwarp:sub-02_task-rest_bold"]
    # the interpolation only changes the unwarping (and the report that shows it); the command line wins
    (tmp_path / "options.json").write_text(json.dumps({"smooth": "2mm", "interp": "cubic"}))
    assert main(base + ["--config", str(tmp_path / "options.json"), "--interp", "sinc"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["options"] == {"smooth_mm": 2.0, "interp": "sinc"}
    log = json.loads((out / summary["log"]).read_text())
    assert sorted(t["task_id"] for t in log["tasks"] if t["status"] == "done") == [
        "report:sub-02", "unwarp:sub-02_task-rest_bold"]
    marker = next(out.rglob(".sub-02_task-rest_bold_unwarp.fieldfix-task.json"))
    assert json.loads(marker.read_text())["params"]["interp"] == "sinc"  # in the provenance of the task
    config.write_text('smooth = "2"\n')
    assert main(base + ["--config", str(config)]) == 2
    assert "smooth" in capsys.readouterr().err


# ----------------------------------------------------------------------------- reversed phase encoding
_EPI_SHAPE = (12, 24, 8)


def _image(path: Path, meta: dict | None, shape=_EPI_SHAPE) -> None:
    """An ellipsoid head, distorted along j by a smooth 20 Hz bump for its own phase-encode code."""
    from fieldfix.unwarp import distort_with_field

    path.parent.mkdir(parents=True, exist_ok=True)
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, n) for n in shape[:3]], indexing="ij")
    head = np.where(x ** 2 / 0.6 + y ** 2 / 0.7 + z ** 2 / 0.8 < 1, 800.0 * (1 + 0.2 * np.cos(4 * y)), 0.0)
    code = (meta or {}).get("PhaseEncodingDirection")
    if code is not None:
        field = 20.0 * np.exp(-((x - 0.1) ** 2 + y ** 2 + z ** 2) / 0.4)
        head = distort_with_field(head, field, code, 0.04 / (shape[1] - 1))
    data = head if len(shape) == 3 else np.repeat(head[..., None], shape[3], axis=3)
    nib.save(nib.Nifti1Image(data.astype(np.float32), np.diag([3.0, 3.0, 3.0, 1.0])), str(path))
    if meta is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(meta))


@pytest.fixture
def epi_dataset(tmp_path):
    root = tmp_path / "updown"
    (root / "dataset_description.json").parent.mkdir(parents=True)
    (root / "dataset_description.json").write_text('{"Name": "invented", "BIDSVersion": "1.9.0"}')
    timing = {"TotalReadoutTime": 0.04}
    s1 = root / "sub-01"
    for code, label in (("j", "PA"), ("j-", "AP")):  # grouped by B0FieldIdentifier
        _image(s1 / "fmap" / f"sub-01_acq-se_dir-{label}_epi.nii.gz",
               {"PhaseEncodingDirection": code, "B0FieldIdentifier": "updown", **timing})
        # grouped by a shared IntendedFor, no identifier
        _image(s1 / "fmap" / f"sub-01_acq-dwi_dir-{label}_epi.nii.gz",
               {"PhaseEncodingDirection": code, "EffectiveEchoSpacing": 0.04 / 23,
                "IntendedFor": ["dwi/sub-01_dwi.nii.gz"]})
        # ASL calibration images used as a field map
        _image(s1 / "perf" / f"sub-01_dir-{label}_m0scan.nii.gz",
               {"PhaseEncodingDirection": code, "B0FieldIdentifier": "m0pair", **timing})
    _image(s1 / "func" / "sub-01_task-rest_bold.nii.gz",
           {"PhaseEncodingDirection": "j-", "B0FieldSource": "updown", "EchoTime": 0.03, **timing}, _EPI_SHAPE + (3,))
    _image(s1 / "dwi" / "sub-01_dwi.nii.gz", {"PhaseEncodingDirection": "j-", "EchoTime": 0.08, **timing})
    _image(s1 / "perf" / "sub-01_asl.nii.gz", {"PhaseEncodingDirection": "j-", "B0FieldSource": "m0pair",
                                               "EchoTime": 0.02, **timing}, _EPI_SHAPE + (2,))
    return root


def test_reversed_phase_encode_field_maps_are_discovered_grouped_and_planned(epi_dataset, tmp_path):
    inv = batch.discover(epi_dataset)
    groups = {f.key: f for f in inv.fieldmaps}
    assert set(groups) == {"sub-01_acq-se", "sub-01_acq-dwi", "sub-01"}
    assert all(f.kind == "epi" and not f.problems for f in groups.values())
    assert sorted(groups["sub-01_acq-se"].files) == ["sub-01_acq-se_dir-AP_epi", "sub-01_acq-se_dir-PA_epi"]
    assert sorted(groups["sub-01"].files.values()) == ["sub-01/perf/sub-01_dir-AP_m0scan.nii.gz",
                                                       "sub-01/perf/sub-01_dir-PA_m0scan.nii.gz"]
    runs = {r.path: r.fieldmap for r in inv.runs}
    assert runs["sub-01/func/sub-01_task-rest_bold.nii.gz"] == "sub-01_acq-se"
    assert runs["sub-01/dwi/sub-01_dwi.nii.gz"] == "sub-01_acq-dwi"
    assert runs["sub-01/perf/sub-01_asl.nii.gz"] == "sub-01"
    tasks = {t.task_id: t for t in batch.plan_tasks(inv, tmp_path / "out")}
    se = tasks["fieldmap:sub-01_acq-se"]
    assert se.params.pe_codes == ["j-", "j"] and se.params.readout_times_s == [0.04, 0.04]
    assert tasks["fieldmap:sub-01_acq-dwi"].params.echo_spacings_s == [0.04 / 23, 0.04 / 23]
    assert tasks["unwarp:sub-01_task-rest_bold"].deps == ("fieldmap:sub-01_acq-se",)
    # the hash follows the images' metadata
    before = batch.task_hash(se, {})
    se.params = dataclasses.replace(se.params, pe_codes=["j-", "i"])
    assert batch.task_hash(se, {}) != before


def test_reversed_phase_encode_runs_are_corrected_or_fail_with_the_reason(epi_dataset, tmp_path):
    summary = batch.run_batch(epi_dataset, tmp_path / "out", reports=False)
    fieldmaps = {f.task: f.reason for f in summary.failures if f.task.startswith("fieldmap:")}
    assert not fieldmaps, fieldmaps  # every run with such a field map is corrected
    # a lone direction is not a pair
    (epi_dataset / "sub-01/fmap/sub-01_acq-se_dir-PA_epi.nii.gz").unlink()
    inv = batch.discover(epi_dataset)
    assert any("at least two phase-encode directions" in p for p in inv.fieldmap("sub-01_acq-se").problems)


def test_group_table_columns_come_from_the_typed_summaries(derivatives):
    from fieldfix.outputs import DropoutSummary, GroupRow

    _, out = derivatives
    table = json.loads((out / "group" / "group_runs.json").read_text())
    import dataclasses

    assert table["columns"] == [f.name for f in dataclasses.fields(GroupRow)]
    for row in map(GroupRow.from_json, table["rows"]):
        func = out / f"sub-01/ses-{row.session}/func"
        unwarp = UnwarpSummary.read(func / f"{row.run[:-5]}_desc-boldunwarp_summary.json")
        dropout = DropoutSummary.read(func / f"{row.run[:-5]}_desc-bolddropout_summary.json")
        assert row.status == "ok" and row.max_abs_shift_vox == unwarp.max_abs_shift_vox
        assert row.retention_percent_below_threshold == dropout.retention.percent_below_threshold
        # the invented runs were distorted along the phase-encode axis: correcting them aligns the edges
        # better with the undistorted field-map magnitude (normalised gradient fields, Haber and
        # Modersitzki 2006), so the report's gain is positive
        assert row.edge_agreement_gain is not None and row.edge_agreement_gain > 0
