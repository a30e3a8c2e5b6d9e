"""The planner's figure of merit, protocol timing, modelled field, ROI by label, pilot geometry
and refusals."""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest
import scipy.integrate
import scipy.optimize

from fieldfix import plan
from fieldfix import plan_merit as pm
from fieldfix.errors import InputError
from fieldfix_cli.main import main as cli_main

from test_plan import _sphere_scenario, air_sphere_field_hz

T2STAR = 0.045
TES = [0.02, 0.025, 0.03, 0.035, 0.04, 0.045, 0.05, 0.055, 0.06, 0.07]


# --------------------------------------------------------------------------- analytic checks
def test_bold_contrast_peaks_at_te_equal_t2star():
    # d/dTE [TE exp(-TE/T2*)] = exp(-TE/T2*) (1 - TE/T2*) = 0 at TE = T2* (analytic optimum)
    found = scipy.optimize.minimize_scalar(lambda t: -pm.bold_contrast(t, T2STAR), bounds=(1e-3, 0.2),
                                           method="bounded", options={"xatol": 1e-8})
    assert found.x == pytest.approx(T2STAR, rel=1e-5)
    assert float(pm.bold_contrast(T2STAR, T2STAR)) == pytest.approx(T2STAR / np.e)


def test_tsnr_model_limits():
    # Krueger and Glover 2001: tSNR = SNR0 / sqrt(1 + lambda^2 SNR0^2); -> 1/lambda for large SNR0
    assert float(pm.tsnr(50.0, 0.0)) == 50.0
    assert float(pm.tsnr(1e9, 0.01)) == pytest.approx(100.0, rel=1e-6)
    assert float(pm.tsnr(100.0, 0.01)) == pytest.approx(100.0 / np.sqrt(2.0))


def test_readout_decay_matches_numerical_mean():
    for length in (0.01, 0.03, 0.08):
        mean, _ = scipy.integrate.quad(lambda t: np.exp(-t / T2STAR), 0.0, length)
        assert pm.readout_decay(length, T2STAR) == pytest.approx(mean / length, rel=1e-10)


def test_timing_arithmetic():
    assert pm.readout_s(64, 5e-4, 0.75) == pytest.approx(0.024)
    assert float(pm.slice_time_s(0.03, 64, 5e-4)) == pytest.approx(0.006 + 0.03 + 0.016)
    assert float(pm.volume_tr_s(41, 0.05, 2)) == pytest.approx(21 * 0.05)
    assert pm.default_t2star_s(3.0) == 0.045 and pm.default_t2star_s(7.0) == 0.027
    assert 0.027 < pm.default_t2star_s(5.0) < 0.045


def _flat_scene():
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    return affine, np.zeros_like(b0), b0, roi, brain


def test_no_field_thermal_noise_fixed_tr_recommends_te_at_t2star():
    affine, flat, _, roi, brain = _flat_scene()
    spec = plan.SweepSpec(thickness_mm=(3.0,), te_s=tuple(TES), echo_spacing_s=5e-4, fixed_tr_s=2.5,
                          physiology=pm.Physiology(t2star_s=T2STAR, lambda_physio=0.0))
    rows = plan.sweep(flat, affine, roi, brain, spec)
    assert rows[0].te_s == T2STAR
    choice, _ = plan.recommend(rows, tolerance=0.0, ranking=spec.ranking)
    assert choice.te_s == T2STAR
    # the figure of merit is TE exp(-TE/T2*) up to a constant when only the echo time changes
    expected = pm.bold_contrast(np.array([r.te_s for r in rows]), T2STAR)
    assert np.allclose([r.merit for r in rows], expected / expected.max())


def test_no_field_default_model_prefers_thick_slices_and_te_near_t2star():
    affine, flat, _, roi, brain = _flat_scene()
    rows = plan.sweep(flat, affine, roi, brain, thickness_mm=[2.0, 3.0, 4.0], te_s=TES, echo_spacing_s=5e-4)
    choice, reason = plan.recommend(rows, ranking="efficiency")
    assert choice.thickness_mm == 4.0
    assert 0.8 * T2STAR <= choice.te_s <= 1.4 * T2STAR
    assert "BOLD contrast-to-noise" in reason


