"""Tests of fieldfix.dropout: each formula against a numeric isochromat simulation.

The simulations sum complex signal over sub-voxel isochromat positions placed in world
space (so oblique grids and tilts are exercised) and use the analytic field itself, not
its gradient. Agreement is required within 0.01 absolute.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from fieldfix import dropout as dp
from fieldfix.errors import InputError
from fieldfix.units import GAMMA_HZ_PER_T


def _oblique_affine(voxel=(2.5, 2.0, 3.0), angles_deg=(12.0, -8.0, 20.0), origin=(-40.0, -50.0, -30.0)):
    """A rotated (oblique) voxel grid."""
    ax, ay, az = np.deg2rad(angles_deg)
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    ry = np.array([[np.cos(ay), 0, np.sin(ay)], [0, 1, 0], [-np.sin(ay), 0, np.cos(ay)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    affine = np.eye(4)
    affine[:3, :3] = rz @ ry @ rx @ np.diag(voxel)
    affine[:3, 3] = origin
    return affine


def _world(affine, shape):
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), axis=-1)
    return ijk @ affine[:3, :3].T + affine[:3, 3]


def _linear_field(g_world, f0=37.0):
    g_world = np.asarray(g_world, float)
    return lambda xyz: f0 + np.asarray(xyz) @ g_world


# --------------------------------------------------------------------------- Bloch simulation of an RF pulse


def _bloch_profile(tbw, flip_deg, v):
    """Transverse magnetisation across the slice from a hard-pulse Bloch simulation.

    Rotations of M = (0, 0, 1) under B1 (windowed sinc) plus the slice-select off-resonance
    ``v * BW`` at each time step, then a rephasing precession over half the pulse. This
    does not use the small-tip Fourier approximation.
    """
    n_steps = 400
    tau, b1 = dp.windowed_sinc_pulse(tbw, n_steps)
    dt = 1.0 / n_steps  # pulse duration 1
    w1 = b1 / (b1.sum() * dt) * np.deg2rad(flip_deg)  # rad per unit time, area = flip
    dw = 2 * np.pi * np.asarray(v) * tbw  # off-resonance (rad per unit time): BW = tbw
    m = np.zeros((len(v), 3))
    m[:, 2] = 1.0
    for k in range(n_steps):
        omega = np.stack([np.full_like(dw, w1[k]), np.zeros_like(dw), dw], axis=1)
        angle = np.linalg.norm(omega, axis=1) * dt
        axis = omega / np.maximum(np.linalg.norm(omega, axis=1, keepdims=True), 1e-300)
        c, s = np.cos(angle)[:, None], np.sin(angle)[:, None]
        # Rodrigues rotation (left-handed precession sign does not matter for |profile|)
        m = m * c + np.cross(axis, m) * s + axis * (axis * m).sum(1, keepdims=True) * (1 - c)
    mxy = m[:, 0] + 1j * m[:, 1]
    return mxy * np.exp(-1j * dw * 0.5)  # rephase: undo precession over half the pulse


def _isochromat_through_plane(field, centre, normal, te_s, thickness_mm, profile, zshim=0.0):
    """|sum of isochromat signal| / |sum without field| along the slice normal."""
    if profile == "rect":
        z = (np.arange(4001) / 4000 - 0.5) * thickness_mm
        w = np.ones_like(z)
    elif profile == "gaussian":
        sigma = thickness_mm / (2 * np.sqrt(2 * np.log(2)))
        z = np.linspace(-6 * sigma, 6 * sigma, 4001)
        w = np.exp(-0.5 * (z / sigma) ** 2)
    else:  # rf: Bloch-simulated profile, small tip
        v = np.linspace(-4.0, 4.0, 1601)
        z = v * thickness_mm
        w = _bloch_profile(4.0, 5.0, v)
    pts = centre + np.outer(z, normal)
    phase = 2 * np.pi * (field(pts) * te_s + zshim * z)
    return abs(np.sum(w * np.exp(1j * phase))) / abs(np.sum(w))


@pytest.mark.parametrize("profile", ["rect", "gaussian", "rf"])
@pytest.mark.parametrize("tilt_deg", [-25.0, 0.0, 15.0])
def test_through_plane_retention_matches_isochromat_sum(profile, tilt_deg):
    affine = _oblique_affine()
    shape = (9, 10, 8)
    g_world = np.array([1.5, -4.0, 6.0])  # Hz/mm
    field = _linear_field(g_world)
    b0 = field(_world(affine, shape))
    frame = dp.frame_from_affine(affine, slice_axis=2, pe_axis=1, tilt_deg=tilt_deg, shape=shape)
    centre_idx = (4, 5, 3)
    centre = _world(affine, shape)[centre_idx]
    for te_s, thick in [(0.02, 2.0), (0.03, 3.0), (0.045, 4.0)]:
        maps = dp.dropout_maps(b0, affine, frame, te_s=te_s, thickness_mm=thick, profile=profile)
        predicted = maps["retention"][centre_idx]
        simulated = _isochromat_through_plane(field, centre, frame.normal, te_s, thick, profile)
        assert abs(predicted - simulated) < 0.01, (te_s, thick, predicted, simulated)


@pytest.mark.parametrize("profile", ["rect", "gaussian", "rf"])
def test_zshim_moment_matches_isochromat_sum_and_can_cancel(profile):
    g_n = 9.0  # Hz/mm along the normal
    te_s, thick = 0.03, 3.0
    field = _linear_field([0.0, 0.0, g_n])
    centre = np.zeros(3)
    normal = np.array([0.0, 0.0, 1.0])
    for moment in (-0.27, -0.1, 0.05):  # cycles/mm
        predicted = dp.through_plane_retention(g_n, te_s, thick, profile, moment)
        simulated = _isochromat_through_plane(field, centre, normal, te_s, thick, profile, zshim=moment)
        assert abs(predicted - simulated) < 0.01
    # A moment of -g_n * TE undoes the through-plane dephasing completely.
    assert dp.through_plane_retention(g_n, te_s, thick, profile, -g_n * te_s) == pytest.approx(1.0, abs=1e-9)


def test_rf_profile_small_tip_fourier_relation():
    # Small-tip excitation: the profile is the Fourier transform of the RF envelope
    # (Pauly, Nishimura, Macovski 1989, J Magn Reson 81:43-56), so transforming the profile
    # back gives the envelope: retention(u) = |b1(u / tbw)| / b1(0) for u < tbw / 2.
    tbw = 4.0
    prof = dp.slice_profile("rf", tbw=tbw)
    u = np.linspace(0.0, 1.9, 40)
    tau, b1 = dp.windowed_sinc_pulse(tbw, 4001)
    expected = np.abs(np.interp(u / tbw, tau, b1))
    assert np.max(np.abs(prof.retention(u) - expected)) < 0.01


def test_bloch_small_tip_profile_matches_fourier_profile():
    v = np.linspace(-2.0, 2.0, 81)
    bloch = _bloch_profile(4.0, 5.0, v)
    tau, b1 = dp.windowed_sinc_pulse(4.0, 400)
    fourier = dp.rf_slice_profile(tau, b1, 4.0, v)
    bloch = bloch / bloch[40]
    assert np.max(np.abs(np.abs(bloch) - np.abs(fourier))) < 0.01
    # Profile FWHM is the nominal thickness within 10 % (windowed sinc; common practice, no source).
    half = np.abs(fourier) >= 0.5
    width = v[half].max() - v[half].min()
    assert 0.9 < width < 1.1


def test_sinc_law_worked_values():
    # Rectangular slice: S/S0 = |sin(pi u)/(pi u)| with u = gradient * TE * thickness.
    assert dp.through_plane_retention(0.0, 0.03, 3.0) == pytest.approx(1.0)
    assert dp.through_plane_retention(5.0, 0.04, 2.5) == pytest.approx(2 / np.pi)  # u = 0.5
    assert dp.through_plane_retention(10.0, 0.05, 2.0) == pytest.approx(0.0, abs=1e-12)  # u = 1, first zero
    # Gaussian with FWHM = thickness: exp(-pi^2 u^2 / (4 ln 2)); at u = 0.5 -> 0.4107
    assert dp.through_plane_retention(5.0, 0.04, 2.5, "gaussian") == pytest.approx(
        np.exp(-np.pi**2 * 0.25 / (4 * np.log(2))))


@pytest.mark.parametrize("profile", ["rect", "gaussian", "rf"])
def test_fact_thinner_slices_keep_more_signal(profile):
    # Thinner slices lose less signal to through-plane gradients (common practice, no
    # source; also Deichmann et al. 2002 NeuroImage, Weiskopf et al. 2006 NeuroImage).
    g = np.array([1.0, 3.0, 6.0, 10.0])
    for te in (0.025, 0.03, 0.035):
        r = [dp.through_plane_retention(g, te, d, profile) for d in (1.5, 2.0, 2.5, 3.0)]
        assert np.all(np.diff(np.stack(r), axis=0) < 0)


@pytest.mark.parametrize("profile", ["rect", "gaussian", "rf"])
def test_fact_longer_echo_times_lose_more(profile):
    # Longer echo times are more sensitive to field gradients (common practice, no source).
    g = np.array([1.0, 3.0, 6.0, 10.0])
    r = [dp.through_plane_retention(g, te, 2.5, profile) for te in (0.02, 0.025, 0.03, 0.035)]
    assert np.all(np.diff(np.stack(r), axis=0) < 0)


# --------------------------------------------------------------------------- echo shift and BOLD sensitivity


def _isochromat_bs(field, centre, normal, pe_unit, pe_voxel_mm, pe_sign, te_s, thickness_mm, profile,
                   esp, n_lines, pf):
    """BOLD sensitivity from a continuous-time isochromat simulation of the EPI readout.

    Isochromats fill a Gaussian patch (sigma 8 voxels) along the PE direction and the slice
    profile along the normal. The PE encoding moves k along +PE at s / (N * dy * esp) per
    second, reaching k = 0 at TE; the local echo is the time of the largest |S(t)|. BS is
    |S(t_echo)| / |S0| * t_echo / TE when t_echo is inside the acquisition window, else 0.
    """
    sigma = 8 * pe_voxel_mm
    y = np.linspace(-4 * sigma, 4 * sigma, 385)
    rho = np.exp(-0.5 * (y / sigma) ** 2)
    if profile == "rect":
        z = (np.arange(201) / 200 - 0.5) * thickness_mm
        w = np.ones_like(z)
    else:
        s = thickness_mm / (2 * np.sqrt(2 * np.log(2)))
        z = np.linspace(-6 * s, 6 * s, 201)
        w = np.exp(-0.5 * (z / s) ** 2)
    pts = centre + y[:, None, None] * pe_unit + z[None, :, None] * normal  # (ny, nz, 3)
    f = field(pts)
    weight = rho[:, None] * w[None, :]
    rate = pe_sign / (n_lines * pe_voxel_mm * esp)  # cycles/mm per second

    def signal(t):
        t = np.atleast_1d(t)
        out = np.empty(t.size)
        for i, ti in enumerate(t):
            k = rate * (ti - te_s)
            out[i] = abs(np.sum(weight * np.exp(2j * np.pi * (k * y[:, None] + f * ti))))
        return out

    # Coarse search along t with the PE patch only (the slice factor varies slowly), then refine.
    t_coarse = np.linspace(1e-4, 3 * te_s, 1500)
    f_centre = field(centre + y[:, None] * pe_unit)
    k = rate * (t_coarse[:, None] - te_s)
    coarse = np.abs((rho * np.exp(2j * np.pi * (k * y + f_centre * t_coarse[:, None]))).sum(1))
    i = int(np.argmax(coarse))
    if i in (0, t_coarse.size - 1):
        return 0.0  # no echo within reach
    t_fine = np.linspace(t_coarse[i - 1], t_coarse[i + 1], 41)
    s_fine = signal(t_fine)
    j = int(np.argmax(s_fine))
    t_echo = t_fine[j]
    start = te_s - n_lines * (pf - 0.5) * esp
    end = te_s + n_lines * 0.5 * esp
    if not start <= t_echo <= end:
        return 0.0
    return s_fine[j] / weight.sum() * t_echo / te_s


@pytest.mark.parametrize("pe_code", ["j", "j-"])
@pytest.mark.parametrize("tilt_deg", [0.0, 20.0])
@pytest.mark.parametrize("profile", ["rect", "gaussian"])
def test_bold_sensitivity_matches_isochromat_epi_simulation(pe_code, tilt_deg, profile):
    affine = _oblique_affine(voxel=(3.0, 3.0, 3.0), angles_deg=(5.0, 0.0, -10.0))
    shape = (7, 8, 6)
    pe_sign = 1 if pe_code == "j" else -1
    frame = dp.frame_from_affine(affine, slice_axis=2, pe_axis=1, tilt_deg=tilt_deg, shape=(64, 64, 30))
    pe_unit = frame.pe_step_mm / np.linalg.norm(frame.pe_step_mm)
    dy = float(np.linalg.norm(frame.pe_step_mm))
    esp, n_lines = 5e-4, 64
    centre_idx = (3, 4, 3)
    centre = _world(affine, shape)[centre_idx]
    cases = [
        (np.array([0.0, 2.5, 4.0]), 1.0),   # echo moves by several ms
        (np.array([1.0, -2.5, 2.0]), 0.75),  # partial Fourier, echo kept for both polarities
        (np.array([0.0, 4.5, 1.0]), 0.75),  # the early echo falls in the skipped lines
        (np.array([0.0, 10.0, 1.0]), 1.0),   # one polarity keeps an early echo, the other loses it
    ]
    kept = 0
    for g_world, pf in cases:
        field = _linear_field(g_world)
        b0 = field(_world(affine, shape))
        maps = dp.dropout_maps(b0, affine, frame, te_s=0.03, thickness_mm=3.0, profile=profile,
                               pe_sign=pe_sign, echo_spacing_s=esp, partial_fourier=pf)
        predicted = maps["bold_sensitivity"][centre_idx]
        simulated = _isochromat_bs(field, centre, frame.normal, pe_unit, dy, pe_sign, 0.03, 3.0, profile,
                                   esp, n_lines, pf)
        assert abs(predicted - simulated) < 0.01, (g_world, pf, predicted, simulated)
        kept += predicted > 0.3
    assert kept >= 1  # every variant exercises a kept echo, not only lost ones


def test_polarity_that_moves_the_echo_earlier():
    # Deichmann et al. 2002: a gradient along PE that adds to the k-space traversal makes
    # the echo come early (TE' < TE); the opposite polarity delays it.
    te_early, ok1 = dp.local_echo_time(5.0, 0.03, pe_sign=1, echo_spacing_s=5e-4, pe_lines=64)
    te_late, ok2 = dp.local_echo_time(5.0, 0.03, pe_sign=-1, echo_spacing_s=5e-4, pe_lines=64)
    assert te_early < 0.03 < te_late and ok1 and ok2
    # Q = 5 Hz * 64 * 0.5 ms = 0.16 -> TE' = 30 ms / 1.16 and 30 ms / 0.84
    assert te_early == pytest.approx(0.03 / 1.16) and te_late == pytest.approx(0.03 / 0.84)
    # 1 + Q <= 0: no echo forms
    _, ok = dp.local_echo_time(40.0, 0.03, pe_sign=-1, echo_spacing_s=5e-4, pe_lines=64)
    assert not ok


def test_partial_fourier_window_drops_early_echoes():
    te, esp, n = 0.03, 5e-4, 64
    start, end = dp.acquisition_window_s(te, esp, n, 0.75)
    assert start == pytest.approx(te - 16 * esp) and end == pytest.approx(te + 32 * esp)
    # an echo 10 ms early is inside with full Fourier (16 ms room) but not with 6/8
    g = (te / (te - 0.010) - 1) / (n * esp)
    assert dp.local_echo_time(g, te, pe_sign=1, echo_spacing_s=esp, pe_lines=n)[1]
    assert not dp.local_echo_time(g, te, pe_sign=1, echo_spacing_s=esp, pe_lines=n, partial_fourier=0.75)[1]


def test_readout_gradient_pushes_echo_out_of_each_line():
    # k-shift along readout = dF_ro * t per voxel; each line spans +-1/2 per voxel.
    assert dp.readout_echo_inside(15.0, 0.03)  # 0.45
    assert not dp.readout_echo_inside(20.0, 0.03)  # 0.6
    out = dp.bold_sensitivity(np.zeros(2), np.zeros(2), 0.03, 3.0, pe_sign=1, echo_spacing_s=5e-4, pe_lines=64,
                              ro_hz_per_voxel=np.array([15.0, 20.0]))
    assert out["bold_sensitivity"].tolist() == [1.0, 0.0]


def test_bold_sensitivity_is_retention_times_te_ratio():
    # Weiskopf et al. 2006: BS = through-plane retention at TE' times TE'/TE.
    gn, gpe = np.array([4.0]), np.array([-3.0])
    out = dp.bold_sensitivity(gn, gpe, 0.03, 2.5, pe_sign=1, echo_spacing_s=5e-4, pe_lines=64)
    te_l = 0.03 / (1 - 3.0 * 64 * 5e-4)
    assert out["te_local_s"][0] == pytest.approx(te_l)
    assert out["bold_sensitivity"][0] == pytest.approx(abs(np.sinc(4.0 * te_l * 2.5)) * te_l / 0.03)


# --------------------------------------------------------------------------- geometry


def test_gradient_through_oblique_affine_is_the_world_gradient():
    affine = _oblique_affine()
    shape = (6, 7, 5)
    g_world = np.array([2.0, -1.0, 3.5])
    b0 = _linear_field(g_world)(_world(affine, shape))
    grad = dp.field_gradient_hz_per_mm(b0, affine)
    assert np.allclose(grad, g_world)


def test_tilt_sign_convention():
    # Positive tilt: right-handed about +x (towards the subject's right); anterior edge up.
    rot = dp.tilt_rotation(30.0)
    assert np.allclose(rot @ [0, 1, 0], [0, np.cos(np.pi / 6), 0.5])
    assert np.allclose(rot @ [0, 0, 1], [0, -0.5, np.cos(np.pi / 6)])
    frame = dp.frame_from_orientation("axial", 30.0, pe_world_axis="y", inplane_mm=2.0)
    assert np.allclose(frame.normal, [0, -0.5, np.cos(np.pi / 6)])
    assert np.allclose(frame.pe_step_mm, 2.0 * np.array([0, np.cos(np.pi / 6), 0.5]))
    # the LR axis is untouched
    assert np.allclose(frame.ro_step_mm, [2.0, 0, 0])


def test_frame_from_affine_uses_plane_normal_for_sheared_grid():
    affine = np.diag([2.0, 2.0, 3.0, 1.0])
    affine[1, 2] = 1.0  # slice axis leans towards +y: shear
    frame = dp.frame_from_affine(affine, 2, 1, shape=(64, 70, 30))
    assert np.allclose(frame.normal, [0, 0, 1])
    assert frame.pe_lines == 70
    with pytest.raises(InputError):
        dp.frame_from_affine(affine, 2, 2)


def test_zshim_unit_conversion():
    # k = gamma/(2 pi) * G * t; 1 mT/m for 1 ms with gamma/(2 pi) = 42.577 MHz/T (from memory)
    assert dp.zshim_cyc_per_mm(1.0) == pytest.approx(42.577e6 * 1e-3 * 1e-3 / 1000, rel=1e-4)
    assert dp.zshim_cyc_per_mm(1.0) == pytest.approx(GAMMA_HZ_PER_T * 1e-9)


def test_bad_inputs_are_refused():
    with pytest.raises(InputError):
        dp.slice_profile("triangle")
    with pytest.raises(InputError):
        dp.through_plane_retention(1.0, 0.03, 0.0)
    with pytest.raises(InputError):
        dp.local_echo_time(1.0, 0.03, pe_sign=0, echo_spacing_s=5e-4, pe_lines=64)
    with pytest.raises(InputError):
        dp.acquisition_window_s(0.03, 5e-4, 64, 0.4)
    with pytest.raises(InputError):
        dp.frame_from_orientation("axial", pe_world_axis="z")


# --------------------------------------------------------------------------- workflow and command line

import subprocess
import sys
from pathlib import Path

import nibabel as nib

FIELDFIX = str(Path(sys.executable).with_name("fieldfix"))


def _write_nifti(path, data, affine, sidecar=None):
    nib.save(nib.Nifti1Image(np.asarray(data, np.float32), affine), str(path))
    if sidecar is not None:
        Path(str(path).replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return path


def _like_epi(tmp_path, voxel_mm, origin_mm, shape):
    """A pilot EPI (j-, echo spacing 0.5 ms) on an axis-aligned grid; returns (path, affine)."""
    epi_affine = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    epi_affine[:3, 3] = origin_mm
    like = _write_nifti(tmp_path / "epi.nii.gz", np.ones(shape), epi_affine,
                        {"PhaseEncodingDirection": "j-", "EffectiveEchoSpacing": 0.0005})
    return like, epi_affine


def _linear_b0_files(tmp_path, g_world=(0.0, 2.0, 6.0)):
    affine = _oblique_affine(voxel=(3.0, 3.0, 3.0), angles_deg=(0.0, 0.0, 0.0), origin=(-30.0, -30.0, -20.0))
    shape = (20, 20, 14)
    b0 = _linear_field(g_world)(_world(affine, shape))
    b0_path = _write_nifti(tmp_path / "b0_hz.nii.gz", b0, affine)
    return affine, shape, b0, b0_path


def test_run_dropout_writes_maps_matching_formula(tmp_path):
    from fieldfix.errors import OutputError
    from fieldfix.workflows.dropout import run_dropout

    affine, shape, b0, b0_path = _linear_b0_files(tmp_path)
    like, _ = _like_epi(tmp_path, 3.0, (-30.0, -30.0, -20.0), (20, 20, 14, 2))
    out = tmp_path / "out"
    summary = run_dropout(b0_path, out, te_s=0.03, thickness_mm=3.0, like=like, tag="s1_")
    ret = nib.load(out / "s1_retention.nii.gz").get_fdata()
    bs = nib.load(out / "s1_bold_sensitivity.nii.gz").get_fdata()
    assert (out / "s1_dropout.json").exists() and (out / "s1_retention.json").exists()
    # linear field: g_n = 6 Hz/mm, dF per PE voxel = 2 * 3 = 6 Hz, polarity -1
    u = 6.0 * 0.03 * 3.0
    assert np.allclose(ret[2:-2, 2:-2, 2:-2], abs(np.sinc(u)), atol=1e-5)
    te_l = 0.03 / (1 - 6.0 * 20 * 0.0005)  # Q = -1 * 6 Hz * 20 lines (this grid) * 0.5 ms
    assert np.allclose(bs[2:-2, 2:-2, 2:-2], abs(np.sinc(6.0 * te_l * 3.0)) * te_l / 0.03, atol=1e-5)
    assert summary.parameters.pe_code == "j-"
    assert summary.pe_direction_world == "anterior to posterior"
    assert summary.retention.median == pytest.approx(abs(np.sinc(u)), abs=1e-5)
    with pytest.raises(OutputError):
        run_dropout(b0_path, out, te_s=0.03, thickness_mm=3.0, like=like, tag="s1_")


def test_run_dropout_records_the_rf_pulse_under_the_plans_names(tmp_path):
    # One name per quantity: the dropout job's parameters carry the pulse's time-bandwidth
    # product as the planner's parameters do (``tbw``), and the written JSON reads back.
    from fieldfix.outputs import DropoutSummary
    from fieldfix.plan import SweepSpec
    from fieldfix.workflows.dropout import run_dropout

    _, _, _, b0_path = _linear_b0_files(tmp_path)
    summary = run_dropout(b0_path, tmp_path / "rf", te_s=0.03, thickness_mm=3.0, profile="rf", tbw=6.0)
    written = json.loads((tmp_path / "rf" / "dropout.json").read_text())["parameters"]
    assert (written["profile"], written["tbw"], written["window"]) == ("rf", 6.0, "hamming")
    assert set(written) & set(SweepSpec().as_dict()) >= {"profile", "tbw", "threshold", "echo_spacing_s"}
    assert DropoutSummary.read(tmp_path / "rf" / "dropout.json") == summary
    rect = run_dropout(b0_path, tmp_path / "rect", te_s=0.03, thickness_mm=3.0)
    assert (rect.parameters.tbw, rect.parameters.window) == (None, None)


def test_run_dropout_also_writes_maps_on_a_different_epi_grid(tmp_path):
    # EPI grid: 4 mm voxels, shifted, 12 x 12 x 8, inside the B0 map. A linear field has one
    # gradient everywhere, so the maps on the EPI grid must carry the same analytic values
    # (sinc law; Weiskopf et al. 2006, NeuroImage 33:493, for the TE ratio).
    from fieldfix.workflows.dropout import run_dropout

    affine, shape, b0, b0_path = _linear_b0_files(tmp_path)
    like, epi_affine = _like_epi(tmp_path, 4.0, (-24.0, -24.0, -14.0), (12, 12, 8, 3))
    out = tmp_path / "out"
    summary = run_dropout(b0_path, out, te_s=0.03, thickness_mm=3.0, like=like)
    ret_epi = nib.load(out / summary.outputs.retention_on_epi)
    bs_epi = nib.load(out / summary.outputs.bold_sensitivity_on_epi)
    assert ret_epi.shape == (12, 12, 8) and np.allclose(ret_epi.affine, epi_affine)
    assert bs_epi.shape == (12, 12, 8)
    u = 6.0 * 0.03 * 3.0  # g_n = 6 Hz/mm along the EPI slice axis (z)
    inner = (slice(1, -1), slice(1, -1), slice(1, -1))
    assert np.allclose(ret_epi.get_fdata()[inner], abs(np.sinc(u)), atol=1e-5)
    te_l = 0.03 / (1 - 2.0 * 4.0 * 12 * 0.0005)  # dF per PE voxel = 2 Hz/mm x 4 mm, 12 lines, polarity -1
    assert np.allclose(bs_epi.get_fdata()[inner], abs(np.sinc(6.0 * te_l * 3.0)) * te_l / 0.03, atol=1e-5)
    assert (out / "retention_on_epi.json").exists()
    # on the B0 map's own grid no copy is made
    same = run_dropout(b0_path, tmp_path / "same", te_s=0.03, thickness_mm=3.0, like=b0_path)
    assert same.outputs.retention_on_epi is None and same.outputs.bold_sensitivity_on_epi is None


def test_run_dropout_needs_echo_spacing_with_phase_encoding(tmp_path):
    from fieldfix.errors import MetadataError
    from fieldfix.workflows.dropout import run_dropout

    _, _, _, b0_path = _linear_b0_files(tmp_path)
    with pytest.raises(MetadataError):
        run_dropout(b0_path, tmp_path / "o", te_s=0.03, thickness_mm=3.0, pe_code="j")
    assert not (tmp_path / "o" / "retention.nii.gz").exists()


def test_cli_dropout_end_to_end(tmp_path):
    _, _, _, b0_path = _linear_b0_files(tmp_path)
    out = tmp_path / "cli"
    proc = subprocess.run([FIELDFIX, "dropout", "--b0", str(b0_path), "--te", "30ms", "--thickness", "3mm",
                           "--slice-axis", "k", "--tilt", "-15deg", "--phase-encoding", "j-", "--echo-spacing",
                           "0.5ms", "--zshim", "-0.5mT*ms/m", "--out", str(out), "--json"],
                          capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads(proc.stdout)
    assert set(summary["outputs"]) == {"retention", "bold_sensitivity", "summary"}
    for path in summary["outputs"].values():
        assert Path(path).exists()
    saved = json.loads((out / "dropout.json").read_text())
    assert saved["parameters"]["tilt_deg"] == -15.0
    assert saved["frame"]["slice_normal_world"][1] == pytest.approx(np.sin(np.deg2rad(15.0)), abs=1e-6)
    # a bare number is refused with one error line and status 2
    bad = subprocess.run([FIELDFIX, "dropout", "--b0", str(b0_path), "--te", "30", "--thickness", "3mm",
                          "--out", str(tmp_path / "bad")], capture_output=True, text=True, timeout=240)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1 and "unit" in bad.stderr


def test_run_dropout_refuses_implausible_te_empty_mask_and_distant_epi(tmp_path):
    from fieldfix.errors import GeometryError, InputError
    from fieldfix.workflows.dropout import run_dropout

    affine, shape, b0, b0_path = _linear_b0_files(tmp_path)
    with pytest.raises(InputError, match="not plausible as an EPI echo time"):
        run_dropout(b0_path, tmp_path / "a", te_s=30.0, thickness_mm=3.0)
    empty = _write_nifti(tmp_path / "mask.nii.gz", np.zeros(shape), affine)
    with pytest.raises(InputError, match="empty"):
        run_dropout(b0_path, tmp_path / "b", te_s=0.03, thickness_mm=3.0, mask=empty)
    far = np.diag([3.0, 3.0, 3.0, 1.0])
    far[:3, 3] = (0.0, 0.0, 1000.0)
    like = _write_nifti(tmp_path / "far.nii.gz", np.ones((20, 20, 14)), far)
    with pytest.raises(GeometryError, match="overlap"):
        run_dropout(b0_path, tmp_path / "c", te_s=0.03, thickness_mm=3.0, like=like)
    assert not any((tmp_path / d).exists() and any((tmp_path / d).iterdir()) for d in "abc")


@pytest.mark.parametrize("pe_code", ["j", "j-"])
def test_retention_matches_epi_simulator(pe_code):
    # Cross-check with the project's EPI simulator (fieldfix.simulate.epi): a uniform object,
    # a field varying only across slices, 24 boxcar sub-slices per slice. The simulated voxel
    # intensity relative to a zero field is the through-plane retention (sinc law).
    epi = pytest.importorskip("fieldfix.simulate.epi")
    shape, oversample, thickness_mm = (8, 8, 5), (1, 1, 24), 3.0
    z_mm = epi.fine_coordinates(shape, oversample)[2] * thickness_mm
    obj = np.ones((8, 8, 5 * 24))
    for g_hz_per_mm, te_s in [(4.0, 0.03), (7.0, 0.035), (11.0, 0.02)]:
        field = np.broadcast_to(g_hz_per_mm * z_mm, obj.shape).copy()
        kw = dict(pe_code=pe_code, echo_spacing_s=5e-4, te_s=te_s, oversample=oversample, slice_axis=2)
        ratio = epi.simulate_epi(obj, field, **kw) / epi.simulate_epi(obj, np.zeros_like(field), **kw)
        predicted = dp.through_plane_retention(g_hz_per_mm, te_s, thickness_mm)
        assert np.max(np.abs(ratio - predicted)) < 0.01, (g_hz_per_mm, te_s, predicted, ratio.mean())
