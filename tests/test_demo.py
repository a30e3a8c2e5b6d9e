"""Tests of `fieldfix demo`: the whole job on an invented scenario, through the library and the console script."""

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from fieldfix.errors import InputError, OutputError
from fieldfix.workflows.demo import run_demo

sys.path.insert(0, str(Path(__file__).parent))
from test_scenarios import TINY  # noqa: E402

FIELDFIX = shutil.which("fieldfix") or str(Path(sys.executable).with_name("fieldfix"))


@pytest.fixture(scope="module")
def tiny_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("tiny-scenario")
    (folder / "scenario.json").write_text(json.dumps(TINY))
    return folder


@pytest.fixture(scope="module")
def demo_run(tiny_folder, tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    data = tmp_path_factory.mktemp("demo-data") / "ds"
    return out, data, run_demo(out, scenario=str(tiny_folder), dataset_dir=data)


def test_demo_runs_available_steps_and_checks_truth(demo_run):
    out, data, summary = demo_run
    steps = summary.steps
    assert steps["dataset"].status == "built"
    for name in ("field map", "unwarping", "dropout", "plan", "report"):
        assert steps[name].status == "done", (name, steps[name])
    assert (out / "b0_hz.nii.gz").is_file()
    assert Path(summary.report).is_file()
    on_disk = json.loads((out / "demo_summary.json").read_text())
    assert on_disk["scenario"] == "tiny-test"
    n = summary.checks_against_truth
    # the field-map workflow recovers the modelled field (ground truth of the scenario)
    assert n.b0_error_vs_truth_median_hz < 3.0
    assert n.max_abs_shift_vox > 0
    assert "invented" in summary.caution


def test_demo_refuses_to_overwrite_then_reuses_dataset(demo_run, tiny_folder):
    out, data, _ = demo_run
    with pytest.raises(OutputError):
        run_demo(out, scenario=str(tiny_folder), dataset_dir=data)
    again = run_demo(out, scenario=str(tiny_folder), dataset_dir=data, overwrite=True)
    assert again.steps["dataset"].status == "reused"


def test_demo_will_not_build_into_a_foreign_folder(tmp_path, tiny_folder):
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep")
    with pytest.raises(OutputError):
        run_demo(tmp_path / "out", scenario=str(tiny_folder), dataset_dir=foreign)
    assert (foreign / "notes.txt").read_text() == "keep"


def test_unknown_scenario(tmp_path):
    with pytest.raises(InputError, match="orbitofrontal-3t"):
        run_demo(tmp_path / "out", scenario="no-such-study")


@pytest.mark.slow
def test_console_script(tiny_folder, tmp_path):
    out = tmp_path / "cli-out"
    res = subprocess.run([FIELDFIX, "demo", "--scenario", str(tiny_folder), "--out", str(out)],
                         capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stderr
    assert "open the report" in res.stdout and str(out) in res.stdout
    assert "not a medical device" in res.stdout
    assert json.loads((out / "demo_summary.json").read_text())["scenario"] == "tiny-test"
    bad = subprocess.run([FIELDFIX, "demo", "--scenario", "no-such-study", "--out", str(tmp_path / "x")],
                         capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2
    assert len(bad.stderr.strip().splitlines()) == 1 and "no-such-study" in bad.stderr


@pytest.mark.slow
def test_sample_scenario_end_to_end(tmp_path):
    summary = run_demo(tmp_path / "out", scenario="orbitofrontal-3t", dataset_dir=tmp_path / "ds")
    n = summary.checks_against_truth
    assert summary.steps["field map"].status == "done"
    assert n.b0_error_vs_truth_median_hz < 3.0
    # unwarping puts edges back where the undistorted simulation has them; the region above the
    # sinuses loses signal to dropout (fact of the trade), but keeps most of it at 3 T
    # The shift the unwarping used is the true field's to a tenth of a voxel in the brain; where it
    # moves voxels, edges agree better with the undistorted truth afterwards, most of the way to what
    # the true field itself gives; over the whole brain the number barely moves either way.
    assert n.shift_error_vs_truth_median_vox < 0.1 and n.shift_error_vs_truth_p95_vox < 0.5
    gain, attainable = (n.edge_agreement_shifted_after - n.edge_agreement_shifted_before,
                        n.edge_agreement_shifted_true_field - n.edge_agreement_shifted_before)
    assert attainable > 0.02 and gain > 0.6 * attainable, (gain, attainable)
    assert n.edge_agreement_after > n.edge_agreement_before - 0.01
    assert 0.4 < n.roi_signal_kept < 0.98
    # the dropout workflow's prediction (sinc of the through-slice gradient) agrees with the EPI
    # simulation's sub-slice integration of the same field, independently computed
    assert abs(n.dropout_roi_mean_retention - n.roi_signal_kept) < 0.1


@pytest.mark.slow
def test_seven_tesla_scenario_end_to_end(tmp_path):
    """Large but plausible shifts beside the air cavities are corrected with a warning, not refused."""
    summary = run_demo(tmp_path / "out", scenario="temporal-7t")
    n = summary.checks_against_truth
    assert summary.steps["unwarping"].status == "done" and summary.steps["report"].status == "done"
    assert summary.dataset == str(tmp_path / "out" / "dataset")  # built inside the output folder
    assert n.b0_error_vs_truth_median_hz < 3.0
    assert n.max_abs_shift_vox > 0.25 * 128  # beside the cavities, beyond a quarter of the field of view
    assert any("large shifts" in w for w in summary.warnings)
    unwarp = json.loads((tmp_path / "out" / "sub-01_task-memory_bold_unwarp.json").read_text())
    assert unwarp["large_shifts"] and unwarp["signal_p99_abs_shift_vox"] < 0.5 * 128
    assert n.edge_agreement_shifted_after > n.edge_agreement_shifted_before
