"""Tests of fieldfix.batch: BIDS discovery, task plan, resume by hash, failure isolation,
local and dask execution, and the ``fieldfix batch`` command.

The BIDS terms checked here (IntendedFor relative to the subject folder, BIDS URIs
``bids::<path>``, B0FieldIdentifier/B0FieldSource, the inheritance principle for
sidecars, ``DatasetType: derivative`` with ``GeneratedBy``) follow the BIDS
specification 1.9 (Gorgolewski et al. 2016, Scientific Data 3:160044, and the
specification text, sections "Fieldmap data", "Common principles: the inheritance
principle" and "BIDS Derivatives").
"""

from __future__ import annotations

import json
import os
import sys
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))

from _batch_dataset import build_dataset  # noqa: E402

from fieldfix import batch  # noqa: E402
from fieldfix.errors import InputError  # noqa: E402


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    return build_dataset(tmp_path_factory.mktemp("bids") / "study")


# ----------------------------------------------------------------------------- discovery


def test_parse_bids_name_and_derivative_name():
    name = batch.parse_bids_name("sub-01_ses-2_task-rest_run-1_bold.nii.gz")
    assert name.entity_dict == {"sub": "01", "ses": "2", "task": "rest", "run": "1"}
    assert (name.suffix, name.extension) == ("bold", ".nii.gz")
    assert batch.parse_bids_name("not a bids name.txt") is None
    # desc goes after run (BIDS entity table order), suffix kept
    assert batch.derivative_name(name, desc="b0_hz") == \
        "sub-01_ses-2_task-rest_run-1_desc-b0hz_bold.nii.gz"


def test_discover_finds_all_kinds_and_links(dataset):
    inv = batch.discover(dataset)
    assert inv.subjects == ["01", "02", "03"]
    kinds = {f.key: f.kind for f in inv.fieldmaps}
    assert kinds == {"sub-01_ses-1": "phasediff", "sub-01_ses-2": "phasediff",
                     "sub-02": "phase-pair", "sub-02_acq-spare": "fieldmap",
                     "sub-03": "phasediff"}
    runs = {Path(r.path).name: r for r in inv.runs}
    # IntendedFor as a path relative to the subject folder (ses-1) and as a BIDS URI (ses-2)
    assert runs["sub-01_ses-1_task-rest_bold.nii.gz"].fieldmap == "sub-01_ses-1"
    assert runs["sub-01_ses-2_task-rest_bold.nii.gz"].fieldmap == "sub-01_ses-2"
    assert "IntendedFor" in runs["sub-01_ses-2_task-rest_bold.nii.gz"].note
    # B0FieldSource -> B0FieldIdentifier
    assert runs["sub-02_task-rest_bold.nii.gz"].fieldmap == "sub-02"
    assert "B0FieldSource" in runs["sub-02_task-rest_bold.nii.gz"].note
    # listed, not dropped
    assert [r.path for r in inv.runs_without_fieldmap] == \
        ["sub-02/func/sub-02_task-motor_bold.nii.gz"]
    assert [f.key for f in inv.fieldmaps_without_target] == ["sub-02_acq-spare"]
    # inheritance: echo time and readout of the rest runs come from the root sidecar
    assert runs["sub-01_ses-1_task-rest_bold.nii.gz"].metadata["TotalReadoutTime"] == 0.03
    assert inv.fieldmap("sub-01_ses-1").metadata["phasediff"]["EchoTime2"] == 0.00738
    assert not inv.problems
    json.dumps(inv.as_dict())  # serialisable for the summary


def test_discover_participants_and_bad_roots(dataset, tmp_path):
    inv = batch.discover(dataset, participant_labels=["sub-02"])
    assert inv.subjects == ["02"]
    assert {f.subject for f in inv.fieldmaps} == {"02"}
    with pytest.raises(InputError, match="sub-09"):
        batch.discover(dataset, participant_labels=["09"])
    with pytest.raises(InputError, match="not a BIDS dataset"):
        batch.discover(tmp_path)
    with pytest.raises(InputError, match="not a folder"):
        batch.discover(tmp_path / "missing")


