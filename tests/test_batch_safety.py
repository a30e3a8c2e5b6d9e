"""The batch against hostile datasets and interrupted runs (cases of the adversarial audit).

Each test builds its hostile input itself, runs the real ``fieldfix batch`` (in process
through the command frame, or as the console script where processes matter), and checks the
exit status and the one-line reasons: no Python traceback from any dataset. BIDS rules
referred to (IntendedFor relative to the subject folder or a BIDS URI, PhaseEncodingDirection
one of i j k i- j- k-, labels of letters and digits) are those of the BIDS specification 1.9
(Gorgolewski et al. 2016, Scientific Data 3:160044, and the specification text).
"""

from __future__ import annotations

import json
import math
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).parent))

from _batch_dataset import build_dataset, dataset, pristine  # noqa: E402,F401 (fixtures)
from test_batch import fake_workflows  # noqa: E402,F401  (fixture)

from fieldfix import batch  # noqa: E402
from fieldfix.batch.fieldmaps import check_declared_phase_units  # noqa: E402
from fieldfix.batch.lock import LOCK_NAME  # noqa: E402
from fieldfix.outdir import host_label  # noqa: E402
from fieldfix.errors import UnitError  # noqa: E402
from fieldfix_cli.main import main  # noqa: E402

EXE = Path(sys.executable).with_name("fieldfix")


def _batch(capsys, *args):
    status = main(["batch", *map(str, args)])
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return status, out, [line for line in err.splitlines() if line.strip()]


def _dead_pid() -> int:
    return int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                              text=True).stdout)


def _sidecar(root: Path, rel: str) -> Path:
    return root / rel.replace(".nii.gz", ".json")


def _edit(path: Path, **changes) -> None:
    meta = json.loads(path.read_text()) if path.exists() else {}
    path.write_text(json.dumps(meta | changes))


# ----------------------------------------------------------------------------- messages
def test_hostile_metadata_fails_only_the_runs_it_concerns_with_one_line_reasons(dataset, tmp_path, capsys,
                                                                              fake_workflows):  # noqa: F811
    run1 = "sub-01/ses-1/func/sub-01_ses-1_task-rest_bold.nii.gz"
    _edit(dataset / "sub-01/ses-1/fmap/sub-01_ses-1_phasediff.json", IntendedFor=[str(dataset / run1)])
    _sidecar(dataset, "sub-01/ses-2/func/sub-01_ses-2_task-rest_bold.nii.gz").write_text(
        '{"PhaseEncodingDirection": 1}')
    # duplicate keys: parsers disagree on which one wins, so the sidecar is refused
    _sidecar(dataset, "sub-02/func/sub-02_task-rest_bold.nii.gz").write_text(
        '{"B0FieldSource": "gre2echo", "B0FieldSource": "other"}')
    # a field map in the BIDS sense that is not there
    _edit(_sidecar(dataset, "sub-02/func/sub-02_task-motor_bold.nii.gz"), B0FieldSource="nowhere")
    (dataset / "sub-0_1").mkdir()  # not a BIDS label: skipped with a remark
    status, out, err = _batch(capsys, dataset, "--out", tmp_path / "out", "--no-report", "--json")
    assert status == 1
    summary = json.loads(out)
    runs = {r["run"]: r for r in summary["runs"]}
    assert "must be relative to the subject folder or a BIDS URI" in runs[run1]["reason"]
    assert "does not exist" not in runs[run1]["reason"]
    assert "PhaseEncodingDirection is 1, not one of i j k i- j- k-" in \
        runs["sub-01/ses-2/func/sub-01_ses-2_task-rest_bold.nii.gz"]["reason"]
    bad = runs["sub-02/func/sub-02_task-rest_bold.nii.gz"]
    assert bad["action"] == "failed" and "sub-02_task-rest_bold.json: duplicate key 'B0FieldSource'" in bad["reason"]
    motor = runs["sub-02/func/sub-02_task-motor_bold.nii.gz"]
    assert motor["action"] == "failed" and "B0FieldSource 'nowhere' matches no B0FieldIdentifier" in motor["reason"]
    assert runs["sub-03/func/sub-03_task-rest_bold.nii.gz"]["action"] == "corrected"  # the rest goes on
    assert any("sub-0_1" in r and "letters and digits" in r for r in summary["dataset_remarks"])
    assert {f["subject"] for f in summary["failures"]} == {"sub-01", "sub-02"}
    assert err and all(line.startswith("fieldfix batch: ") for line in err)


