"""Tests of fieldfix.fieldmap, fieldfix.workflows.fieldmap and the ``fieldfix fieldmap`` command.

External references: the field follows from the phase gained between two echo times,
b0 = dphi / (2 pi dTE), unaliased within +-1/(2 dTE) (common practice, no source); the proton
gyromagnetic ratio from scipy.constants (CODATA); harmonic functions (analytic) for the
extension; scipy.ndimage.gaussian_filter for the smoothing; the simulator's known field.
"""

import numpy as np
import pytest
import scipy.constants
import scipy.ndimage as ndi

from fieldfix.errors import UnitError
from fieldfix.fieldmap import (
    b0_from_echoes,
    b0_from_map,
    b0_from_phase_difference,
    extend_harmonic,
    field_to_hz,
    find_outliers,
    hz_to_units,
    smooth_masked,
    unaliased_range_hz,
)
from fieldfix.phase import phase_difference
from fieldfix.simulate.gradient_echo import head_field_hz, simulate_gradient_echo

TWO_PI = 2 * np.pi
SHAPE = (48, 48, 32)
VOXEL_MM = (3.0, 3.0, 3.0)


def test_snr30_several_wraps_rms_under_1hz_and_no_2pi_errors():
    # echo spacing 10 ms: unaliased range +-50 Hz; the field spans about 2.5 cycles
    tes = (5e-3, 15e-3)
    d = simulate_gradient_echo(head_field_hz(SHAPE, amplitude_hz=250.0), tes, snr=30.0, rng=0)
    dte = tes[1] - tes[0]
    assert np.ptp(d.b0_hz[d.object_mask]) * dte > 2.0  # several wraps
    res = b0_from_echoes(d.echoes, tes, voxel_size_mm=VOXEL_MM, smooth_fwhm_mm=4.0)  # automatic mask
    assert res.n_offset_changed > 1000
    eroded = ndi.binary_erosion(res.mask, iterations=2)
    err = (res.b0_hz - d.b0_hz)[eroded]
    assert np.sqrt(np.mean(err**2)) < 1.0
    # no voxel of the mask off by a multiple of 2 pi (i.e. of 1/dTE in Hz)
    cycles = np.round((res.raw_b0_hz - d.b0_hz)[res.mask] * dte)
    assert np.count_nonzero(cycles) == 0
    assert res.unaliased_range_hz == pytest.approx(50.0)


def test_three_echoes_unequal_spacing_recover_field_that_wraps_at_first_pair():
    tes = (2e-3, 5e-3, 6e-3)  # first pair: +-167 Hz; shortest spacing (5-6 ms): +-500 Hz
    d = simulate_gradient_echo(head_field_hz(SHAPE, amplitude_hz=450.0), tes, snr=40.0, rng=1)
    m = d.object_mask
    assert np.abs(d.b0_hz[m]).max() > unaliased_range_hz(tes[1] - tes[0])  # wraps at the first pair
    # the first pair alone (without spatial unwrapping) aliases
    dphi, _ = phase_difference(d.echoes[0], d.echoes[1])
    naive = dphi / (TWO_PI * (tes[1] - tes[0]))
    assert np.max(np.abs(naive - d.b0_hz)[m]) > 100.0
    res = b0_from_echoes(d.echoes, tes, mask=m, voxel_size_mm=VOXEL_MM)
    err = (res.raw_b0_hz - d.b0_hz)[ndi.binary_erosion(m, iterations=1)]
    assert np.max(np.abs(err)) < 15.0
    assert np.sqrt(np.mean(err**2)) < 3.0
    assert res.unaliased_range_hz == pytest.approx(500.0)
    # order of the echoes does not matter
    res2 = b0_from_echoes(d.echoes[::-1], tes[::-1], mask=m, voxel_size_mm=VOXEL_MM)
    np.testing.assert_allclose(res2.raw_b0_hz, res.raw_b0_hz, atol=1e-9)


