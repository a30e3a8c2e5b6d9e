"""Tests of fieldfix.plan and the sweep kernels."""

from __future__ import annotations


import numpy as np
import pytest

from fieldfix import _dropout_kernels as kernels
from fieldfix import dropout as dp
from fieldfix import plan
from _report_fixtures import plan_row
from fieldfix.errors import InputError

GAMMA_B0_3T_HZ = 42.577e6 * 3.0  # proton Larmor frequency at 3 T (from memory)
DCHI_AIR_TISSUE = 9.4e-6  # susceptibility of air minus tissue, SI volume units (from memory)


def air_sphere_field_hz(xyz, centre, radius_mm, gamma_b0_hz=GAMMA_B0_3T_HZ, dchi=DCHI_AIR_TISSUE):
    """Field offset (Hz) outside a sphere of susceptibility difference `dchi` in B0 along z.

    Standard result for a uniformly magnetised sphere: outside it the z-field is that of a
    dipole, dB_z / B0 = (dchi / 3) * (a / r)^3 * (3 cos^2(theta) - 1) (e.g. Schenck 1996,
    Med Phys 23:815-850). Inside the sphere the value is set to 0 (air gives no signal).
    """
    r = np.asarray(xyz, float) - centre
    dist = np.linalg.norm(r, axis=-1)
    safe = np.maximum(dist, 1e-9)
    cos2 = (r[..., 2] / safe) ** 2
    out = gamma_b0_hz * dchi / 3.0 * (radius_mm / safe) ** 3 * (3 * cos2 - 1)
    return np.where(dist > radius_mm, out, 0.0)


def air_sphere_gradient_hz_per_mm(xyz, centre, radius_mm, gamma_b0_hz=GAMMA_B0_3T_HZ, dchi=DCHI_AIR_TISSUE):
    """Analytic gradient of :func:`air_sphere_field_hz` (outside the sphere).

    f = K (3 z^2 r^-5 - r^-3), K = gamma B0 dchi a^3 / 3:
    df/dx_i = K (6 z delta_iz r^-5 - 15 z^2 x_i r^-7 + 3 x_i r^-5).
    """
    r = np.asarray(xyz, float) - centre
    d = np.linalg.norm(r, axis=-1, keepdims=True)
    k = gamma_b0_hz * dchi * radius_mm**3 / 3.0
    z = r[..., 2:3]
    grad = -15 * z**2 * r / d**7 + 3 * r / d**5
    grad[..., 2:3] += 6 * z / d**5
    return k * grad