def test_odd_participant_label_and_broken_sidecar_json_are_one_line_errors(dataset, tmp_path, capsys):
    status, _, err = _batch(capsys, dataset, "--out", tmp_path / "o", "--participant-label", "0_1")
    assert status == 2 and len(err) == 1 and "'0_1' is not a BIDS label" in err[0]
    # a sidecar that is not UTF-8 or too deep: refused with the file named, in the dry run too
    _sidecar(dataset, "sub-03/fmap/sub-03_phasediff.nii.gz").write_bytes(b'{"EchoTime1": 0.005, "x": "\xff"}')
    _sidecar(dataset, "sub-02/func/sub-02_task-motor_bold.nii.gz").write_text("[" * 100 + "]" * 100)
    status, out, err = _batch(capsys, dataset, "--out", tmp_path / "o", "--dry-run", "--json")
    assert status == 0 and not err
    entries = {e["run"]: e for e in json.loads(out)}
    assert "sub-03_phasediff.json: not valid UTF-8" in entries["sub-03/func/sub-03_task-rest_bold.nii.gz"]["reason"]
    assert "nested too deeply" in entries["sub-02/func/sub-02_task-motor_bold.nii.gz"]["reason"]


def test_inputs_outside_the_dataset_are_refused_unless_allowed_and_annex_links_are_followed(
        dataset, tmp_path, capsys, fake_workflows):  # noqa: F811
    # a run stored as a link out of the dataset
    run3 = dataset / "sub-03/func/sub-03_task-rest_bold.nii.gz"
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    shutil.move(run3, elsewhere / run3.name)
    run3.symlink_to(elsewhere / run3.name)
    # a run stored the annex way: a link into the dataset's own object store
    run2 = dataset / "sub-02/func/sub-02_task-rest_bold.nii.gz"
    objects = dataset / ".git/annex/objects/Xy/Zw/SHA256E-s1--ab.nii.gz"
    objects.mkdir(parents=True)
    shutil.move(run2, objects / "SHA256E-s1--ab.nii.gz")
    run2.symlink_to(os.path.relpath(objects / "SHA256E-s1--ab.nii.gz", run2.parent))
    status, out, err = _batch(capsys, dataset, "--out", tmp_path / "out", "--no-report", "--json")
    runs = {r["run"]: r for r in json.loads(out)["runs"]}
    assert status == 1
    assert runs["sub-02/func/sub-02_task-rest_bold.nii.gz"]["action"] == "corrected"
    outside = runs["sub-03/func/sub-03_task-rest_bold.nii.gz"]
    assert outside["action"] == "failed" and "resolves outside the dataset" in outside["reason"]
    assert any("--allow-outside-inputs" in line for line in err)
    assert (tmp_path / "out/sub-02/func/sub-02_task-rest_desc-corrected_bold.nii.gz").is_file()
    status, out, _ = _batch(capsys, dataset, "--out", tmp_path / "out", "--no-report", "--json",
                            "--allow-outside-inputs")
    assert status == 0, out


def test_degrees_declared_on_a_radian_phase_difference_are_refused_with_both_readings(dataset, tmp_path, capsys):
    # the invented phase difference spans +-pi (radians); a sidecar saying degrees would give a
    # field 180/pi = 57.3 times too small
    _edit(dataset / "sub-01/ses-1/fmap/sub-01_ses-1_phasediff.json", Units="deg")
    status, out, err = _batch(capsys, dataset, "--out", tmp_path / "out", "--participant-label", "01",
                              "--no-report", "--json")
    assert status == 1
    failure = next(f for f in json.loads(out)["failures"] if f["task"] == "fieldmap:sub-01_ses-1")
    assert "says Units deg" in failure["reason"] and "read as degrees" in failure["reason"]
    # both readings, 180/pi apart; as radians the invented field's peak (about 68 Hz, see _batch_dataset)
    import re

    as_degrees, as_radians = (float(v) for v in re.findall(r"\+-([0-9.]+) Hz", failure["reason"]))
    assert as_radians / as_degrees == pytest.approx(180 / math.pi, rel=1e-2)
    assert 55 < as_radians < 80
    # the user's word wins over the sidecar
    status, out, _ = _batch(capsys, dataset, "--out", tmp_path / "out", "--participant-label", "01",
                            "--no-report", "--json", "--phase-units", "rad")
    assert status == 0, out


