"""Faults during writing: interruption and a full disk leave no partial output.

* SIGINT / SIGTERM sent to ``fieldfix unwarp`` (the real console script) while it streams a
  4D run: exit status 130, a clear message, and no output file at all. The signal is sent
  once the streaming writer's temporary file has started to grow (a progress signal seen
  on disk, not a sleep).
* A full disk (ENOSPC) during the streamed 4D write or during a later image write,
  simulated in process by patching the file under the gzip stream or the image save, with the command run
  through ``fieldfix_cli.main.main([...])``: exit status 2, one line naming the output and
  the problem, no partial output.
* A real full disk on a tiny tmpfs (only where mounting is permitted; skipped otherwise).
* All or nothing: a command that fails after some outputs are in place removes them again,
  and a failed ``--overwrite`` re-run restores the earlier outputs
  (:func:`fieldfix.io.output_transaction`, used by the command frame).
"""

from __future__ import annotations

import errno
import os
import signal
import subprocess
import time
from pathlib import Path

import numpy as np
import pytest
from _mounts import mounted_tmpfs

from test_bad_input import SCRIPT, field_hz, grid_affine, make_b0, make_run, run_data, write_image

RUN_NAME = "sub-01_task-rest_bold.nii.gz"


def _listing(folder: Path) -> list[str]:
    """Everything in the folder, hidden temporary files included (not fieldfix's state folder,
    which holds the signed record of what fieldfix wrote there)."""
    from fieldfix.outdir import STATE_DIR

    return sorted(p.name for p in folder.iterdir() if p.name != STATE_DIR) if folder.exists() else []


# ---------------------------------------------------------------------------------------------
# Interruption of the real console script mid-write.
# ---------------------------------------------------------------------------------------------
BIG_SHAPE = (64, 64, 32)
BIG_VOLUMES = 240  # 240 x 0.5 MB of float32 to compress: a few seconds of streaming


@pytest.fixture(scope="module")
def big_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("big")
    rng = np.random.default_rng(0)
    base = rng.integers(200, 1000, BIG_SHAPE, dtype=np.int16)
    data = np.empty(BIG_SHAPE + (BIG_VOLUMES,), np.int16)
    for t in range(BIG_VOLUMES):
        data[..., t] = base + rng.integers(-50, 50, BIG_SHAPE, dtype=np.int16)
    affine = grid_affine(BIG_SHAPE)
    run = write_image(folder / "sub-01_task-rest_bold.nii", data, affine, dtype=np.int16, tr_s=2.0,
                      sidecar={"PhaseEncodingDirection": "j-", "TotalReadoutTime": 0.03})
    b0 = write_image(folder / "b0_hz.nii.gz", field_hz(BIG_SHAPE, peak_hz=20.0), affine)
    return run, b0


