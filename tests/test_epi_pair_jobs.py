"""Reversed phase-encode EPI field maps and joint restoration through the jobs and the command line.

The data are simulated with fieldfix.simulate.epi (k-space line by line, each line at its own
time: it knows nothing of shift maps), so the field the job recovers is checked against the
field the simulation used; the field map then feeds `fieldfix unwarp` unchanged.
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from fieldfix.simulate import simulate_epi
from fieldfix_cli.main import main

SHAPE = (20, 32, 12)  # output grid; PE along j (32 lines)
VOXEL_MM = 3.0
ESP_S = 0.5e-3
READOUT_S = ESP_S * (SHAPE[1] - 1)


def _affine():
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[:3, 3] = -(np.array(SHAPE) - 1) / 2 * VOXEL_MM
    return affine


def _truth(oversample=2, bump_hz=45.0):
    fine = tuple(n * oversample for n in SHAPE)
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, n) for n in fine], indexing="ij")
    head = (x / 0.8) ** 2 + (y / 0.85) ** 2 + (z / 0.9) ** 2 < 1
    texture = 1.0 + 0.35 * np.cos(6 * x) * np.cos(5 * y) + 0.25 * np.sin(7 * z + 2 * y)
    obj = np.where(head, 800.0 * texture, 0.0)
    field = bump_hz * np.exp(-((x - 0.1) ** 2 + (y - 0.35) ** 2 + (z + 0.1) ** 2) / 0.3) - 10.0 * y
    return obj, field


def _coarse(field, oversample=2):
    return field.reshape(SHAPE[0], oversample, SHAPE[1], oversample, SHAPE[2], oversample).mean(axis=(1, 3, 5))


def _save(path: Path, data, sidecar):
    nib.save(nib.Nifti1Image(np.asarray(data, np.float32), _affine()), str(path))
    path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return path


def _pair_images(folder, obj, field) -> dict:
    """The spin-echo images of both polarities ('j' and 'j-'), saved with their sidecars."""
    rng = np.random.default_rng(3)
    paths = {}
    for code, label in (("j", "pa"), ("j-", "ap")):
        image = simulate_epi(obj, field, pe_code=code, echo_spacing_s=ESP_S, te_s=0.05, oversample=2,
                             noise_sd=4.0, rng=rng, spin_echo=True)
        paths[code] = _save(folder / f"sub-01_dir-{label}_epi.nii.gz", image,
                            {"PhaseEncodingDirection": code, "TotalReadoutTime": READOUT_S})
    return paths


@pytest.fixture(scope="module")
def pair(tmp_path_factory):
    folder = tmp_path_factory.mktemp("epi")
    obj, field = _truth()
    paths = _pair_images(folder, obj, field)
    run = simulate_epi(obj, field, pe_code="j-", echo_spacing_s=ESP_S, te_s=0.03, oversample=2)
    run_path = _save(folder / "sub-01_task-rest_bold.nii.gz", np.stack([run, run * 1.01], axis=-1),
                     {"PhaseEncodingDirection": "j-", "TotalReadoutTime": READOUT_S, "RepetitionTime": 2.0})
    return folder, paths, run_path, _coarse(field), _coarse(obj)


def test_epi_pair_field_map_recovers_the_simulated_field_and_feeds_unwarp(pair, capsys):
    folder, paths, run_path, field, obj = pair
    out = folder / "fmap"
    assert main(["fieldmap", "--epi-pair", str(paths["j"]), str(paths["j-"]), "--out", str(out), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["input_kind"] == "epi-pair" and summary["pair"]["pe_codes"] == ["j", "j-"]
    # the quality number: the two polarities agree far better after correction
    assert summary["pair"]["nrmsd_after"] < 0.5 * summary["pair"]["nrmsd_before"]
    b0 = nib.load(out / "b0_hz.nii.gz").get_fdata()
    mask = nib.load(out / "b0_mask.nii.gz").get_fdata() > 0
    inner = mask & (obj > 0)
    assert np.median(np.abs(b0 - field)[inner]) < 3.0  # Hz; the field spans about 70 Hz
    corrected = nib.load(out / "b0_epi_corrected.nii.gz")
    assert corrected.shape == SHAPE + (2,)
    confidence = nib.load(out / "b0_confidence.nii.gz").get_fdata()
    assert confidence[~mask].max() == 0 and confidence[mask].mean() > 0
    # the map is used as any other B0 map
    status = main(["unwarp", str(run_path), "--b0", str(out / "b0_hz.nii.gz"), "--out", str(folder / "corr"),
                   "--no-report", "--quiet"])
    assert status == 0
    unwarped = nib.load(folder / "corr" / "sub-01_task-rest_bold_corrected.nii.gz").get_fdata()[..., 0]
    raw = nib.load(run_path).get_fdata()[..., 0]
    head = obj > 0.2 * obj.max()
    assert np.sqrt(np.mean((unwarped - obj)[head] ** 2)) < 0.8 * np.sqrt(np.mean((raw - obj)[head] ** 2))


@pytest.fixture(scope="module")
def strong_pair(tmp_path_factory):
    """The pair of the same head with a 400 Hz bump instead of 45 Hz: pull-back Jacobians 0.37 .. 1.61 for
    'j' (1.63 .. 0.39 for 'j-'), so each polarity is clearly compressed somewhere. With the 45 Hz bump
    (Jacobians 0.92 .. 1.06) there is nothing for a second polarity to recover."""
    folder = tmp_path_factory.mktemp("epi_strong")
    obj, field = _truth(bump_hz=400.0)
    paths = _pair_images(folder, obj, field)
    return folder, paths, _coarse(field), _coarse(obj)


def test_joint_restoration_of_opposite_runs(strong_pair, capsys):
    folder, paths, field, obj = strong_pair
    jacobian = 1 + np.gradient(field * ESP_S * SHAPE[1], axis=1)
    head = obj > 0.2 * obj.max()
    assert jacobian[head].min() < 0.4 and jacobian[head].max() > 1.6
    b0 = folder / "truth_b0_hz.nii.gz"
    nib.save(nib.Nifti1Image(field.astype(np.float32), _affine()), str(b0))
    out = folder / "joint"
    status = main(["unwarp", str(paths["j"]), str(paths["j-"]), "--b0", str(b0), "--combine-polarities", "--out",
                   str(out), "--no-report", "--json"])
    assert status == 0, capsys.readouterr().err
    result = json.loads(capsys.readouterr().out)
    combined = nib.load(result["combined"]).get_fdata()
    singles = [nib.load(out / f"{p.name[:-7]}_corrected.nii.gz").get_fdata() for p in paths.values()]
    errors = [np.sqrt(np.mean((image - obj)[head] ** 2)) for image in (combined, *singles)]
    # better than either single polarity, each unwarped by the job's default interpolation (linear; measured:
    # 27.0 against 39.6 for j and 28.7 for j-; cubic single unwarps give 41.1 and 30.8)
    assert errors[0] < 0.97 * min(errors[1:])
    summary = json.loads((out / "sub-01_dir-pa_epi_combination.json").read_text())
    assert summary["kind"] == "combined" and summary["pe_codes"] == ["j", "j-"]


def _refused(capsys, argv, *names):
    status = main(argv)
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1, err
    for name in names:
        assert str(name) in err[0], (name, err[0])
    return err[0]


def test_bad_epi_pairs_are_refused_naming_the_file(pair, tmp_path, capsys):
    folder, paths, _, _, _ = pair
    out = tmp_path / "out"
    up = paths["j"]
    data = nib.load(up).get_fdata()
    same = _save(tmp_path / "same_dir-pa_epi.nii.gz", data, {"PhaseEncodingDirection": "j", "TotalReadoutTime": READOUT_S})
    line = _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(same), "--out", str(out)], up)
    assert "same phase-encode polarity" in line
    no_code = _save(tmp_path / "nocode_epi.nii.gz", data, {"TotalReadoutTime": READOUT_S})
    assert "no phase-encode code" in _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(no_code), "--out",
                                                        str(out)], no_code)
    no_time = _save(tmp_path / "notime_epi.nii.gz", data, {"PhaseEncodingDirection": "j-"})
    assert "readout timing" in _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(no_time), "--out",
                                                 str(out)], no_time)
    other = tmp_path / "other_epi.nii.gz"
    nib.save(nib.Nifti1Image(data[:, :, :10].astype(np.float32), _affine()), str(other))
    other.with_name("other_epi.json").write_text(json.dumps({"PhaseEncodingDirection": "j-",
                                                             "TotalReadoutTime": READOUT_S}))
    assert "share one grid" in _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(other), "--out", str(out)],
                                        other)
    nan = data.copy()
    nan[3, 3, 3] = np.nan
    bad = _save(tmp_path / "nan_epi.nii.gz", nan, {"PhaseEncodingDirection": "j-", "TotalReadoutTime": READOUT_S})
    assert "NaN" in _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(bad), "--out", str(out)], bad)
    assert "one per image" in _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(paths["j-"]),
                                                "--phase-encoding", "j", "j-", "j", "--out", str(out)],
                                       "--phase-encoding")
    assert "contradicts" in _refused(capsys, ["fieldmap", "--epi-pair", str(up), str(paths["j-"]),
                                              "--phase-encoding", "j-", "j", "--out", str(out)], up)
    assert not out.exists()