def test_phase_difference_input_matches_echo_input():
    tes = (4.92e-3, 7.38e-3)
    d = simulate_gradient_echo(head_field_hz((32, 32, 20), amplitude_hz=300.0), tes, snr=50.0, rng=2)
    a = b0_from_echoes(d.echoes, tes, mask=d.object_mask)
    dphi, _ = phase_difference(d.echoes[0], d.echoes[1])
    b = b0_from_phase_difference(dphi, tes[1] - tes[0], magnitude=np.abs(d.echoes[0]), mask=d.object_mask)
    np.testing.assert_allclose(b.raw_b0_hz, a.raw_b0_hz, atol=1e-9)
    assert b.n_offset_changed == a.n_offset_changed


def test_laplacian_method_also_recovers_the_field():
    tes = (5e-3, 15e-3)
    d = simulate_gradient_echo(head_field_hz((32, 32, 20), amplitude_hz=150.0), tes, snr=40.0, rng=3)
    res = b0_from_echoes(d.echoes, tes, mask=d.object_mask, unwrap_method="laplacian")
    cycles = np.round((res.raw_b0_hz - d.b0_hz)[d.object_mask] * (tes[1] - tes[0]))
    assert np.count_nonzero(cycles) == 0


def test_unit_conversions_use_codata_gamma():
    gamma_hz_per_t = scipy.constants.physical_constants["proton gyromag. ratio in MHz/T"][0] * 1e6
    # 1 ppm at 3 T is gamma * 3 T * 1e-6, about 127.7 Hz (from memory: 42.58 MHz/T)
    assert hz_to_units(gamma_hz_per_t * 3e-6, "ppm", field_strength_t=3.0) == pytest.approx(1.0)
    assert field_to_hz(1.0, "ppm", field_strength_t=3.0) == pytest.approx(127.74, abs=0.01)
    assert field_to_hz(TWO_PI * 25.0, "rad/s") == pytest.approx(25.0)
    assert hz_to_units(25.0, "rad/s") == pytest.approx(TWO_PI * 25.0)
    assert field_to_hz(1e-6, "T") == pytest.approx(gamma_hz_per_t * 1e-6)
    with pytest.raises(UnitError):
        hz_to_units(1.0, "ppm")
    with pytest.raises(UnitError):
        field_to_hz(1.0, "gauss")
    assert unaliased_range_hz(2.46e-3) == pytest.approx(1 / (2 * 2.46e-3))


def test_ready_map_in_rad_per_s():
    f = head_field_hz((20, 20, 12), amplitude_hz=80.0)
    res = b0_from_map(f * TWO_PI, "rad/s", extend=False)
    np.testing.assert_allclose(res.b0_hz, f, atol=1e-9)


def test_extension_is_harmonic():
    # f = x^2 - y^2 + 3z (in mm, anisotropic voxels) is harmonic; the discrete 7-point
    # Laplacian of a quadratic is exact, so filling a hole must give f back
    vs = (2.0, 3.0, 1.5)
    a0, a1, a2 = np.mgrid[:30, :30, :24].astype(float)
    f = (a0 * vs[0]) ** 2 - (a1 * vs[1]) ** 2 + 3 * a2 * vs[2]
    hole = (a0 - 15) ** 2 + (a1 - 15) ** 2 + (a2 - 12) ** 2 < 49
    out = extend_harmonic(np.where(hole, 0.0, f), ~hole, voxel_size_mm=vs, rtol=1e-10)
    np.testing.assert_allclose(out, f, atol=1e-5 * np.abs(f).max())
    # beyond an object the extension is smooth and bounded by the boundary values
    m = (a0 - 15) ** 2 + (a1 - 15) ** 2 + (a2 - 12) ** 2 < 81
    g = extend_harmonic(np.where(m, a0, 0.0), m)
    assert g[~m].min() >= a0[m].min() - 1e-6 and g[~m].max() <= a0[m].max() + 1e-6