def test_physiological_noise_moves_the_optimum_to_longer_te():
    affine, flat, _, roi, brain = _flat_scene()
    best = {}
    for lam in (0.0, 0.05):
        rows = plan.sweep(flat, affine, roi, brain, thickness_mm=[3.0], te_s=TES, echo_spacing_s=5e-4, fixed_tr_s=2.5,
                          physiology=pm.Physiology(lambda_physio=lam))
        best[lam] = rows[0].te_s
    assert best[0.05] > best[0.0] == T2STAR


def test_beside_air_cavity_the_recommendation_moves_to_shorter_te():
    affine, flat, b0, roi, brain = _flat_scene()
    kwargs = dict(thickness_mm=[2.0, 3.0, 4.0], te_s=TES, echo_spacing_s=5e-4)
    calm = plan.recommend(plan.sweep(flat, affine, roi, brain, **kwargs), ranking="efficiency")[0]
    cavity = plan.recommend(plan.sweep(b0, affine, roi, brain, **kwargs), ranking="efficiency")[0]
    assert cavity.te_s < calm.te_s
    assert cavity.thickness_mm <= calm.thickness_mm


def test_merit_follows_the_simulated_roi_signal():
    """The sweep's retention x TE exp(-TE/T2*) ranks protocols as the EPI simulator's ROI signal does."""
    from fieldfix.simulate.epi import simulate_epi

    affine, xyz, b0, roi, brain, centre, radius, _ = _sphere_scenario()
    sub = 8  # sub-slices per 3 mm voxel along z: the simulator integrates the through-slice dephasing
    offsets = ((np.arange(sub) + 0.5) / sub - 0.5) * 3.0
    fine_xyz = np.repeat(xyz, sub, axis=2)
    fine_xyz[..., 2] += np.tile(offsets, xyz.shape[2])[None, None, :]
    fine_b0 = air_sphere_field_hz(fine_xyz, centre, radius)
    obj = np.repeat(brain.astype(float), sub, axis=2)
    spec = dict(thickness_mm=[3.0], te_s=[0.02, 0.035, 0.05], echo_spacing_s=2e-5, pe_signs=(1,),
                physiology=pm.Physiology(lambda_physio=0.0), fixed_tr_s=2.5)
    rows = plan.sweep(b0, affine, roi, brain, **spec)
    simulated = {}
    for te in spec["te_s"]:
        image = simulate_epi(obj, fine_b0, pe_code="j", echo_spacing_s=2e-5, te_s=te,
                             oversample=(1, 1, sub), slice_axis=2, t2star_s=None)
        simulated[te] = float(np.median(image[roi])) * float(pm.bold_contrast(te, T2STAR))
    order_sim = sorted(simulated, key=simulated.get, reverse=True)
    assert [r.te_s for r in rows] == order_sim


# --------------------------------------------------------------------------- files, modelled field, refusals
def _files(tmp_path):
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    paths = {}
    labels = np.where(roi, 12, np.where(brain, 4, 0))
    for name, data in (("b0", b0), ("roi", roi), ("brain", brain), ("labels", labels)):
        paths[name] = tmp_path / f"{name}.nii.gz"
        nib.save(nib.Nifti1Image(data.astype(np.float32), affine), str(paths[name]))
    return paths


def _argv(paths, out, *extra):
    return ["plan", "--b0", str(paths["b0"]), "--roi", str(paths["roi"]), "--te", "25ms,45ms", "--thickness",
            "2mm,3mm", "--echo-spacing", "0.5ms", "--out", str(out), "--quiet", *extra]


def test_roi_by_label_gives_the_same_plan_as_the_mask(tmp_path, capsys):
    paths = _files(tmp_path)
    assert cli_main(_argv(paths, tmp_path / "a", "--json")) == 0
    by_mask = json.loads(capsys.readouterr().out)
    argv = _argv(paths, tmp_path / "b", "--json")
    argv[argv.index(str(paths["roi"]))] = str(paths["labels"])
    assert cli_main(argv + ["--roi-label", "12"]) == 0
    by_label = json.loads(capsys.readouterr().out)
    assert by_label["recommended"] == by_mask["recommended"] and by_label["ranking"] == "efficiency"