def test_declared_phase_units_rule_against_the_field_each_reading_gives():
    delta_te_s = 0.00246
    radians = np.linspace(-math.pi, math.pi, 101)
    with pytest.raises(UnitError, match=r"3\.55 Hz.*203 Hz"):  # pi/180/(2 pi dTE), pi/(2 pi dTE)
        check_declared_phase_units(radians, "deg", delta_te_s, "pd.nii.gz")
    check_declared_phase_units(radians, "rad", delta_te_s, "pd.nii.gz")
    check_declared_phase_units(np.linspace(-180, 179, 50), "deg", delta_te_s, "pd.nii.gz")
    with pytest.raises(UnitError, match="beyond"):
        check_declared_phase_units(np.linspace(-180, 179, 50), "rad", delta_te_s, "pd.nii.gz")
    with pytest.raises(UnitError, match="deg"):  # within +-pi degrees: a field under 3.6 Hz everywhere
        check_declared_phase_units(np.linspace(-1.0, 1.5, 9), "deg", delta_te_s, "pd.nii.gz")
    check_declared_phase_units(np.full(9, 0.01), "deg", delta_te_s, "pd.nii.gz")  # constant: decides nothing


# ----------------------------------------------------------------------------- the folder
def test_a_second_batch_into_the_same_folder_is_refused_and_a_stale_lock_taken_over(dataset, tmp_path, capsys,
                                                                                  fake_workflows):  # noqa: F811
    out = tmp_path / "out"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (out / LOCK_NAME).write_text(json.dumps({"pid": holder.pid, "host": host_label(),
                                                 "started": "2026-01-02T03:04:05+00:00", "command": "fieldfix"}))
        status, _, err = _batch(capsys, dataset, "--out", out, "--no-report")
        assert status == 2 and len(err) == 1
        assert f"process {holder.pid} on {host_label()}" in err[0] and "2026-01-02T03:04:05" in err[0]
        assert sorted(p.name for p in out.iterdir()) == [LOCK_NAME]  # nothing written
    finally:
        holder.kill()
        holder.wait()
    status, out_text, _ = _batch(capsys, dataset, "--out", out, "--no-report", "--json")
    summary = json.loads(out_text)
    assert status == 0 and any(f"process {holder.pid}" in n and "no longer runs" in n for n in summary["notices"])
    assert not (out / LOCK_NAME).exists()  # released at the end


def test_leftovers_of_a_killed_run_are_removed_and_nothing_else(dataset, tmp_path, fake_workflows):  # noqa: F811
    from fieldfix.io import write_json
    from fieldfix.outdir import output_folder

    out = tmp_path / "out"
    dead = _dead_pid()
    staging = out / ".fieldfix-work" / f"unwarp-x.{host_label()}-{dead}.0badc0de"
    live = out / ".fieldfix-work" / f"unwarp-y.{host_label()}-{os.getpid()}.0badc0de"
    with output_folder(out):
        write_json(staging / "x_unwarp.json", {"half": True})  # fieldfix's unfinished work
        write_json(live / "y_unwarp.json", {"in use": True})  # a live run's: kept
    (staging / f".b0.nii.gz.{host_label()}-{dead}.abcd1234.part.nii.gz").write_bytes(b"half")
    planted = out / ".fieldfix-work" / f"unwarp-z.{host_label()}-{dead}.0badc0de"
    planted.mkdir()
    (planted / "notes.txt").write_text("someone's file")
    summary = batch.run_batch(dataset, out, participant_labels=["01"], reports=False)
    assert not staging.exists() and (live / "y_unwarp.json").exists()
    assert (planted / "notes.txt").read_text() == "someone's file"
    assert any("leftovers of killed runs" in n for n in summary.notices)