def test_masked_smoothing_against_scipy():
    rng = np.random.default_rng(0)
    f = rng.standard_normal((20, 20, 20))
    full = np.ones(f.shape, bool)
    sigma = 6.0 / np.sqrt(8 * np.log(2)) / 2.0  # 6 mm FWHM on 2 mm voxels
    ref = ndi.gaussian_filter(f, sigma, mode="constant") / ndi.gaussian_filter(np.ones(f.shape), sigma,
                                                                                mode="constant")
    np.testing.assert_allclose(smooth_masked(f, full, fwhm_mm=6.0, voxel_size_mm=2.0), ref, atol=1e-12)
    # values outside the mask never leak in
    m = np.zeros(f.shape, bool)
    m[5:15, 5:15, 5:15] = True
    g = np.where(m, 7.0, 1e6)
    np.testing.assert_allclose(smooth_masked(g, m, fwhm_mm=6.0, voxel_size_mm=2.0)[m], 7.0)


def test_outliers_are_found_and_replaced():
    f = head_field_hz((24, 24, 16), amplitude_hz=60.0)
    spiky = f.copy()
    spots = [(5, 6, 7), (12, 12, 8), (18, 10, 4)]
    for s in spots:
        spiky[s] += 1 / 2.46e-3  # a 2 pi slip at dTE 2.46 ms
    m = np.ones(f.shape, bool)
    found = find_outliers(spiky, m)
    assert {tuple(int(i) for i in p) for p in np.argwhere(found)} == set(spots)
    res = b0_from_map(spiky, "Hz", reject_outliers=True, extend=False)
    for s in spots:
        assert abs(res.b0_hz[s] - f[s]) < 2.0


# ---------------------------------------------------------------------------------------------
# workflow and command line on small synthetic NIfTI files
# ---------------------------------------------------------------------------------------------
import json  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import nibabel as nib  # noqa: E402

from fieldfix.errors import MetadataError  # noqa: E402
from fieldfix.workflows.fieldmap import run_fieldmap  # noqa: E402
from fieldfix_cli.main import main as cli_main  # noqa: E402

SCRIPT = shutil.which("fieldfix", path=str(Path(sys.executable).parent)) or shutil.which("fieldfix")
SMALL = (32, 32, 20)
AFFINE = np.diag([3.0, 3.0, 3.0, 1.0])
TES = (4.92e-3, 7.38e-3)