def _write(path: Path, meta: dict | None = None):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(b"")  # discovery never opens images
    if meta is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(meta))


def test_discover_problems_are_reported(tmp_path):
    root = tmp_path / "ds"
    (root / "sub-01").mkdir(parents=True)
    (root / "dataset_description.json").write_text('{"Name": "x", "BIDSVersion": "1.9.0"}')
    f = root / "sub-01" / "fmap"
    # phase difference without magnitude and without EchoTime2; IntendedFor to nowhere
    _write(f / "sub-01_acq-a_phasediff.nii.gz",
           {"EchoTime1": 0.005, "IntendedFor": ["func/sub-01_task-x_bold.nii.gz",
                                                "func/missing_bold.nii.gz",
                                                "bids:other:sub-01/func/a_bold.nii.gz"]})
    # a reversed phase-encode image alone: found, with what it lacks
    _write(f / "sub-01_dir-AP_epi.nii.gz", {})
    # two claims on one run: the usable acquisition wins
    _write(f / "sub-01_acq-b_fieldmap.nii.gz", {"Units": "Hz", "B0FieldIdentifier": ["b"]})
    _write(f / "sub-01_acq-b_magnitude.nii.gz", {})
    _write(root / "sub-01" / "func" / "sub-01_task-x_bold.nii.gz",
           {"B0FieldSource": "b", "PhaseEncodingDirection": "j"})
    _write(root / "sub-01" / "anat" / "sub-01_T1w.nii.gz", {})
    inv = batch.discover(root)
    a = inv.fieldmap("sub-01_acq-a")
    assert a.kind == "phasediff"
    assert any("magnitude1" in p for p in a.problems)
    assert any("EchoTime2" in p for p in a.problems)
    epi = inv.fieldmap("sub-01")
    assert epi.kind == "epi" and any("two phase-encode directions" in p for p in epi.problems)
    run = inv.runs[0]
    assert run.fieldmap == "sub-01_acq-b" and "also claimed by sub-01_acq-a" in run.note
    text = " ".join(inv.problems)
    assert "does not exist" in text and "another dataset" in text
    # the broken acquisition gives a task that fails at once with its reasons
    tasks = {t.task_id: t for t in batch.plan_tasks(inv, tmp_path / "out")}
    assert tasks["fieldmap:sub-01_acq-a"].problems
    assert tasks["fieldmap:sub-01"].problems
    assert any("TotalReadoutTime" in p for p in tasks["unwarp:sub-01_task-x_bold"].problems)
    assert any("EchoTime" in p for p in tasks["dropout:sub-01_task-x_bold"].problems)


def test_plan_dependencies_and_layout(dataset, tmp_path):
    tasks = batch.plan_tasks(batch.discover(dataset), tmp_path / "deriv")
    ids = [t.task_id for t in tasks]
    assert len(ids) == len(set(ids))
    by_id = {t.task_id: t for t in tasks}
    # one field map per acquisition, also the one with no target
    assert {i for i in ids if i.startswith("fieldmap:")} == {
        "fieldmap:sub-01_ses-1", "fieldmap:sub-01_ses-2", "fieldmap:sub-02",
        "fieldmap:sub-02_acq-spare", "fieldmap:sub-03"}
    u = by_id["unwarp:sub-01_ses-2_task-rest_bold"]
    assert u.deps == ("fieldmap:sub-01_ses-2",)
    assert u.params.pe_code == "j-" and u.params.readout_time_s == 0.03
    assert u.out_dir == str((tmp_path / "deriv" / "sub-01" / "ses-2" / "func").resolve())
    assert by_id["dropout:sub-02_task-rest_bold"].params.te_s == 0.03
    assert "unwarp:sub-02_task-motor_bold" not in by_id  # no field map: nothing to unwarp
    report = by_id["report:sub-02"]
    assert set(report.deps) == {"fieldmap:sub-02", "fieldmap:sub-02_acq-spare",
                                "unwarp:sub-02_task-rest_bold", "dropout:sub-02_task-rest_bold"}
    # every dependency precedes its dependant in the plan
    pos = {t: k for k, t in enumerate(ids)}
    assert all(pos[d] < pos[t.task_id] for t in tasks for d in t.deps)