def _grid(shape=(28, 30, 30), voxel=3.0):
    affine = np.diag([voxel, voxel, voxel, 1.0])
    affine[:3, 3] = -(np.array(shape) - 1) / 2 * voxel
    ijk = np.stack(np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij"), axis=-1)
    return affine, ijk @ affine[:3, :3].T + affine[:3, 3]


def _sphere_scenario():
    affine, xyz = _grid()
    centre = np.array([0.0, 10.0, -20.0])
    radius = 12.0
    b0 = air_sphere_field_hz(xyz, centre, radius)
    roi_centre = centre + np.array([0.0, 12.0, 26.0])  # above and in front of the cavity
    roi = np.linalg.norm(xyz - roi_centre, axis=-1) <= 4.5
    brain = (np.linalg.norm(xyz - centre, axis=-1) > radius + 4) & ((xyz / [38, 42, 40]) ** 2).sum(-1).__le__(1)
    return affine, xyz, b0, roi, brain, centre, radius, roi_centre


def test_air_sphere_gradient_formula_matches_finite_differences():
    # guards the test's own analytic gradient against the field formula
    centre, radius = np.zeros(3), 10.0
    pts = np.array([[3.0, 5.0, 18.0], [-12.0, 4.0, 9.0], [0.0, 20.0, -5.0]])
    h = 1e-4
    for p in pts:
        fd = [(air_sphere_field_hz(p + h * e, centre, radius) - air_sphere_field_hz(p - h * e, centre, radius)) / (2 * h)
              for e in np.eye(3)]
        assert np.allclose(fd, air_sphere_gradient_hz_per_mm(p, centre, radius), rtol=1e-6)


def test_planner_picks_thinner_slice_and_echo_earlier_polarity_above_air_cavity():
    affine, xyz, b0, roi, brain, centre, radius, roi_centre = _sphere_scenario()
    esp, lines, inplane = 5e-4, 64, 3.0
    rows = plan.sweep(b0, affine, roi, brain, thickness_mm=[2.0, 3.0, 4.0], te_s=[0.03], tilt_deg=[0.0],
                      pe_signs=(1, -1), echo_spacing_s=esp, pe_lines=lines, inplane_mm=inplane, pe_world_axis="y",
                      rank_by="retention")
    # Physics, independent of the planner: the analytic field gradient at the ROI.
    g = air_sphere_gradient_hz_per_mm(roi_centre, centre, radius)
    assert abs(g[2]) > 1.0  # a real through-plane gradient (Hz/mm) above the cavity
    # Deichmann et al. 2002 (NeuroImage): the echo comes earlier (TE' < TE) for the polarity
    # whose k-space traversal adds to the in-plane gradient, i.e. sign(polarity) = sign(dF/dy).
    earlier = 1 if g[1] > 0 else -1
    best = rows[0]
    assert best.thickness_mm == 2.0
    assert best.pe_sign == earlier
    choice, reason = plan.recommend(rows, tolerance=0.0)
    assert choice.thickness_mm == 2.0 and choice.pe_sign == earlier
    assert reason.count(".") >= 1 and "2 mm" in reason
    # thinner slices keep more in the ROI for either polarity (common practice, no source)
    for sign in (1, -1):
        med = [next(r.roi_median for r in rows if r.thickness_mm == d and r.pe_sign == sign)
               for d in (2.0, 3.0, 4.0)]
        assert med[0] > med[1] > med[2]


def test_planner_longer_te_loses_more_above_air_cavity():
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    rows = plan.sweep(b0, affine, roi, brain, thickness_mm=[3.0], te_s=[0.02, 0.03, 0.04], tilt_deg=[0.0])
    med = {r.te_s: r.roi_median for r in rows}
    assert med[0.02] > med[0.03] > med[0.04]
    assert rows[0].te_s == 0.02 and rows[0].metric == "retention"


def test_planner_picks_tilt_perpendicular_to_gradient():
    # Linear field whose gradient lies in the y-z plane at 20 deg above +y: the slice normal
    # (0, -sin t, cos t) is perpendicular to it at t = +20 deg, where nothing dephases.
    affine, xyz = _grid((12, 12, 12))
    g = 8.0 * np.array([0.0, np.cos(np.deg2rad(20)), np.sin(np.deg2rad(20))])
    b0 = 50.0 + xyz @ g
    roi = np.zeros(b0.shape, bool)
    roi[4:8, 4:8, 4:8] = True
    rows = plan.sweep(b0, affine, roi, thickness_mm=[3.0], te_s=[0.03], tilt_deg=np.arange(-30, 31, 10.0))
    assert rows[0].tilt_deg == 20.0
    assert rows[0].roi_median == pytest.approx(1.0, abs=1e-6)
    expected = {t: abs(np.sinc(8.0 * np.sin(np.deg2rad(20 - t)) * 0.03 * 3.0)) for t in range(-30, 31, 10)}
    for r in rows:
        assert r.roi_median == pytest.approx(expected[int(r.tilt_deg)], abs=1e-5)


def _random_smooth_inputs(n_tilts=3, n_vox=3001, seed=1):
    """World gradients (3, n_vox) and per-tilt (normal, PE step, readout step) rows."""
    rng = np.random.default_rng(seed)
    grad = rng.normal(0, 4, (3, n_vox))
    # rows: unit normal (rotated z), PE step (rotated y, 0.6 mm), readout step (rotated x, 2.5 mm)
    dirs = np.array([dp.tilt_rotation(10.0 * t).T[[2, 1, 0]] * [[1.0], [0.6], [2.5]] for t in range(n_tilts)])
    roi = rng.random(n_vox) < 0.2
    return grad, dirs, roi


@pytest.mark.parametrize("profile, analytic", [("rect", None), ("rect", "rect"), ("gaussian", None),
                                               ("gaussian", "gaussian"), ("rf", None)])
@pytest.mark.parametrize("mode", [0, 1])
def test_numba_sweep_matches_numpy_reference(profile, analytic, mode):
    grad, dirs, roi = _random_smooth_inputs()
    protocols = plan.protocol_grid([1.5, 2.5, 3.0], [0.02, 0.035], [0, 1, 2], (1, -1), (0.0, -1.5))
    ti = np.array([int(p.tilt_deg) for p in protocols])
    sg = np.array([p.pe_sign for p in protocols])
    te = np.array([p.te_s for p in protocols])
    th = np.array([p.thickness_mm for p in protocols])
    zs = np.array([dp.zshim_cyc_per_mm(p.zshim_mtms_per_m) for p in protocols])
    prof = dp.slice_profile(profile)
    args = (grad, dirs, roi, ti, sg, te, th, zs, mode, 64 * 5e-4, 12e-3, 16e-3)
    fast = kernels.sweep_stats(*args, prof.table, prof.step, prof.tail == "sinc", 0.5, analytic=analytic)
    ref = kernels.sweep_stats_reference(*args, prof.retention, 0.5)
    assert np.allclose(fast[:, [0, 2]], ref[:, [0, 2]], atol=1e-9 if analytic else 2e-6)
    # percentages may differ only by a voxel sitting within the table error of the threshold
    assert np.allclose(fast[:, [1, 3]], ref[:, [1, 3]], atol=100.0 / 600 + 1e-9)
    assert np.mean(fast[:, [1, 3]] == ref[:, [1, 3]]) > 0.95
    if mode == 1:
        assert (ref[:, 3] > 0).any()  # some echoes lost: the window branch is exercised


def test_exact_sinc_evaluation_matches_numpy_sinc():
    # |sinc| by argument reduction and a Taylor series, against numpy.sinc (the published sinc law)
    u = np.concatenate([[0.0, 1e-12, 0.25, 0.5, 0.5 + 1e-12, 1.0, 2.0, 2.5, 63.999, 64.0, 1e4 + 0.3],
                        np.random.default_rng(3).uniform(0, 40, 5000)])
    f = np.linspace(0.5, 1.5, u.size)
    vals = np.empty(u.size)
    kernels._evaluate(u, f, u.size, 1.0, 1, np.zeros(2), 1.0, False, vals)
    assert np.allclose(vals, np.abs(np.sinc(u)) * f, rtol=0, atol=1e-11)


def test_gaussian_closed_form_evaluation_matches_numpy_exp():
    # exp(-pi^2 u^2 / (4 ln 2)) (FWHM = thickness) by range reduction, against numpy.exp; zero from
    # the table's end on, as the table gives
    prof = dp.slice_profile("gaussian")
    u_max = (prof.table.size - 1) * prof.step
    u = np.concatenate([[0.0, 1e-9, 0.5, 1.0, 2.0, u_max - 1e-9, u_max, u_max + 3.0],
                        np.random.default_rng(4).uniform(0, u_max, 5000)])
    f = np.linspace(0.5, 1.5, u.size)
    vals = np.empty(u.size)
    kernels._evaluate(u, f, u.size, 1.0, 2, prof.table, prof.step, False, vals)
    expected = np.where(u < u_max, np.exp(-(np.pi**2) * u**2 / (4.0 * np.log(2.0))), 0.0) * f
    assert np.allclose(vals, expected, rtol=1e-12, atol=1e-15)
    assert vals[0] == f[0]


@pytest.mark.parametrize("n_vox", [13000, 13001])
def test_brain_median_exact_when_the_sample_bracket_misses(n_vox):
    # Voxels on the sample's stride (every third or so) get a steep gradient (near-zero retention),
    # all others almost none: the sample then brackets the wrong place and every protocol takes the fallback, which
    # must still give numpy's median.
    grad = np.zeros((3, n_vox))  # rows: along the normal, per PE step, per readout step
    grad[0] = 0.5 + np.linspace(0, 0.2, n_vox)
    grad[0, :: kernels.sample_stride(n_vox)] = 40.0
    dirs = np.eye(3)[None]
    roi = np.zeros(n_vox, bool)
    roi[:50] = True
    prof = dp.slice_profile("rect")
    args = (grad, dirs, roi, np.zeros(3, int), np.ones(3, int), np.full(3, 0.03), np.array([2.0, 3.0, 4.0]),
            np.zeros(3), 0, 0.0, 0.0, 0.0)
    for analytic in (None, "rect"):
        fast, missed = kernels.sweep_stats(*args, prof.table, prof.step, True, 0.5, analytic=analytic,
                                           return_misses=True)
        ref = kernels.sweep_stats_reference(*args, prof.retention, 0.5)
        assert missed.all()
        assert np.allclose(fast, ref, atol=1e-9 if analytic else 2e-6)
    # a zero-width bracket misses often on random data; results must not change
    grad, dirs, roi = _random_smooth_inputs(n_vox=n_vox)
    protocols = plan.protocol_grid([1.5, 3.0], [0.02, 0.035], [0, 1, 2], (1, -1))
    args = (grad, dirs, roi, np.array([int(p.tilt_deg) for p in protocols]),
            np.array([p.pe_sign for p in protocols]), np.array([p.te_s for p in protocols]),
            np.array([p.thickness_mm for p in protocols]), np.zeros(len(protocols)), 1, 64 * 5e-4, 12e-3, 16e-3)
    narrow, missed = kernels.sweep_stats(*args, prof.table, prof.step, True, 0.5, analytic="rect",
                                         bracket_sigmas=0.0, return_misses=True)
    wide, wide_missed = kernels.sweep_stats(*args, prof.table, prof.step, True, 0.5, analytic="rect",
                                            return_misses=True)
    assert missed.any() and not wide_missed.any()
    assert np.array_equal(narrow, wide)
    assert np.allclose(wide, kernels.sweep_stats_reference(*args, prof.retention, 0.5), atol=1e-9)


@pytest.mark.parametrize("n_vox", [1, 2, 3, 4])
def test_kernel_on_tiny_masks_matches_reference(n_vox):
    # the sample bracket degenerates to the whole mask; medians must still be numpy's
    grad, dirs, roi = _random_smooth_inputs(n_tilts=2, n_vox=n_vox, seed=n_vox)
    roi[:] = False
    roi[0] = True
    protocols = plan.protocol_grid([2.0, 3.0], [0.03], [0, 1], (1, -1))
    args = (grad, dirs, roi, np.array([int(p.tilt_deg) for p in protocols]), np.array([p.pe_sign for p in protocols]),
            np.array([p.te_s for p in protocols]), np.array([p.thickness_mm for p in protocols]),
            np.zeros(len(protocols)), 1, 64 * 5e-4, 12e-3, 16e-3)
    prof = dp.slice_profile("rect")
    fast = kernels.sweep_stats(*args, prof.table, prof.step, True, 0.5, analytic="rect")
    assert np.allclose(fast, kernels.sweep_stats_reference(*args, prof.retention, 0.5), atol=1e-9)


def test_kernel_medians_exact_on_ties_and_even_counts():
    # Even voxel count with many exact ties (zero gradient -> retention exactly 1, lost -> 0).
    grad = np.zeros((3, 10))  # rows: along the normal, per PE step, per readout step
    grad[0, :3] = [2.0, 4.0, 6.0]
    grad[1, 7:] = -50.0  # no echo for the + polarity
    dirs = np.eye(3)[None]
    roi = np.zeros(10, bool)
    roi[:4] = True
    prof = dp.slice_profile("rect")
    args = (grad, dirs, roi, np.array([0]), np.array([1]), np.array([0.03]), np.array([3.0]), np.zeros(1), 1,
            0.032, 0.016, 0.016)
    fast = kernels.sweep_stats(*args, prof.table, prof.step, True, 0.5)
    ref = kernels.sweep_stats_reference(*args, prof.retention, 0.5)
    assert np.allclose(fast, ref, atol=1e-6)
    # ROI: sinc(0.18), sinc(0.36), sinc(0.54), 1 -> median of the middle two
    assert fast[0, 0] == pytest.approx(0.5 * (abs(np.sinc(0.36)) + abs(np.sinc(0.18))), abs=1e-6)


def test_numba_and_numpy_engines_agree_through_sweep():
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    kw = dict(thickness_mm=[2.0, 3.0], te_s=[0.025, 0.035], tilt_deg=[-10.0, 0.0, 15.0], echo_spacing_s=5e-4,
              partial_fourier=0.75, zshim_mtms_per_m=(0.0, -0.5), profile="gaussian")
    a = plan.sweep(b0, affine, roi, brain, engine="numba", **kw)
    b = plan.sweep(b0, affine, roi, brain, engine="numpy", **kw)
    assert [r.protocol for r in a] == [r.protocol for r in b] or all(
        abs(x.roi_median - y.roi_median) < 1e-5 for x, y in zip(a, b))
    key = {r.protocol: r for r in b}
    for r in a:
        assert r.roi_median == pytest.approx(key[r.protocol].roi_median, abs=2e-6)
        assert r.brain_median == pytest.approx(key[r.protocol].brain_median, abs=2e-6)


def test_mask_extent_equals_brute_force_projection_of_every_voxel():
    # a hollow, non-convex mask on an oblique grid, against projecting all voxel centres
    rng = np.random.default_rng(2)
    ijk = np.indices((14, 12, 10)).transpose(1, 2, 3, 0)
    r = np.linalg.norm(ijk - [7, 6, 5], axis=-1)
    mask = (r < 5.5) & (r > 3.0) & (rng.random(r.shape) < 0.7)
    affine = np.eye(4)
    affine[:3, :3] = dp.tilt_rotation(25.0) @ np.diag([2.0, 2.5, 3.0])
    normals = rng.normal(size=(7, 3))
    normals /= np.linalg.norm(normals, axis=1, keepdims=True)
    proj_axes = normals @ affine[:3, :3]
    along = np.argwhere(mask) @ proj_axes.T
    expected = along.max(0) - along.min(0) + np.abs(proj_axes).sum(1)
    assert np.allclose(plan.mask_extent_mm(mask, affine, normals), expected, atol=1e-9)


def test_scan_time_arithmetic():
    assert plan.slices_to_cover(120.0, 3.0) == 40
    assert plan.slices_to_cover(121.0, 3.0) == 41
    assert plan.slices_to_cover(120.0, 3.0, 0.3) == 37  # 37*3 + 36*0.3 = 121.8 >= 120
    assert plan.shortest_tr_s(40, 0.05) == pytest.approx(2.0)
    assert plan.shortest_tr_s(41, 0.05, multiband=2) == pytest.approx(1.05)
    m = np.zeros((10, 10, 10), bool)
    m[2:8, 2:8, 2:8] = True
    # tilted by 45 deg about x: the extent along the normal of a cube of 6 voxels (2 mm)
    n = dp.tilt_rotation(45.0) @ [0, 0, 1.0]
    ext = plan.mask_extent_mm(m, np.diag([2.0, 2.0, 2.0, 1.0]), n)
    assert ext == pytest.approx((5 * 2 + 5 * 2) * np.sqrt(0.5) + 2 * 2 * np.sqrt(0.5))


def test_sweep_rows_scan_time_and_tr_limit():
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    rows = plan.sweep(b0, affine, roi, brain, thickness_mm=[2.0, 3.0], te_s=[0.03], tilt_deg=[0.0],
                      time_per_slice_s=0.05, slice_gap_mm=0.0, max_tr_s=2.0)
    by = {r.thickness_mm: r for r in rows}
    extent = plan.mask_extent_mm(brain | roi, affine, np.array([0, 0, 1.0]))
    assert by[2.0].n_slices == int(np.ceil(extent / 2.0 - 1e-9))
    assert by[3.0].n_slices < by[2.0].n_slices
    assert by[2.0].tr_s == pytest.approx(by[2.0].n_slices * 0.05)
    assert by[2.0].fits_tr == (by[2.0].tr_s <= 2.0)
    choice, reason = plan.recommend(rows, tolerance=0.5)
    assert choice.fits_tr
    assert [r.rank for r in rows] == list(range(1, len(rows) + 1))


def test_recommend_prefers_fewer_brain_losses_then_shorter_tr():
    base = dict(brain_median=0.9, n_slices=40)
    rows = plan.rank([
        plan_row(**base, protocol="a", thickness_mm=2.0, roi_median=0.950, brain_percent_below=3.0, tr_s=3.0),
        plan_row(**base, protocol="b", thickness_mm=3.0, roi_median=0.945, brain_percent_below=3.0, tr_s=2.0),
        plan_row(**base, protocol="c", thickness_mm=4.0, roi_median=0.900, brain_percent_below=1.0, tr_s=1.5),
    ])
    assert rows[0].protocol == "a"
    assert plan.recommend(rows, tolerance=0.01)[0].protocol == "b"
    assert plan.recommend(rows, tolerance=0.0)[0].protocol == "a"
    assert plan.recommend(rows, tolerance=0.1)[0].protocol == "c"


def test_plot_tradeoffs_writes_png(tmp_path):
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    rows = plan.sweep(b0, affine, roi, brain, thickness_mm=[2.0, 3.0], te_s=[0.025, 0.03], tilt_deg=[-10.0, 0.0, 10.0],
                      echo_spacing_s=5e-4)
    choice, _ = plan.recommend(rows)
    fig = plan.plot_tradeoffs(rows, tmp_path / "p.png", recommended=choice)
    data = (tmp_path / "p.png").read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 10000
    assert len(fig.axes) == 4


def test_sweep_refuses_bad_input():
    affine, xyz = _grid((6, 6, 6))
    b0 = np.zeros((6, 6, 6))
    with pytest.raises(InputError):
        plan.sweep(b0, affine, np.zeros((6, 6, 6), bool), thickness_mm=[2.0], te_s=[0.03], tilt_deg=[0.0])
    roi = np.ones((6, 6, 6), bool)
    with pytest.raises(InputError):
        plan.sweep(b0, affine, roi, thickness_mm=[-2.0], te_s=[0.03], tilt_deg=[0.0])
    with pytest.raises(InputError):
        plan.sweep(b0, affine, roi, thickness_mm=[2.0], te_s=[0.03], tilt_deg=[0.0], engine="gpu")


# --------------------------------------------------------------------------- workflow and command line

import csv
import json
import subprocess
import sys
from pathlib import Path

import nibabel as nib

FIELDFIX = str(Path(sys.executable).with_name("fieldfix"))


def _scenario_files(tmp_path):
    affine, xyz, b0, roi, brain, *_ = _sphere_scenario()
    paths = {}
    for name, data in (("b0", b0), ("roi", roi), ("brain", brain)):
        paths[name] = tmp_path / f"{name}.nii.gz"
        nib.save(nib.Nifti1Image(data.astype(np.float32), affine), str(paths[name]))
    return paths


def test_run_plan_writes_table_json_and_figure(tmp_path):
    from fieldfix.errors import OutputError
    from fieldfix.workflows.plan import run_plan

    p = _scenario_files(tmp_path)
    out = tmp_path / "out"
    summary = run_plan(p["b0"], out, roi_path=p["roi"], brain_mask_path=p["brain"], te_s=[0.025, 0.03],
                       thickness_mm=[2.0, 3.0], tilt_deg=[-10.0, 0.0, 10.0], echo_spacing_s=5e-4, tag="x_")
    with open(out / "x_plan.csv", newline="") as handle:
        table = list(csv.DictReader(handle))
    assert len(table) == 24 == summary.protocols
    assert [int(r["rank"]) for r in table] == list(range(1, 25))
    merits = [float(r["merit"]) for r in table]
    assert merits == sorted(merits, reverse=True) and merits[0] == 1.0
    assert summary.ranking == "efficiency" and summary.field_source == "measured"
    saved = json.loads((out / "x_plan.json").read_text())
    assert set(saved["columns"]) == set(table[0]) and saved["columns"]["tr_s"] == "TR (s)"
    assert saved["reason"] == summary.reason and len(saved["rows"]) == 24
    assert len(saved["provenance"]["Inputs"][0]["sha256"]) == 64
    assert (out / "x_plan.png").read_bytes()[:4] == b"\x89PNG"
    assert summary.recommended.te_s == 0.025  # beside the air cavity the shorter echo time wins
    with pytest.raises(OutputError):
        run_plan(p["b0"], out, roi_path=p["roi"], te_s=[0.03], thickness_mm=[2.0], tag="x_")


def test_run_plan_honours_the_b0_maps_units(tmp_path):
    """A map in rad/s (BIDS sidecar Units) plans as the same map in Hz; 2 pi rad/s = 1 Hz by definition."""
    from fieldfix.workflows.plan import run_plan

    p = _scenario_files(tmp_path)
    img = nib.load(str(p["b0"]))
    rads = tmp_path / "b0_rads.nii.gz"
    nib.save(nib.Nifti1Image(img.get_fdata().astype(np.float32) * np.float32(2 * np.pi), img.affine), str(rads))
    (tmp_path / "b0_rads.json").write_text(json.dumps({"Units": "rad/s"}))
    options = dict(roi_path=p["roi"], brain_mask_path=p["brain"], te_s=[0.025, 0.035], thickness_mm=[2.0, 4.0])
    in_hz = run_plan(p["b0"], tmp_path / "hz", **options)
    in_rads = run_plan(rads, tmp_path / "rads", **options)
    assert in_rads.recommended.protocol == in_hz.recommended.protocol
    for a, b in zip(in_hz.rows, in_rads.rows):
        assert a.protocol == b.protocol and abs(a.roi_median - b.roi_median) < 1e-5


def test_cli_plan_end_to_end(tmp_path):
    p = _scenario_files(tmp_path)
    out = tmp_path / "cli"
    proc = subprocess.run([FIELDFIX, "plan", "--b0", str(p["b0"]), "--roi", str(p["roi"]), "--brain-mask",
                           str(p["brain"]), "--te", "25ms,30ms,35ms", "--thickness", "2mm,2.5mm,3mm", "--tilt",
                           "-30deg:30deg:10deg", "--echo-spacing", "0.5ms", "--partial-fourier", "6/8", "--out",
                           str(out), "--json"], capture_output=True, text=True, timeout=240)
    assert proc.returncode == 0, proc.stderr
    summary = json.loads(proc.stdout)
    assert summary["protocols"] == 3 * 3 * 7 * 2
    assert summary["metric"] == "bold_sensitivity"
    assert summary["reason"].endswith(".")
    for key in ("csv", "json", "figure"):
        assert Path(summary["outputs"][key]).exists()
    # no ROI voxels overlap -> one-line error, status 2
    empty = tmp_path / "empty.nii.gz"
    nib.save(nib.Nifti1Image(np.zeros((4, 4, 4), np.float32), np.eye(4) * 3 + np.diag([0, 0, 0, -2])), str(empty))
    bad = subprocess.run([FIELDFIX, "plan", "--b0", str(p["b0"]), "--roi", str(empty), "--te", "30ms",
                          "--thickness", "2mm", "--out", str(tmp_path / "bad")], capture_output=True, text=True,
                         timeout=240)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1