def _wait_for_growing_part_file(out: Path, proc: subprocess.Popen, min_bytes: int, timeout_s: float = 120) -> Path:
    """Block until the streamed output's temporary file exists and holds `min_bytes`."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise AssertionError(f"fieldfix ended (status {proc.returncode}) before the write was under way: "
                                 f"{proc.stderr.read()}")
        for part in (out.glob(".*corrected*.part*") if out.exists() else []):
            try:
                if part.stat().st_size >= min_bytes:
                    return part
            except FileNotFoundError:
                pass
        time.sleep(0.01)
    raise AssertionError("the streamed write did not start in time")


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_signal_during_4d_write_leaves_no_output(tmp_path, big_run, signum):
    run, b0 = big_run
    before = {p: p.read_bytes() for p in (run, b0)}
    out = tmp_path / "out"
    proc = subprocess.Popen([SCRIPT, "unwarp", str(run), "--b0", str(b0), "--out", str(out)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        part = _wait_for_growing_part_file(out, proc, min_bytes=256 * 1024)
        proc.send_signal(signum)
        _, stderr = proc.communicate(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 130, stderr
    lines = stderr.strip().splitlines()
    assert len(lines) == 1 and "interrupted" in lines[0] and "removed" in lines[0], stderr
    assert not part.exists()
    assert _listing(out) == []
    for path, content in before.items():
        assert path.read_bytes() == content


# ---------------------------------------------------------------------------------------------
# A full disk, simulated in process.
# ---------------------------------------------------------------------------------------------
def _small_inputs(folder: Path, n_volumes=6):
    run = make_run(folder, data=run_data(n_volumes))
    return run, make_b0(folder)


def _main(argv) -> int:
    from fieldfix_cli.main import main

    return main([str(a) for a in argv])


def _enospc(*_args, **_kwargs):
    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def test_full_disk_during_the_streamed_4d_write(tmp_path, monkeypatch, capsys):
    run, b0 = _small_inputs(tmp_path)
    out = tmp_path / "out"
    from fieldfix._gzip_io import HashingWriter

    real_write = HashingWriter.write
    calls = {"n": 0}

    def failing_write(self, data):  # the bytes that reach the disk (after compression)
        calls["n"] += 1
        if calls["n"] == 4:  # the first blocks go through; a later one hits a full disk
            _enospc()
        return real_write(self, data)

    monkeypatch.setattr(HashingWriter, "write", failing_write)
    status = _main(["unwarp", run, "--b0", b0, "--out", out])
    err = capsys.readouterr().err
    assert calls["n"] >= 4  # the fault was really hit
    assert status == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "No space left on device" in lines[0] and "_corrected.nii.gz" in lines[0], err
    assert _listing(out) == []


def test_full_disk_on_a_later_output_leaves_no_partial_set(tmp_path, monkeypatch, capsys):
    run, b0 = _small_inputs(tmp_path)
    out = tmp_path / "out"
    import fieldfix.io

    real_save = fieldfix.io._write_nifti
    calls = {"n": 0}

    def failing_save(image, filename, *effort):
        calls["n"] += 1
        if calls["n"] == 2:  # the corrected run is streamed; this is the second image saved
            with open(filename, "wb") as handle:
                handle.write(b"partial")
            _enospc()
        return real_save(image, filename, *effort)

    monkeypatch.setattr(fieldfix.io, "_write_nifti", failing_save)
    status = _main(["unwarp", run, "--b0", b0, "--out", out])
    err = capsys.readouterr().err
    assert calls["n"] == 2
    assert status == 2 and "No space left on device" in err, err
    assert _listing(out) == []


def test_full_disk_in_the_field_map_job(tmp_path, monkeypatch, capsys):
    from test_bad_input import make_magnitude, make_phasediff
    import fieldfix.io

    pd, mag = make_phasediff(tmp_path), make_magnitude(tmp_path)
    monkeypatch.setattr(fieldfix.io, "_write_nifti", _enospc)
    status = _main(["fieldmap", "--phase-diff", pd, "--magnitude", mag, "--out", tmp_path / "out"])
    err = capsys.readouterr().err
    assert status == 2, err
    assert len(err.strip().splitlines()) == 1 and "No space left on device" in err
    assert _listing(tmp_path / "out") == []


# ---------------------------------------------------------------------------------------------
# A real full disk: a tiny tmpfs (root with mount permission only).
# ---------------------------------------------------------------------------------------------
@pytest.fixture
def tiny_disk(tmp_path):
    mount_point = tmp_path / "tiny"
    mount_point.mkdir()
    with mounted_tmpfs(mount_point, "size=256k"):
        yield mount_point


def test_real_full_disk_on_tmpfs(tmp_path, tiny_disk):
    # 8 KB of poorly compressible float32 per volume x 120 volumes cannot fit in 256 KB.
    rng = np.random.default_rng(1)
    run = make_run(tmp_path, data=rng.normal(500, 100, (16, 16, 8, 120)))
    b0 = make_b0(tmp_path)
    before = {p: p.read_bytes() for p in (run, b0)}
    out = tiny_disk / "out"
    result = subprocess.run([SCRIPT, "unwarp", str(run), "--b0", str(b0), "--out", str(out)],
                            capture_output=True, text=True, timeout=120)
    lines = result.stderr.strip().splitlines()
    assert result.returncode == 2, result.stderr
    assert len(lines) == 1 and "No space left on device" in lines[0], result.stderr
    assert _listing(out) == []
    assert sum(f.stat().st_size for f in tiny_disk.rglob("*") if f.is_file()) == 0
    for path, content in before.items():
        assert path.read_bytes() == content


# ---------------------------------------------------------------------------------------------
# All or nothing: the output transaction.
# ---------------------------------------------------------------------------------------------
def test_transaction_removes_new_and_restores_replaced_files(tmp_path):
    from fieldfix.io import output_transaction, save_image, write_json

    write_json(tmp_path / "kept.json", {"version": 1})
    with pytest.raises(KeyboardInterrupt):
        with output_transaction():
            save_image(tmp_path / "new.nii.gz", np.zeros((2, 2, 2)), np.eye(4))
            write_json(tmp_path / "kept.json", {"version": 2}, overwrite=True)
            write_json(tmp_path / "kept.json", {"version": 3}, overwrite=True)
            assert (tmp_path / "new.nii.gz").exists()
            raise KeyboardInterrupt
    assert _listing(tmp_path) == ["kept.json"]
    assert (tmp_path / "kept.json").read_text().count('"version": 1') == 1
    # On success the new files stay and nothing set aside is left behind.
    with output_transaction():
        write_json(tmp_path / "kept.json", {"version": 4}, overwrite=True)
        with output_transaction():  # nested blocks join the outer one
            write_json(tmp_path / "other.json", {})
    assert _listing(tmp_path) == ["kept.json", "other.json"]
    assert '"version": 4' in (tmp_path / "kept.json").read_text()


def test_failed_overwrite_rerun_restores_the_earlier_outputs(tmp_path, monkeypatch, capsys):
    """--overwrite with a fault half-way: the earlier outputs come back byte for byte."""
    import fieldfix.io

    run, b0 = _small_inputs(tmp_path)
    out = tmp_path / "out"
    assert _main(["unwarp", run, "--b0", b0, "--out", out]) == 0
    first = {name: (out / name).read_bytes() for name in _listing(out)}
    real_save = fieldfix.io._write_nifti
    calls = {"n": 0}

    def failing_save(image, filename, *effort):
        calls["n"] += 1
        if calls["n"] == 3:
            _enospc()
        return real_save(image, filename, *effort)

    monkeypatch.setattr(fieldfix.io, "_write_nifti", failing_save)
    capsys.readouterr()
    status = _main(["unwarp", run, "--b0", b0, "--out", out, "--overwrite", "--readout-time", "20ms",
                    "--timing-wins", "arguments"])
    assert status == 2 and "No space left on device" in capsys.readouterr().err
    assert {name: (out / name).read_bytes() for name in _listing(out)} == first