# ------------------------------------------------- the engine, with stand-in workflows
# These stand-ins write small outputs under the workflows' own names; they let the
# resume and isolation logic be checked apart from the numerics.


def _stub(cls, **given):
    """A record of `cls` with every required field filled by a neutral value of its type."""
    import dataclasses
    import typing

    from fieldfix.records import Record

    hints = typing.get_type_hints(cls)
    values = {}
    for f in dataclasses.fields(cls):
        if f.name in given or f.default is not dataclasses.MISSING or f.default_factory is not dataclasses.MISSING:
            continue
        tp = hints[f.name]
        origin = typing.get_origin(tp)
        if origin in (typing.Union, __import__("types").UnionType):
            values[f.name] = None
        elif isinstance(tp, type) and issubclass(tp, Record):
            values[f.name] = _stub(tp)
        else:
            values[f.name] = {str: "", int: 0, float: 0.0, bool: False, list: [], dict: {}}.get(origin or tp)
    return cls(**values, **given)


def _small(staging, name, like, data=None):
    from fieldfix.io import save_image

    save_image(staging / name, like.get_fdata() if data is None else data, like.affine)


def _fake_fieldmap(task, upstream, deriv, staging, command):
    from fieldfix.io import Provenance, load_image, save_image
    from fieldfix.outputs import FieldMapFiles, FieldMapSummary

    primary = next(task.inputs[r] for r in ("phasediff", "phase1", "fieldmap") if r in task.inputs)
    img = load_image(primary)  # the broken file of sub-03 fails here
    files = FieldMapFiles.named()
    save_image(staging / files.b0_hz, img.get_fdata() * 2.0, img.affine,
               provenance=Provenance(command, task.parameters(), [primary]))
    _small(staging, files.mask, img, np.ones(img.shape))
    _small(staging, files.magnitude, img)
    return _stub(FieldMapSummary, outputs=files)


def _fake_unwarp(task, upstream, deriv, staging, command):
    from fieldfix.io import Provenance, image_stem, load_image, save_image
    from fieldfix.outputs import UnwarpFiles, UnwarpSummary

    img = load_image(task.inputs["run"])
    files = UnwarpFiles.named(image_stem(task.inputs["run"]))
    save_image(staging / files.corrected, img.get_fdata(), img.affine, provenance=Provenance(command, {}, []))
    for role in ("shift_vox", "jacobian", "fold_mask", "displacement_mm"):
        _small(staging, getattr(files, role), img, np.zeros(img.shape[:3]))
    return _stub(UnwarpSummary, outputs=files, max_abs_shift_vox=1.5, run=task.inputs["run"])


def _fake_dropout(task, upstream, deriv, staging, command):
    from fieldfix.io import load_image
    from fieldfix.outputs import DropoutFiles, DropoutSummary, MapStatistics

    img = load_image(task.inputs["run"])
    files = DropoutFiles.named(image_stem_tag(task))
    _small(staging, files.retention, img, np.ones(img.shape[:3]))
    return _stub(DropoutSummary, outputs=files,
                 retention=MapStatistics(median=1.0, percent_below_threshold=4.0, voxels=10))


def image_stem_tag(task):
    from fieldfix.io import image_stem

    return image_stem(task.inputs["run"]) + "_"


def _fake_report(task, upstream, deriv, staging, command):
    from fieldfix.batch.reports import SubjectReport
    from fieldfix.io import write_json
    from fieldfix.outdir import atomic_output
    from fieldfix.outputs import ReportFiles

    with atomic_output(staging / "report.html") as temporary:
        temporary.write_text("<html>" + " ".join(sorted(upstream)) + "</html>")
    with atomic_output(staging / "report_summary.png") as temporary:
        temporary.write_bytes(b"not really a png")
    write_json(staging / "report.json", {"runs": []})
    return SubjectReport(outputs=ReportFiles.named("report"))