@pytest.mark.slow
def test_workers_end_when_the_batch_process_is_killed(tmp_path):
    psutil = pytest.importorskip("psutil")
    root = build_dataset(tmp_path / "study", shape=(48, 48, 24), n_volumes=12, broken=False, extra_subjects=2)
    out = tmp_path / "out"
    proc = subprocess.Popen([str(EXE), "batch", str(root), "--out", str(out), "--jobs", "2", "--quiet"],
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    workers = []
    deadline = time.monotonic() + 90
    while time.monotonic() < deadline and proc.poll() is None:
        workers = [c for c in psutil.Process(proc.pid).children() if "spawn_main" in " ".join(c.cmdline())]
        if len(workers) == 2 and list((out / ".fieldfix-work").glob("*")):  # tasks running in workers
            break
        time.sleep(0.05)
    assert len(workers) == 2 and proc.poll() is None
    proc.kill()  # kill -9 of the batch process
    proc.wait()
    gone = time.monotonic() + 5

    def alive(p):
        try:
            return p.status() != psutil.STATUS_ZOMBIE
        except psutil.NoSuchProcess:
            return False

    while time.monotonic() < gone and any(alive(w) for w in workers):
        time.sleep(0.05)
    assert not any(alive(w) for w in workers)
    listing = sorted(p for p in out.rglob("*"))
    time.sleep(1.5)
    assert sorted(p for p in out.rglob("*")) == listing  # nothing goes on writing
    rerun = subprocess.run([str(EXE), "batch", str(root), "--out", str(out), "--jobs", "2", "--no-report",
                            "--json"], capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert any("took over the batch lock" in n for n in json.loads(rerun.stdout)["notices"])
    assert not list(out.rglob(".fieldfix-work/*"))


def test_staging_folders_of_dead_runs_are_recognised_on_hosts_with_dotted_names(tmp_path, monkeypatch):
    from fieldfix.batch import lock
    from fieldfix.io import write_json
    from fieldfix.outdir import output_folder

    monkeypatch.setattr(lock, "host_label", lambda: "node1.cluster.example")
    dead = _dead_pid()
    mine = tmp_path / ".fieldfix-work" / f"unwarp-sub-01_task-rest_bold.node1.cluster.example-{dead}.0badc0de"
    other_host = tmp_path / ".fieldfix-work" / f"unwarp-sub-02_task-rest_bold.node2.cluster.example-{dead}.0badc0de"
    with output_folder(tmp_path):
        write_json(mine / "x.json", {})
        write_json(other_host / "y.json", {})  # another host's process may still run: kept
        removed = lock.clean_leftovers(tmp_path, ".fieldfix-work")
    assert removed == [f".fieldfix-work/{mine.name}/"]
    assert not mine.exists() and (other_host / "y.json").exists()


def test_markers_of_an_earlier_format_are_redone_and_their_outputs_removed(dataset, tmp_path,
                                                                           fake_workflows):  # noqa: F811
    from fieldfix.io import write_json
    from fieldfix.outdir import output_folder

    out = tmp_path / "out"
    batch.run_batch(dataset, out, participant_labels=["01"], reports=False)
    fmap = out / "sub-01/ses-1/fmap"
    marker = fmap / ".sub-01_ses-1_fieldmap_fieldmap.fieldfix-task.json"
    old_name = "sub-01_ses-1_desc-b0mask_fieldmap.nii.gz"  # a name an earlier fieldfix gave
    with output_folder(out):
        write_json(fmap / old_name, {"stand-in": "image"})
        write_json(marker, {"task_id": "fieldmap:sub-01_ses-1", "kind": "fieldmap", "hash": "0" * 64, "format": 1,
                            "summary": {"b0_hz": "x"},
                            "outputs": {"b0_mask.nii.gz": {"path": f"sub-01/ses-1/fmap/{old_name}", "size": 1}}},
                   overwrite=True)
    again = batch.run_batch(dataset, out, participant_labels=["01"], reports=False)
    log = batch.BatchLog.read(out / again.log)
    assert {t.task_id: t.status for t in log.tasks}["fieldmap:sub-01_ses-1"] == "done"
    assert not (fmap / old_name).exists() and (fmap / "sub-01_ses-1_desc-b0_mask.nii.gz").is_file()
    assert again.exit_status == 0