def _save(path, data, sidecar=None):
    nib.save(nib.Nifti1Image(np.asarray(data), AFFINE), str(path))
    if sidecar is not None:
        Path(str(path).replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return str(path)


@pytest.fixture(scope="module")
def acquisition(tmp_path_factory):
    """Two echoes stored as 12-bit counts (0..4095) with magnitudes and BIDS sidecars."""
    folder = tmp_path_factory.mktemp("fmap")
    d = simulate_gradient_echo(head_field_hz(SMALL, amplitude_hz=300.0), TES, snr=40.0, rng=7)
    files = {"phase": [], "magnitude": [], "real": [], "imag": []}
    for n, (z, te) in enumerate(zip(d.echoes, TES), start=1):
        counts = np.mod(np.round(np.angle(z) / TWO_PI * 4096), 4096).astype(np.int16)
        files["phase"].append(_save(folder / f"sub-01_phase{n}.nii.gz", counts, {"EchoTime": te}))
        files["magnitude"].append(_save(folder / f"sub-01_magnitude{n}.nii.gz",
                                        (1000 * np.abs(z)).astype(np.float32), {"EchoTime": te}))
        files["real"].append(_save(folder / f"sub-01_real{n}.nii.gz", z.real.astype(np.float32), {"EchoTime": te}))
        files["imag"].append(_save(folder / f"sub-01_imag{n}.nii.gz", z.imag.astype(np.float32)))
    dphi_deg = np.degrees(np.angle(d.echoes[1] * np.conj(d.echoes[0]))).astype(np.float32)
    files["phasediff"] = _save(folder / "sub-01_phasediff.nii.gz", dphi_deg,
                               {"EchoTime1": TES[0], "EchoTime2": TES[1]})
    return d, files, folder


def _cycles_off(b0_hz, truth, mask):
    return int(np.count_nonzero(np.round((b0_hz - truth)[mask] * (TES[1] - TES[0]))))


def _cli(*args):
    assert SCRIPT, "the fieldfix console script is not installed"
    return subprocess.run([SCRIPT, "fieldmap", *args], capture_output=True, text=True, timeout=300)


def test_cli_end_to_end_phase_counts_with_sidecars(acquisition, tmp_path):
    d, files, _ = acquisition
    out = tmp_path / "out"
    result = _cli("--phase", *files["phase"], "--magnitude", *files["magnitude"], "--out", str(out), "--json")
    assert result.returncode == 0, result.stderr
    summary = json.loads(result.stdout)
    for name in ("b0_hz.nii.gz", "b0_mask.nii.gz", "b0_magnitude.nii.gz", "b0_summary.json",
                 "b0_hz.json", "b0_mask.json", "b0_magnitude.json"):
        assert (out / name).is_file(), name
    b0 = nib.load(str(out / "b0_hz.nii.gz")).get_fdata()
    mask = nib.load(str(out / "b0_mask.nii.gz")).get_fdata() > 0
    np.testing.assert_allclose(nib.load(str(out / "b0_hz.nii.gz")).affine, AFFINE)
    assert np.all(np.isfinite(b0)) and np.any(b0[~mask] != 0)  # extended beyond the mask
    assert _cycles_off(b0, d.b0_hz, mask) == 0
    err = (b0 - d.b0_hz)[ndi.binary_erosion(mask, iterations=2)]
    assert np.sqrt(np.mean(err**2)) < 2.0
    assert [p["units"] for p in summary["phase_units"]] == ["counts4096", "counts4096"]
    assert summary["echo_times_s"] == list(TES) and summary["echo_times_source"] == "sidecar"
    assert summary["unaliased_range_hz"] == pytest.approx(1 / (2 * (TES[1] - TES[0])))
    assert summary["mask_volume_ml"] == pytest.approx(mask.sum() * 27 / 1000)
    assert summary["voxels_offset_changed"] > 0
    saved = json.loads((out / "b0_summary.json").read_text())
    assert saved["field_percentiles_hz"]["p50"] == pytest.approx(np.median(b0[mask]), abs=1e-3)
    provenance = json.loads((out / "b0_hz.json").read_text())
    assert provenance["Units"] == "Hz" and len(provenance["Inputs"]) == 4
    # a second run refuses to overwrite, one error line, exit 2
    again = _cli("--phase", *files["phase"], "--magnitude", *files["magnitude"], "--out", str(out))
    assert again.returncode == 2 and len(again.stderr.strip().splitlines()) == 1


def test_cli_echo_time_contradiction_needs_a_winner(acquisition, tmp_path, capsys):
    _, files, _ = acquisition
    base = ["--phase", *files["phase"], "--magnitude", *files["magnitude"], "--echo-times", "5ms", "7.5ms"]
    bad = _cli(*base, "--out", str(tmp_path / "a"))
    assert bad.returncode == 2 and "contradict" in bad.stderr and len(bad.stderr.strip().splitlines()) == 1
    assert not (tmp_path / "a" / "b0_hz.nii.gz").exists()
    capsys.readouterr()
    assert cli_main(["fieldmap", *base, "--echo-times-win", "sidecar", "--out", str(tmp_path / "b"), "--json"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["echo_times_s"] == list(TES) and summary["echo_times_source"].startswith("sidecar")
    assert cli_main(["fieldmap", *base, "--echo-times-win", "arguments", "--out", str(tmp_path / "c"), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["echo_times_s"] == [5e-3, 7.5e-3]


def test_phase_difference_real_imag_and_ready_map_agree(acquisition, tmp_path):
    d, files, _ = acquisition
    ref = run_fieldmap(tmp_path / "ref", phase=files["phase"], magnitude=files["magnitude"], smooth_mm=0.0,
                       reject_outliers=False, tag="sub-01_")
    assert ref.outputs.b0_hz == "sub-01_b0_hz.nii.gz"
    ref_files = ref.outputs.paths(tmp_path / "ref")
    ref_b0 = nib.load(ref_files["b0_hz"]).get_fdata()
    mask = nib.load(ref_files["mask"]).get_fdata() > 0
    # phase difference stored in degrees, echo times from EchoTime1/EchoTime2, in-process CLI
    status = cli_main(["fieldmap", "--phase-diff", files["phasediff"], "--magnitude", files["magnitude"][0],
                       "--mask", str(ref_files["mask"]), "--smooth", "0mm", "--keep-outliers", "--out",
                       str(tmp_path / "pd"), "--quiet"])
    assert status == 0
    pd_b0 = nib.load(str(tmp_path / "pd" / "b0_hz.nii.gz")).get_fdata()
    pd_summary = json.loads((tmp_path / "pd" / "b0_summary.json").read_text())
    assert pd_summary["phase_units"][0]["units"] == "deg"
    # integer phase counts versus float degrees: quantisation of pi/4096 per echo at most
    bound = 2 * (np.pi / 4096) / (TWO_PI * (TES[1] - TES[0])) + 0.01
    assert np.max(np.abs(pd_b0 - ref_b0)[mask]) < bound
    # real + imaginary, echo times given explicitly
    status = cli_main(["fieldmap", "--real", *files["real"], "--imag", *files["imag"], "--echo-times", "4.92ms",
                       "7.38ms", "--mask", str(ref_files["mask"]), "--smooth", "0mm", "--keep-outliers",
                       "--out", str(tmp_path / "ri"), "--quiet"])
    assert status == 0
    ri_b0 = nib.load(str(tmp_path / "ri" / "b0_hz.nii.gz")).get_fdata()
    assert np.max(np.abs(ri_b0 - ref_b0)[mask]) < bound
    # ready map in rad/s, with a ppm copy
    rads = _save(tmp_path / "map_rads.nii.gz", (ref_b0 * TWO_PI).astype(np.float32))
    summary = run_fieldmap(tmp_path / "map", b0=rads, b0_units="rad/s", mask=str(ref_files["mask"]),
                           smooth_mm=0.0, reject_outliers=False, field_strength_t=3.0, also_units=["ppm"])
    map_files = summary.outputs.paths(tmp_path / "map")
    map_b0 = nib.load(map_files["b0_hz"]).get_fdata()
    np.testing.assert_allclose(map_b0[mask], ref_b0[mask], atol=1e-3)
    ppm = nib.load(map_files["b0_ppm"]).get_fdata()
    gamma = scipy.constants.physical_constants["proton gyromag. ratio in MHz/T"][0]
    np.testing.assert_allclose(ppm[mask], map_b0[mask] / (gamma * 3.0), rtol=1e-5, atol=1e-6)


def test_workflow_refusals(acquisition, tmp_path):
    _, files, folder = acquisition
    # no echo times anywhere
    bare = [_save(tmp_path / f"p{n}.nii.gz", nib.load(p).get_fdata().astype(np.int16))
            for n, p in enumerate(files["phase"])]
    flat = _save(tmp_path / "m.nii.gz", np.ones(SMALL, np.float32))
    with pytest.raises(MetadataError, match="no echo times"):
        run_fieldmap(tmp_path / "o1", phase=bare, magnitude=[flat])
    # a phase image whose values fit no convention is refused with a hint to give the units
    narrow = _save(tmp_path / "narrow.nii.gz", np.full(SMALL, 0.3, np.float32) + np.linspace(0, 1, SMALL[2]))
    with pytest.raises(UnitError, match="phase units"):
        run_fieldmap(tmp_path / "o2", phase=[narrow, narrow], magnitude=files["magnitude"][:1],
                     echo_times_s=TES)
    # mixing input kinds
    with pytest.raises(Exception, match="exactly one kind"):
        run_fieldmap(tmp_path / "o3", phase=files["phase"], phase_diff=files["phasediff"])
    result = _cli("--phase", narrow, narrow, "--magnitude", files["magnitude"][0], "--echo-times", "4.92ms",
                  "7.38ms", "--out", str(tmp_path / "o4"))
    assert result.returncode == 2 and "phase units" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1


def test_outlier_rejection_keeps_steep_real_fields_and_catches_spikes():
    # Field outside an air sphere (dchi = -9.4 ppm, 7 T; the sphere's external dipole field, e.g.
    # Schenck 1996 Medical Physics): steep next to the sphere, but smooth. No voxel of it is an
    # outlier; isolated spikes (a missed 2*pi jump, 500 Hz at dTE = 2 ms) placed in it are.
    from fieldfix.fieldmap import find_outliers
    from fieldfix.units import GAMMA_HZ_PER_T

    n, voxel_mm, radius_mm = 40, 2.0, 9.0
    xyz = (np.indices((n, n, n)) - (n - 1) / 2) * voxel_mm
    r = np.sqrt((xyz ** 2).sum(axis=0))
    cos2 = np.divide(xyz[2] ** 2, r ** 2, out=np.zeros_like(r), where=r > 0)
    b0_hz = -9.4e-6 / 3 * 7.0 * GAMMA_HZ_PER_T * (radius_mm / np.maximum(r, radius_mm)) ** 3 * (3 * cos2 - 1)
    mask = r > radius_mm + voxel_mm
    assert np.abs(np.diff(b0_hz, axis=2)[mask[:, :, 1:]]).max() > 100  # over 100 Hz per voxel next to the air
    assert not find_outliers(b0_hz, mask).any()
    spiky = b0_hz.copy()
    spots = [(20, 20, 30), (10, 25, 20), (31, 12, 8)]
    for spot in spots:
        spiky[spot] += 500.0
    found = find_outliers(spiky, mask)
    assert sorted(zip(*np.nonzero(found))) == sorted(spots)


def test_local_residual_kernel_matches_reference():
    from fieldfix import _fieldmap_kernels as K

    rng = np.random.default_rng(4)
    field = rng.standard_normal((9, 8, 7))
    mask = rng.random(field.shape) > 0.25
    mask[0, 0, 0], mask[1, 1, 1] = True, True
    ours = K.local_residuals_nb(field, mask)
    reference = K.local_residuals_reference(field, mask)
    for a, b in zip(ours, reference):
        np.testing.assert_allclose(a, b, atol=1e-12)
    # an isolated mask voxel: residual 0 (its own median), no neighbours, scale 0
    lone = np.zeros(field.shape, bool)
    lone[4, 4, 4] = True
    residual, scale = K.local_residuals_nb(field, lone)
    assert residual[4, 4, 4] == 0 and scale[4, 4, 4] == 0


def test_local_median_matches_scipy_median_filter_inside():
    # External reference: scipy.ndimage.median_filter (size 3) on a full mask, away from the edges
    from fieldfix import _fieldmap_kernels as K

    field = np.random.default_rng(5).standard_normal((10, 11, 12))
    residual, _ = K.local_residuals_nb(field, np.ones(field.shape, bool))
    inner = (slice(1, -1),) * 3
    np.testing.assert_allclose(residual[inner], (field - ndi.median_filter(field, size=3))[inner], atol=1e-12)