@pytest.mark.parametrize("extra, pattern", [
    (["--t2star", "300ms"], "T2"), (["--t2star", "3ms"], "T2"), (["--time-per-slice", "150ms", "--max-tr", "120ms"], "shorter than one slice"),
    (["--time-per-slice", "150ms", "--tr", "120ms"], "shorter than one slice"), (["--roi-label", "99"], "not present"),
])
def test_refusals_are_one_line_exit_2_nothing_written(tmp_path, capsys, extra, pattern):
    paths = _files(tmp_path)
    out = tmp_path / "out"
    argv = _argv(paths, out, *extra)
    if "--roi-label" in extra:
        argv[argv.index(str(paths["roi"]))] = str(paths["labels"])
    assert cli_main(argv) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1 and pattern.lower() in err[0].lower(), err
    assert not out.exists() or not any(out.iterdir())


def test_plan_without_field_map_uses_the_modelled_field(tmp_path, capsys):
    from fieldfix.plan_field import ModelledField, modelled_field

    model = modelled_field(ModelledField())
    roi = np.zeros(model.labels.shape, np.float32)
    i, j, k = np.argwhere(model.brain_mask).mean(axis=0).astype(int)
    roi[i - 2:i + 2, j - 2:j + 2, k - 2:k + 2] = 1.0
    nib.save(nib.Nifti1Image(roi, model.affine), str(tmp_path / "roi.nii.gz"))
    out = tmp_path / "model"
    assert cli_main(["plan", "--roi", str(tmp_path / "roi.nii.gz"), "--te", "30ms,45ms", "--thickness", "3mm",
                     "--echo-spacing", "0.5ms", "--field-strength", "7T", "--pitch", "10deg", "--out", str(out),
                     "--json", "--quiet"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["field_source"] == "modelled" and summary["reason"].startswith("Modelled")
    saved = json.loads((out / "plan.json").read_text())
    assert saved["b0"].startswith("modelled") and saved["parameters"]["t2star_s"] == 0.027
    # the modelled field is written for dropout --b0 before the study
    field = nib.load(str(out / "plan_modelled_b0_hz.nii.gz"))
    assert field.shape == model.labels.shape and np.isfinite(np.asarray(field.dataobj)).all()
    assert cli_main(["dropout", "--b0", str(out / "plan_modelled_b0_hz.nii.gz"), "--te", "30ms", "--thickness",
                     "3mm", "--out", str(tmp_path / "drop"), "--quiet"]) == 0


def test_modelled_field_from_a_label_image(tmp_path, capsys):
    from fieldfix.plan_field import ModelledField, modelled_field
    from fieldfix.susceptibility import HEAD_LABEL_SUSCEPTIBILITY_PPM, HEAD_LABELS, head_model

    how = ModelledField(voxel_mm=6.0, shape=(30, 36, 36))
    hm = head_model(how.shape, how.voxel_mm)
    nib.save(nib.Nifti1Image(hm.labels.astype(np.float32), hm.affine), str(tmp_path / "labels.nii.gz"))
    roi = np.zeros(hm.labels.shape, np.float32)
    i, j, k = np.argwhere(hm.brain_mask).mean(axis=0).astype(int)
    roi[i - 2:i + 2, j - 2:j + 2, k - 2:k + 2] = 1.0
    nib.save(nib.Nifti1Image(roi, hm.affine), str(tmp_path / "roi.nii.gz"))
    table = ",".join(f"{k}={v}" for k, v in HEAD_LABEL_SUSCEPTIBILITY_PPM.items())
    base = ["plan", "--roi", str(tmp_path / "roi.nii.gz"), "--te", "30ms,45ms", "--thickness", "3mm",
            "--echo-spacing", "0.5ms", "--model-labels", str(tmp_path / "labels.nii.gz"), "--model-brain",
            str(HEAD_LABELS["brain"]), "--quiet", "--json"]
    assert cli_main(base + ["--model-table", table, "--out", str(tmp_path / "a")]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["field_source"] == "modelled"
    # the label image route and the built-in head give the same plan (crisp labels vs partial volume)
    from fieldfix.workflows.plan import run_plan
    built_in = run_plan(None, tmp_path / "b", roi_path=tmp_path / "roi.nii.gz", te_s=[0.03, 0.045],
                        thickness_mm=[3.0], echo_spacing_s=5e-4, model=how)
    assert built_in.recommended.te_s == summary["recommended"]["te_s"] == 0.045  # near the 3 T T2*, calm centre
    from fieldfix.plan_field import field_from_label_image

    crisp = field_from_label_image(hm.labels, hm.affine, HEAD_LABEL_SUSCEPTIBILITY_PPM, [HEAD_LABELS["brain"]], how)
    smooth = modelled_field(how)
    inside = hm.brain_mask
    assert np.corrcoef(crisp.b0_hz[inside], smooth.b0_hz[inside])[0, 1] > 0.9
    # a label without a susceptibility: one line, exit 2, nothing written
    assert cli_main(base + ["--model-table", "0=0.36,4=-9.04", "--out", str(tmp_path / "c")]) == 2
    err = [line for line in capsys.readouterr().err.splitlines() if line.strip()]
    assert len(err) == 1 and "no susceptibility" in err[0] and "labels.nii.gz" in err[0]
    assert not (tmp_path / "c").exists() or not any((tmp_path / "c").iterdir())


def test_pilot_image_sets_geometry_and_timing(tmp_path):
    from fieldfix.workflows._plan_pilot import spec_from_pilot

    affine = np.array([[0.0, 0.0, 2.5, 0], [2.0, 0.0, 0.0, 0], [0.0, 2.0, 0.0, 0], [0, 0, 0, 1.0]])
    path = tmp_path / "pilot_bold.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros((80, 90, 30), np.float32), affine), str(path))
    (tmp_path / "pilot_bold.json").write_text(json.dumps({"PhaseEncodingDirection": "j-", "EchoTime": 0.032,
                                                          "EffectiveEchoSpacing": 0.00055, "PartialFourier": 0.75}))
    spec = spec_from_pilot(path, plan.SweepSpec(), given={"te_s"})
    # voxel axis 2 (slices) runs along world x: sagittal; axis 1 (PE) along world z
    assert spec.orientation == "sagittal" and spec.pe_world_axis == "z" and spec.pe_lines == 90
    assert spec.inplane_mm == 2.0 and spec.thickness_mm == (2.5,) and spec.echo_spacing_s == 0.00055
    assert spec.partial_fourier == 0.75 and spec.te_s == (0.03,)


def test_tr_warning_when_no_protocol_fits(tmp_path):
    from fieldfix.workflows.plan import run_plan

    paths = _files(tmp_path)
    summary = run_plan(paths["b0"], tmp_path / "w", roi_path=paths["roi"], te_s=[0.045], thickness_mm=[2.0],
                       echo_spacing_s=5e-4, max_tr_s=0.2)
    assert summary.warnings and "TR limit" in summary.warnings[0]
    assert not summary.recommended.tr_s <= 0.2


def test_physiology_refuses_implausible_t2star():
    with pytest.raises(InputError, match="t2star_s"):
        pm.Physiology(t2star_s=0.001)


def test_cli_like_takes_echo_time_thickness_and_timing_from_the_pilot(tmp_path, capsys):
    paths = _files(tmp_path)
    affine = nib.load(str(paths["b0"])).affine
    pilot = tmp_path / "pilot_bold.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros((28, 30, 30, 2), np.float32), affine), str(pilot))
    (tmp_path / "pilot_bold.json").write_text(json.dumps({"PhaseEncodingDirection": "j", "EchoTime": 0.03,
                                                          "EffectiveEchoSpacing": 0.0005}))
    out = tmp_path / "like"
    assert cli_main(["plan", "--b0", str(paths["b0"]), "--roi", str(paths["roi"]), "--like", str(pilot), "--out",
                     str(out), "--json", "--quiet"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["ranking"] == "efficiency" and summary["metric"] == "bold_sensitivity"
    assert summary["recommended"]["te_s"] == 0.03 and summary["recommended"]["thickness_mm"] == 3.0
    saved = json.loads((out / "plan.json").read_text())
    assert saved["parameters"]["pe_lines"] == 30 and saved["parameters"]["orientation"] == "axial"
    # slice time from the protocol: 6 ms + TE + 15 lines x 0.5 ms
    assert saved["recommended"]["slice_time_s"] == pytest.approx(0.006 + 0.03 + 15 * 0.0005)
