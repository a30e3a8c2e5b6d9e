"""fieldfix writes and deletes only inside its output folder, and replaces only its own files.

Each case below is one the safety audit ran: a stale or planted batch marker naming files
outside the derivatives folder, a file someone else put at a derivative name or at the group
table's name, ``--overwrite`` beside a user's file of an output's name, ``--prefix`` with
folder parts, and links inside the output folder that lead out of it. The mechanism under
test is :mod:`fieldfix.outdir` (containment after resolving links, and a signed ledger of
what fieldfix wrote).
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest

from fieldfix import batch
from fieldfix.errors import OutputError
from fieldfix.io import save_image, write_json
from fieldfix.outdir import (
    STATE_DIR,
    OutputFolder,
    atomic_output,
    output_folder,
    output_paths_guard,
    put_in_place,
    remove_leftovers,
    remove_output,
    written_by_fieldfix,
)
from test_batch import fake_workflows  # noqa: F401  (fixture)
from _batch_dataset import build_dataset


# --------------------------------------------------------------------------- the mechanism
def test_only_files_fieldfix_wrote_count_as_ours(tmp_path):
    ours = write_json(tmp_path / "ours.json", {"a": 1})
    theirs = tmp_path / "theirs.json"
    theirs.write_text("{}")
    assert written_by_fieldfix(ours) and not written_by_fieldfix(theirs)
    # a user who edits our file makes it theirs
    ours.write_text('{"a": 2}')
    assert not written_by_fieldfix(ours)
    with pytest.raises(OutputError, match="did not write"):
        write_json(ours, {"a": 3}, overwrite=True)
    assert json.loads(ours.read_text()) == {"a": 2}


def test_a_tampered_record_is_not_trusted(tmp_path):
    ours = write_json(tmp_path / "ours.json", {"a": 1})
    records = list((tmp_path / STATE_DIR / "written").glob("*.json"))
    assert len(records) == 1
    record = json.loads(records[0].read_text())
    # someone rewrites the record to vouch for another file's content: the signature fails
    other = tmp_path / "other.json"
    other.write_text("{}")
    record["path"] = "other.json"
    records[0].write_text(json.dumps(record))
    assert not written_by_fieldfix(other)
    assert not written_by_fieldfix(ours)  # and the original record is gone, so nothing is trusted


def test_a_copied_folder_keeps_its_files_ours_by_content(tmp_path):
    import shutil

    write_json(tmp_path / "a" / "x.json", {"a": 1})
    shutil.copytree(tmp_path / "a", tmp_path / "b")  # new inodes and times
    assert written_by_fieldfix(tmp_path / "b" / "x.json")
    write_json(tmp_path / "b" / "x.json", {"a": 2}, overwrite=True)


def test_interruption_between_record_and_rename_keeps_both_versions_ours(tmp_path, monkeypatch):
    path = write_json(tmp_path / "x.json", {"v": 1})
    real_replace = os.replace
    calls = []

    def interrupted_replace(src, dst):
        if Path(dst) == path:
            calls.append(1)
            raise KeyboardInterrupt
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", interrupted_replace)
    with pytest.raises(KeyboardInterrupt):
        write_json(path, {"v": 2}, overwrite=True)
    monkeypatch.undo()
    assert calls and json.loads(path.read_text()) == {"v": 1}
    assert written_by_fieldfix(path)  # the old version is still vouched for
    write_json(path, {"v": 3}, overwrite=True)


def test_writes_through_a_link_that_leaves_the_folder_are_refused(tmp_path):
    out, elsewhere = tmp_path / "out", tmp_path / "elsewhere"
    out.mkdir()
    elsewhere.mkdir()
    (out / "sub-01").symlink_to(elsewhere, target_is_directory=True)
    with output_folder(out):
        with pytest.raises(OutputError, match="outside the output folder"):
            write_json(out / "sub-01" / "x.json", {})
        with pytest.raises(OutputError, match="outside the output folder"):
            output_paths_guard([out / ".." / "x.json"])
        with pytest.raises(OutputError, match="state folder"):
            write_json(out / STATE_DIR / "x.json", {})
    assert list(elsewhere.iterdir()) == []


def test_remove_output_deletes_only_our_files_inside_the_folder(tmp_path):
    out = tmp_path / "out"
    victim = tmp_path / "victim.txt"
    victim.write_text("keep me")
    with output_folder(out):
        ours = write_json(out / "ours.json", {})
        (out / "theirs.txt").write_text("keep me too")
        assert remove_output(ours) and not ours.exists()
        assert not remove_output(out / "theirs.txt")
        assert not remove_output(out / ".." / "victim.txt")
        assert not remove_output(victim)
    assert victim.read_text() == "keep me" and (out / "theirs.txt").exists()


def test_leftovers_of_dead_processes_are_removed_and_nothing_else(tmp_path):
    import subprocess
    import sys

    from fieldfix.outdir import host_label

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True).stdout.strip()
    (tmp_path / "sub").mkdir()
    leftover = tmp_path / "sub" / f".run.nii.gz.{host_label()}-{dead}.abcd1234.part.nii.gz"
    leftover.write_bytes(b"half")
    alive = tmp_path / f".run.nii.gz.{host_label()}-{os.getpid()}.abcd1234.part.nii.gz"
    alive.write_bytes(b"being written")
    users = tmp_path / ".run.nii.gz.part"
    users.write_bytes(b"a user's hidden file")
    assert remove_leftovers(tmp_path) == ["sub/" + leftover.name]
    assert alive.exists() and users.exists() and not leftover.exists()


def test_rollback_of_a_new_folder_leaves_nothing(tmp_path):
    from fieldfix.outdir import output_transaction

    out = tmp_path / "out"
    with pytest.raises(RuntimeError):
        with output_folder(out), output_transaction():
            save_image(out / "b0_hz.nii.gz", np.zeros((2, 2, 2)), np.eye(4))
            raise RuntimeError("later step")
    assert list(out.iterdir()) == []


# --------------------------------------------------------------------------- the batch cases
@pytest.fixture()
def finished_batch(tmp_path, fake_workflows):  # noqa: F811
    dataset = build_dataset(tmp_path / "bids" / "study")
    out = tmp_path / "deriv"
    first = batch.run_batch(dataset, out, jobs=1, participant_labels=["01"], reports=False)
    assert first["tasks"]["done"] > 0
    return dataset, out


def test_a_planted_marker_never_deletes_outside_the_derivatives(finished_batch, tmp_path):
    dataset, out = finished_batch
    victim = tmp_path / "victim.txt"
    victim.write_text("not fieldfix's")
    absolute = tmp_path / "absolute_victim.txt"
    absolute.write_text("not fieldfix's either")
    markers = sorted(out.rglob("*.fieldfix-task.json"))
    for marker in markers:  # a stale marker (hash changed) naming files outside the folder
        record = json.loads(marker.read_text())
        record["hash"] = "0" * 64
        record["outputs"] = {"a": {"path": os.path.relpath(victim, out), "size": victim.stat().st_size},
                             "b": {"path": str(absolute), "size": absolute.stat().st_size}}
        marker.write_text(json.dumps(record))
    again = batch.run_batch(dataset, out, jobs=1, participant_labels=["01"], reports=False)
    assert victim.read_text() == "not fieldfix's" and absolute.read_text() == "not fieldfix's either"
    log = json.loads((out / again["log"]).read_text())
    remarks = [r for t in log["tasks"] for r in t.get("remarks", [])]
    assert remarks and all("not written by fieldfix" in r for r in remarks)
    # the planted markers block their tasks (they are never replaced), with the reason given
    failed = [t for t in log["tasks"] if t["status"] == "failed"]
    assert failed and all("did not write" in t["reason"] for t in failed)


def test_a_foreign_file_at_a_derivative_name_is_never_replaced(finished_batch):
    dataset, out = finished_batch
    corrected = next(out.rglob("*desc-corrected_bold.nii.gz"))
    corrected.write_bytes(b"a colleague's file")
    again = batch.run_batch(dataset, out, jobs=1, participant_labels=["01"], reports=False, redo=True)
    assert corrected.read_bytes() == b"a colleague's file"
    assert again["exit_status"] == 1
    reasons = " ".join(f["reason"] for f in again["failures"])
    assert corrected.name in reasons and "never replaces" in reasons


def test_a_foreign_group_table_stops_the_batch_before_it_starts(finished_batch):
    from fieldfix_cli.main import main

    dataset, out = finished_batch
    table = out / "group" / "group_runs.csv"
    table.write_text("someone's own table")
    logs_before = sorted((out / "logs").iterdir())
    status = main(["batch", str(dataset), "--out", str(out), "--participant-label", "01", "--no-report",
                   "--quiet"])
    assert status == 2
    assert table.read_text() == "someone's own table"
    assert sorted((out / "logs").iterdir()) == logs_before


def test_staging_behind_a_planted_link_is_refused(finished_batch, tmp_path):
    dataset, out = finished_batch
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    work = out / ".fieldfix-work"
    if work.exists():
        work.rmdir()
    work.symlink_to(elsewhere, target_is_directory=True)
    again = batch.run_batch(dataset, out, jobs=1, participant_labels=["01"], reports=False, redo=True)
    assert list(elsewhere.iterdir()) == []
    assert again["exit_status"] == 1
    assert all("outside the output folder" in f["reason"] for f in again["failures"]
               if f["status"] == "failed")


# --------------------------------------------------------------------------- single commands
def test_overwrite_never_replaces_a_users_file_of_an_output_name(tmp_path, capsys):
    from fieldfix_cli.main import main
    from test_bad_input import make_b0, make_run

    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    out = tmp_path / "out"
    out.mkdir()
    users = out / "sub-01_task-rest_bold_jacobian.nii.gz"
    users.write_bytes(b"the user's own file")
    status = main(["unwarp", str(run), "--b0", str(b0), "--out", str(out), "--overwrite", "--no-report",
                   "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1 and str(users) in err[0] and "never replaces" in err[0]
    assert users.read_bytes() == b"the user's own file"
    assert sorted(p.name for p in out.iterdir()) == [users.name]


@pytest.mark.parametrize("tag", ["../../x_", "/tmp/x_", "sub/x_"])
def test_a_name_tag_with_folder_parts_is_refused(tmp_path, capsys, tag):
    from fieldfix_cli.main import main
    from test_bad_input import make_b0, make_run

    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    listing = sorted(tmp_path.rglob("*"))
    status = main(["unwarp", str(run), "--b0", str(b0), "--out", str(tmp_path / "a" / "b"), "--tag", tag,
                   "--no-report", "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1 and "--tag" in err[0] and "no folders" in err[0]
    assert sorted(tmp_path.rglob("*")) == listing


def test_report_overwrite_keeps_a_raw_sidecar_of_the_same_name(tmp_path, capsys):
    from fieldfix_cli.main import main
    from test_bad_input import make_b0, make_run

    run, b0 = make_run(tmp_path), make_b0(tmp_path)
    out = tmp_path / "out"
    assert main(["unwarp", str(run), "--b0", str(b0), "--out", str(out), "--no-report", "--quiet"]) == 0
    raw_sidecar = out / "report.json"  # e.g. a raw BIDS sidecar of an image named report.nii.gz
    raw_sidecar.write_text('{"RepetitionTime": 2.0}')
    status = main(["report", str(out), "--overwrite", "--quiet"])
    assert status == 2
    assert raw_sidecar.read_text() == '{"RepetitionTime": 2.0}'
    assert not (out / "report.html").exists()


def test_put_in_place_refuses_outside_the_active_folder(tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    temporary = out / ".t.part"
    temporary.write_text("x")
    with output_folder(out):
        with pytest.raises(OutputError, match="outside the output folder"):
            put_in_place(temporary, tmp_path / "x.txt")
        with pytest.raises(OutputError, match="outside the output folder"):
            with atomic_output(tmp_path / "y.txt"):
                pass
    assert not (tmp_path / "x.txt").exists() and not (tmp_path / "y.txt").exists()
    assert OutputFolder(out).contains(out / "a" / "b.txt")