@pytest.fixture
def fake_workflows(monkeypatch):
    for kind, fn in (("fieldmap", _fake_fieldmap), ("unwarp", _fake_unwarp),
                     ("dropout", _fake_dropout), ("report", _fake_report)):
        monkeypatch.setitem(batch._RUNNERS, kind, fn)


def _statuses(summary_log: Path) -> dict[str, str]:
    record = json.loads(summary_log.read_text())
    return {t["task_id"]: t["status"] for t in record["tasks"]}


def test_isolation_resume_and_rehash(dataset, tmp_path, fake_workflows):
    out = tmp_path / "deriv"
    first = batch.run_batch(dataset, out, jobs=1, command="test")
    assert first["exit_status"] == 1
    failed = {f["task"]: f for f in first["failures"]}
    # the broken subject fails alone, with the file and the problem named
    assert set(failed) == {"fieldmap:sub-03", "unwarp:sub-03_task-rest_bold",
                           "dropout:sub-03_task-rest_bold", "report:sub-03"}
    assert failed["fieldmap:sub-03"]["status"] == "failed"
    assert "sub-03_phasediff.nii.gz" in failed["fieldmap:sub-03"]["reason"]
    assert failed["unwarp:sub-03_task-rest_bold"]["status"] == "skipped"
    assert "fieldmap:sub-03" in failed["unwarp:sub-03_task-rest_bold"]["reason"]
    assert first["tasks"]["done"] == 12 and first["tasks"]["failed"] == 1
    skipped = [r for r in first["runs"] if r["action"] == "skip"]
    assert [r.run for r in skipped] == ["sub-02/func/sub-02_task-motor_bold.nii.gz"]
    assert first["fieldmaps_without_target"] == ["sub-02_acq-spare"]

    # derivatives layout: description with GeneratedBy, BIDS names, sidecars with provenance
    desc = json.loads((out / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["GeneratedBy"][0]["Name"] == "fieldfix"
    b0 = out / "sub-01" / "ses-2" / "fmap" / "sub-01_ses-2_desc-b0hz_fieldmap.nii.gz"
    corrected = out / "sub-01" / "ses-1" / "func" / "sub-01_ses-1_task-rest_desc-corrected_bold.nii.gz"
    assert b0.is_file() and corrected.is_file()
    side = json.loads(b0.with_name(b0.name.replace(".nii.gz", ".json")).read_text())
    assert side["Sources"] == ["bids:raw:sub-01/ses-2/fmap/sub-01_ses-2_magnitude1.nii.gz",
                               "bids:raw:sub-01/ses-2/fmap/sub-01_ses-2_magnitude2.nii.gz",
                               "bids:raw:sub-01/ses-2/fmap/sub-01_ses-2_phasediff.nii.gz"]
    assert side["FieldfixBatch"]["TaskId"] == "fieldmap:sub-01_ses-2"
    assert side["Inputs"][0]["sha256"]  # provenance written by the workflow is kept
    rows = {r["run"]: r for r in json.loads((out / "group" / "group_runs.json").read_text())["rows"]}
    assert rows["sub-01_ses-1_task-rest_bold"]["max_abs_shift_vox"] == 1.5
    assert rows["sub-01_ses-1_task-rest_bold"]["retention_percent_below_threshold"] == 4.0
    assert rows["sub-02_task-motor_bold"]["status"] == "no field map"
    assert rows["sub-03_task-rest_bold"]["status"] == "failed"
    assert (out / "group" / "group_runs.png").read_bytes()[:4] == b"\x89PNG"
    assert not (out / ".fieldfix-work").exists()

    # unchanged inputs: nothing redone, files untouched
    mtimes = {p: p.stat().st_mtime_ns for p in out.rglob("*.nii.gz")}
    second = batch.run_batch(dataset, out, jobs=1)
    assert second["tasks"]["done"] == 0 and second["tasks"]["reused"] == 12
    assert mtimes == {p: p.stat().st_mtime_ns for p in out.rglob("*.nii.gz")}

    # one output deleted: only that task is redone (its dependants keep their hash)
    corrected.unlink()
    third = batch.run_batch(dataset, out, jobs=1)
    status = _statuses(out / third["log"])
    assert [t for t, s in status.items() if s == "done"] == ["unwarp:sub-01_ses-1_task-rest_bold"]
    assert corrected.is_file()

    # a changed parameter (readout time in a run's own sidecar) redoes the tasks that use
    # it (unwarping, BOLD sensitivity) and the report that shows them, nothing else
    sidecar = dataset / "sub-02" / "func" / "sub-02_task-rest_bold.json"
    original = sidecar.read_text()
    try:
        sidecar.write_text(json.dumps(json.loads(original) | {"TotalReadoutTime": 0.031}))
        fourth = batch.run_batch(dataset, out, jobs=1)
    finally:
        sidecar.write_text(original)
    status = _statuses(out / fourth["log"])
    assert [t for t, s in status.items() if s == "done"] == ["unwarp:sub-02_task-rest_bold",
                                                             "dropout:sub-02_task-rest_bold",
                                                             "report:sub-02"]


def test_interrupted_task_leaves_no_marker_and_is_redone(dataset, tmp_path, fake_workflows,
                                                         monkeypatch):
    out = tmp_path / "deriv"

    def interrupted(task, upstream, deriv, staging, command):
        from fieldfix.io import write_json

        write_json(staging / "dropout.json", {})  # work of the task, unfinished
        raise KeyboardInterrupt

    monkeypatch.setitem(batch._RUNNERS, "dropout", interrupted)
    with pytest.raises(KeyboardInterrupt):
        batch.run_batch(dataset, out, jobs=1, participant_labels=["01"])
    assert (out / "sub-01" / "ses-1" / "fmap" / ".sub-01_ses-1_fieldmap_fieldmap.fieldfix-task.json").is_file()
    assert not list(out.rglob(".*dropout.fieldfix-task.json"))
    assert not list((out / ".fieldfix-work").glob("*")) if (out / ".fieldfix-work").exists() else True
    monkeypatch.setitem(batch._RUNNERS, "dropout", _fake_dropout)
    resumed = batch.run_batch(dataset, out, jobs=1, participant_labels=["01"])
    status = _statuses(out / resumed["log"])
    assert resumed["exit_status"] == 0
    assert status["fieldmap:sub-01_ses-1"] == "reused"
    assert status["dropout:sub-01_ses-1_task-rest_bold"] == "done"


def test_refuses_foreign_output_folder(dataset, tmp_path, fake_workflows):
    other = tmp_path / "other"
    other.mkdir()
    (other / "dataset_description.json").write_text(
        json.dumps({"Name": "x", "GeneratedBy": [{"Name": "another-tool"}]}))
    from fieldfix.errors import OutputError

    with pytest.raises(OutputError, match="another dataset|raw BIDS dataset"):
        batch.run_batch(dataset, other)
    with pytest.raises(InputError, match="subject"):
        batch.run_batch(dataset, dataset / "sub-01" / "out")
    with pytest.raises(InputError, match="jobs"):
        batch.run_batch(dataset, tmp_path / "d", jobs=0)


# ------------------------------------------------------ real workflows, all three backends


def _images(out: Path) -> dict[str, Path]:
    return {p.relative_to(out).as_posix(): p for p in out.rglob("*.nii.gz")
            if ".fieldfix-work" not in p.parts}


def _files(out: Path) -> set[str]:
    return {p.relative_to(out).as_posix() for p in out.rglob("*")
            if p.is_file() and p.parts[len(out.parts)] not in ("logs", ".fieldfix")
            and "inspection" not in p.parts}


@pytest.fixture(scope="module")
def three_runs(dataset, tmp_path_factory):
    """The dataset corrected with jobs=1, jobs=2 and a dask LocalCluster of two processes."""
    from distributed import LocalCluster

    base = tmp_path_factory.mktemp("backends")
    # reports (the slowest task, and time-stamped) are made once, in the jobs=1 run
    summaries = {
        "jobs1": batch.run_batch(dataset, base / "jobs1", jobs=1),
        "jobs2": batch.run_batch(dataset, base / "jobs2", jobs=2, reports=False),
    }
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        summaries["dask"] = batch.run_batch(dataset, base / "dask", reports=False,
                                            scheduler=cluster.scheduler_address)
        # the same cluster through a scheduler file: everything finished is reused
        # (written by hand: the file 'dask scheduler --scheduler-file' writes has these keys)
        (base / "scheduler.json").write_text(json.dumps(
            {"type": "Scheduler", "address": cluster.scheduler_address}))
        summaries["dask_again"] = batch.run_batch(dataset, base / "dask", reports=False,
                                                  scheduler_file=base / "scheduler.json")
    return base, summaries


@pytest.mark.slow
def test_dask_rerun_through_scheduler_file_reuses_everything(three_runs):
    _, summaries = three_runs
    again = summaries["dask_again"]
    assert again["execution"].startswith("dask") and "scheduler.json" in again["execution"]
    assert again["tasks"]["done"] == 0
    assert again["tasks"]["reused"] == summaries["dask"]["tasks"]["done"]


def test_backends_give_identical_outputs(three_runs):
    import nibabel as nib

    base, summaries = three_runs
    modes = {k: s["execution"] for k, s in summaries.items()}
    assert modes["jobs2"] == "2 local processes" and modes["dask"].startswith("dask")
    reference = _images(base / "jobs1")
    assert len(reference) > 20
    for mode in ("jobs2", "dask"):
        assert _files(base / mode) == _files(base / "jobs1"), mode
        for rel, path in reference.items():
            a, b = nib.load(path), nib.load(base / mode / rel)
            assert np.array_equal(a.affine, b.affine), (mode, rel)
            assert np.array_equal(np.asanyarray(a.dataobj), np.asanyarray(b.dataobj)), (mode, rel)
        def rows(folder):  # the alignment gain comes from the reports, made in jobs1 only
            table = json.loads((folder / "group" / "group_runs.json").read_text())["rows"]
            return [{k: v for k, v in r.items() if k != "edge_agreement_gain"} for r in table]

        assert rows(base / mode) == rows(base / "jobs1")
        no_reports = dict(summaries["jobs1"]["tasks"])
        no_reports["done"] -= 2  # sub-01 and sub-02 reports
        no_reports["skipped"] -= 1  # sub-03 report
        assert summaries[mode]["tasks"] == no_reports
    # the task hashes (inputs + parameters) agree as well
    for marker in (base / "jobs1").rglob("*.fieldfix-task.json"):
        rel = marker.relative_to(base / "jobs1")
        if "inspection" in rel.parts:
            continue
        assert json.loads(marker.read_text())["hash"] == \
            json.loads((base / "dask" / rel).read_text())["hash"]


def test_broken_subject_fails_alone_with_real_workflows(three_runs):
    base, summaries = three_runs
    for mode, summary in summaries.items():
        if mode == "dask_again":
            continue
        assert summary["exit_status"] == 1
        assert {f["subject"] for f in summary["failures"]} == {"sub-03"}, mode
        reasons = {f["task"]: f["reason"] for f in summary["failures"]}
        assert "sub-03_phasediff.nii.gz" in reasons["fieldmap:sub-03"]
        assert "truncated or corrupt" in reasons["fieldmap:sub-03"]
        assert summary["tasks"]["failed"] == 1
        assert summary["tasks"]["skipped"] == (3 if mode == "jobs1" else 2)
    out = base / "jobs1"
    # every other run corrected, with a B0 map per acquisition (also the untargeted one)
    assert (out / "sub-02" / "fmap" / "sub-02_acq-spare_desc-b0hz_fieldmap.nii.gz").is_file()
    for run in ("sub-01/ses-1/func/sub-01_ses-1_task-rest", "sub-01/ses-2/func/sub-01_ses-2_task-rest",
                "sub-02/func/sub-02_task-rest"):
        assert (out / f"{run}_desc-corrected_bold.nii.gz").is_file(), run
    assert not list((out / "sub-02").rglob("*task-motor*"))  # no field map: not touched
    assert (out / "inspection" / "sub-01" / "report.html").is_file()
    rows = {r["run"]: r for r in json.loads((out / "group" / "group_runs.json").read_text())["rows"]}
    # shift in voxels = field (Hz) x total readout time (s) -- common practice, no source.
    # The invented field peaks near 60-70 Hz plus an 8 Hz gradient, readout 30 ms: ~2 voxels.
    for stem in ("sub-01_ses-1_task-rest_bold", "sub-02_task-rest_bold"):
        assert 1.0 < rows[stem]["max_abs_shift_vox"] < 3.5, rows[stem]
        assert rows[stem]["retention_percent_below_threshold"] is not None
        assert rows[stem]["status"] == "ok"
    assert rows["sub-02_task-motor_bold"]["status"] == "no field map"
    assert rows["sub-03_task-rest_bold"]["status"] == "failed"


def _cli(*args, **kwargs):
    import subprocess

    exe = Path(sys.executable).with_name("fieldfix")
    return subprocess.run([str(exe), "batch", *map(str, args)], capture_output=True, text=True,
                          timeout=120, **kwargs)


@pytest.mark.slow
def test_cli_interrupted_batch_resumes_without_redoing(dataset, tmp_path):
    import signal
    import subprocess
    import time

    out = tmp_path / "deriv"
    exe = Path(sys.executable).with_name("fieldfix")
    proc = subprocess.Popen([str(exe), "batch", str(dataset), "--out", str(out),
                             "--participant-label", "01", "--no-report", "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline and proc.poll() is None:
        try:
            if list(out.rglob("*.fieldfix-task.json")):
                break
        except FileNotFoundError:  # a staging folder the batch removed while we walked the tree
            pass
        time.sleep(0.02)
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    interrupted = proc.returncode == 130
    if interrupted:
        assert "interrupted" in err
    finished_before = {m.name: m.stat().st_mtime_ns for m in out.rglob("*.fieldfix-task.json")}
    assert finished_before  # at least the first field map was finished before the signal
    assert not list((out / ".fieldfix-work").glob("*")) if (out / ".fieldfix-work").exists() else True

    rerun = _cli(dataset, "--out", out, "--participant-label", "01", "--no-report", "--json")
    assert rerun.returncode == 0, rerun.stderr
    summary = json.loads(rerun.stdout)
    statuses = _statuses(out / summary["log"])
    assert set(statuses.values()) <= {"done", "reused"} and len(statuses) == 6
    # finished work was not redone: same markers, untouched
    for name, mtime in finished_before.items():
        marker = next(out.rglob(name))
        assert marker.stat().st_mtime_ns == mtime
        assert statuses[json.loads(marker.read_text())["task_id"]] == "reused"
    if interrupted:
        assert "done" in statuses.values()


@pytest.mark.slow
def test_cli_exit_status_and_options(dataset, tmp_path):
    bad = _cli(tmp_path / "nowhere", "--out", tmp_path / "o")
    assert bad.returncode == 2 and "BIDS root is not a folder" in bad.stderr
    both = _cli(dataset, "--out", tmp_path / "o", "--jobs", "2", "--scheduler", "tcp://x:1")
    assert both.returncode == 2 and "not allowed with" in both.stderr
    missing = _cli(dataset, "--out", tmp_path / "o", "--scheduler-file", tmp_path / "none.json")
    assert missing.returncode == 2 and "scheduler file not found" in missing.stderr
    help_text = _cli("--help").stdout
    assert "--participant-label" in help_text and "not a medical device" in help_text


def test_tasks_run_on_one_thread_in_process_and_limits_are_restored():
    # --jobs N means N cores: a task run in this process (jobs=1) gets one numba thread and
    # one BLAS/OpenMP thread, and the previous limits come back afterwards
    import numba
    from threadpoolctl import threadpool_info

    from fieldfix.batch import ThreadLimit

    before_numba = numba.get_num_threads()
    before_pools = [(i["prefix"], i["num_threads"]) for i in threadpool_info()]
    with ThreadLimit():
        assert numba.get_num_threads() == 1
        assert all(i["num_threads"] == 1 for i in threadpool_info())
    assert numba.get_num_threads() == before_numba
    assert [(i["prefix"], i["num_threads"]) for i in threadpool_info()] == before_pools


def test_task_results_carry_start_time_and_worker(dataset, tmp_path, fake_workflows):
    import datetime as dt
    import socket

    summary = batch.run_batch(dataset, tmp_path / "out", jobs=1)
    log = json.loads((tmp_path / "out" / summary["log"]).read_text())
    ran = [t for t in log["tasks"] if t["status"] == "done"]
    assert ran
    for t in ran:
        assert dt.datetime.fromisoformat(t["started"]).tzinfo is not None
        assert t["worker"] == f"{socket.gethostname()}:{os.getpid()}"


def test_task_collector_scope_frees_task_garbage_and_restores_state():
    import gc
    import weakref

    from fieldfix.batch import YoungObjectsOnly

    class Node:
        pass

    old = Node()
    old.self = old  # a cycle made before the task: parked, not lost
    old_ref = weakref.ref(old)
    del old
    thresholds = gc.get_threshold()
    with YoungObjectsOnly():
        assert gc.get_freeze_count() > 0
        young = Node()
        young.self = young  # cyclic garbage made by the task
        young_ref = weakref.ref(young)
        del young
    assert young_ref() is None  # freed when the task ended
    assert gc.get_freeze_count() == 0 and gc.get_threshold() == thresholds
    gc.collect()
    assert old_ref() is None  # back in the normal generations and collectable
    gc.freeze()  # a process that froze objects itself is left alone (objects freed by reference
    try:         # counting leave the permanent generation, so its size is not compared exactly)
        with YoungObjectsOnly():
            assert gc.get_threshold() == thresholds
        assert gc.get_freeze_count() > 0 and gc.get_threshold() == thresholds
    finally:
        gc.unfreeze()


def test_bids_uris_of_this_dataset_and_of_others(tmp_path):
    # BIDS URIs (specification 1.9, "BIDS URI"): bids::<path> is this dataset, bids:<name>:<path> the
    # dataset DatasetLinks calls <name>; a name that links back to this dataset is this dataset too
    root = tmp_path / "ds"
    (root / "sub-01").mkdir(parents=True)
    (root / "dataset_description.json").write_text(json.dumps(
        {"Name": "x", "BIDSVersion": "1.9.0", "DatasetLinks": {"here": ".", "atlas": "https://example.org/a"}}))
    f = root / "sub-01" / "fmap"
    _write(f / "sub-01_acq-a_fieldmap.nii.gz", {"Units": "Hz", "IntendedFor": [
        "bids:here:sub-01/func/sub-01_task-a_bold.nii.gz", "bids:atlas:sub-01/func/sub-01_task-b_bold.nii.gz",
        "bids::sub-01/../../outside_bold.nii.gz", "bids:here"]})
    _write(f / "sub-01_acq-a_magnitude.nii.gz", {})
    for task in ("a", "b"):
        _write(root / "sub-01" / "func" / f"sub-01_task-{task}_bold.nii.gz", {"PhaseEncodingDirection": "j"})
    inv = batch.discover(root)
    runs = {Path(r.path).name: r.fieldmap for r in inv.runs}
    assert runs == {"sub-01_task-a_bold.nii.gz": "sub-01_acq-a", "sub-01_task-b_bold.nii.gz": None}
    text = " ".join(inv.problems)
    assert "points into another dataset ('atlas')" in text and "leaves the dataset" in text
    assert "malformed BIDS URI 'bids:here'" in text
