"""Tests of fieldfix.unwarp and its numba kernels."""

import numpy as np
import pytest
from scipy import ndimage

from fieldfix import _unwarp_kernels as kernels
from fieldfix.errors import GeometryError, InputError
from fieldfix.unwarp import (
    apply_tables,
    build_tables,
    distort,
    distort_with_field,
    field_on_grid,
    interpolate_along_axis,
    shift_maps,
    unwarp_array,
    unwarp_volume,
)


def _smooth_object(shape, pe_axis):
    """A smooth blob well inside the grid (isolated: zero near the edges)."""
    grids = np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij")
    r2 = sum(((g - (n - 1) / 2) / (n / 9)) ** 2 for g, n in zip(grids, shape))
    return np.exp(-r2 / 2) * (1 + 0.3 * np.cos(grids[pe_axis] / 2.0))


def _smooth_shift(shape, pe_axis, amplitude):
    grids = np.meshgrid(*[np.arange(n, dtype=float) for n in shape], indexing="ij")
    others = [a for a in range(3) if a != pe_axis]
    y = grids[pe_axis] / shape[pe_axis]
    return amplitude * np.sin(2 * np.pi * y + 0.5) * np.cos(np.pi * grids[others[0]] / shape[others[0]]) + 0.3


@pytest.mark.parametrize("interp, order", [("linear", 1), ("cubic", 3)])
@pytest.mark.parametrize("axis", [0, 1, 2])
def test_interpolation_matches_scipy_map_coordinates(interp, order, axis):
    # External reference: scipy.ndimage.map_coordinates of the same spline order, sampling
    # only along one axis (positions within [0, n - 1], where its 'constant' mode interpolates).
    rng = np.random.default_rng(1)
    shape = (7, 9, 11)
    volume = rng.standard_normal(shape)
    positions = rng.uniform(0, shape[axis] - 1, shape)
    positions.flat[:5] = [0.0, shape[axis] - 1.0, 0.5, 1e-9, shape[axis] - 1.5]
    ours = interpolate_along_axis(volume, positions, axis, interp)
    coords = [c.astype(float) for c in np.indices(shape)]
    coords[axis] = positions
    reference = ndimage.map_coordinates(volume, coords, order=order, mode="constant")
    assert np.max(np.abs(ours - reference)) < 1e-5


def test_boundary_rule():
    volume = np.tile(np.arange(1.0, 7.0), (2, 1))[..., None]  # values 1..6 along axis 1
    positions = np.broadcast_to(np.array([-0.7, -0.4, 5.3, 5.6, 2.0, 6.0])[None, :, None], volume.shape)
    for interp in ("linear", "cubic", "sinc"):
        out = interpolate_along_axis(volume, positions, 1, interp)[0, :, 0]
        assert out[0] == 0 and out[3] == 0 and out[5] == 0  # beyond half a voxel: from outside the FOV
        assert out[1] == pytest.approx(1.0, abs=1e-6) and out[2] == pytest.approx(6.0, abs=1e-6)
        assert out[4] == pytest.approx(3.0, abs=1e-6)


def test_sinc_interpolation_of_band_limited_signal():
    # Analytic check: a periodic band-limited signal (0.23 cycles/voxel, where a cubic
    # B-spline already attenuates) sampled at shifted positions.
    n = 128
    y = np.arange(n, dtype=float)

    def signal(x):
        return np.cos(2 * np.pi * 30 * x / n + 0.2) + 0.5 * np.sin(2 * np.pi * 7 * x / n + 0.3)

    volume = np.broadcast_to(signal(y), (2, 3, n)).copy()
    positions = np.broadcast_to(y + 0.37, volume.shape)
    truth = signal(y + 0.37)
    interior = slice(16, n - 16)
    errors = {}
    for interp in ("linear", "cubic", "sinc"):
        out = interpolate_along_axis(volume, positions, 2, interp)[0, 0]
        errors[interp] = np.max(np.abs(out - truth)[interior])
    assert errors["sinc"] < 0.005
    assert errors["sinc"] < errors["cubic"] / 3 and errors["cubic"] < errors["linear"]


def test_gather_kernel_equals_numpy_reference():
    rng = np.random.default_rng(2)
    for source_dtype in (np.float32, np.float64):
        for taps in (1, 2, 3, 4, 8):  # fixed-tap kernels (2, 4, 8) and the generic one
            source = rng.standard_normal(500).astype(source_dtype)
            index = rng.integers(0, 500, (300, taps)).astype(np.int32)
            weight = rng.standard_normal((300, taps)).astype(np.float32)
            reference = kernels.gather_reference(source, index, weight)
            for parallel in (True, False):
                assert np.allclose(kernels.gather(source, index, weight, parallel=parallel), reference,
                                   rtol=1e-5, atol=1e-5)
    index64 = rng.integers(0, 500, (50, 2))
    weight = rng.random((50, 2)).astype(np.float32)
    source = rng.random(500).astype(np.float32)
    assert np.allclose(kernels.gather(source, index64, weight), kernels.gather_reference(source, index64, weight),
                       atol=1e-6)


def test_splat_kernel_equals_numpy_reference():
    rng = np.random.default_rng(3)
    n = 20
    values = rng.random((30, n))
    left = rng.uniform(-4, n + 3, (30, n))
    right = left + rng.uniform(-3, 3, (30, n))  # includes reversed (folded) intervals
    right[:, ::7] = left[:, ::7]  # degenerate intervals
    ours = kernels.splat_lines(values, left, right)
    reference = kernels.splat_lines_reference(values, left, right)
    assert np.allclose(ours, reference, atol=1e-10)
    # Everything that lands inside [-0.5, n - 0.5] is kept.
    inside = kernels.splat_lines(values, np.full((30, n), 3.2), np.full((30, n), 9.9))
    assert np.allclose(inside.sum(axis=1), values.sum(axis=1))


def test_forward_distortion_analytic_linear_shift():
    # shift = g * (y - c): an interval dy maps onto (1 + g) dy, so a uniform image becomes 1 / (1 + g).
    n = 40
    for g in (0.25, -0.4):
        shift = np.broadcast_to(g * (np.arange(n) - n / 2), (2, 2, n)).copy()
        out = distort(np.ones((2, 2, n)), shift, 2)
        core = out[0, 0, 12:28]
        assert np.allclose(core, 1 / (1 + g), rtol=1e-9)


def test_forward_direction_follows_polarity():
    img = np.zeros((1, 12, 1))
    img[0, 5, 0] = 1.0
    # 100 Hz, 1 ms spacing, 12 lines: 1.2 voxels towards increasing index for 'j'.
    plus = distort_with_field(img, np.full(img.shape, 100.0), "j", 0.001)[0, :, 0]
    minus = distort_with_field(img, np.full(img.shape, 100.0), "j-", 0.001)[0, :, 0]
    centroid = np.arange(12) @ plus
    assert centroid == pytest.approx(6.2)
    assert np.arange(12) @ minus == pytest.approx(3.8)


@pytest.mark.parametrize("interp", ["linear", "cubic", "sinc"])
@pytest.mark.parametrize("pe_axis", [0, 1])
def test_round_trip_smooth_field(interp, pe_axis):
    shape = [20, 20, 6]
    shape[pe_axis] = 48
    shape = tuple(shape)
    image = _smooth_object(shape, pe_axis)
    shift = _smooth_shift(shape, pe_axis, amplitude=3.0)
    slope = np.abs(np.gradient(shift, axis=pe_axis)).max()
    assert 0.3 < slope < 0.5
    distorted = distort(image, shift, pe_axis)
    assert np.sqrt(np.mean((distorted - image) ** 2)) / np.sqrt(np.mean(image ** 2)) > 0.1  # really distorted
    recovered = unwarp_volume(distorted, shift, pe_axis, interp=interp)
    nrmse = np.sqrt(np.mean((recovered - image) ** 2)) / np.sqrt(np.mean(image ** 2))
    assert nrmse < 0.02


def test_jacobian_keeps_summed_signal():
    shape = (16, 48, 4)
    image = _smooth_object(shape, 1)
    shift = _smooth_shift(shape, 1, amplitude=3.0)
    distorted = distort(image, shift, 1)
    assert distorted.sum() == pytest.approx(image.sum(), rel=1e-5)  # forward model conserves signal
    with_jacobian = unwarp_volume(distorted, shift, 1, jacobian=True)
    without = unwarp_volume(distorted, shift, 1, jacobian=False)
    assert with_jacobian.sum() == pytest.approx(image.sum(), rel=0.01)
    # Per line the intensity correction matters: without it the lines' sums are off by more than 1%.
    line_error = np.abs(without.sum(axis=1) - image.sum(axis=1)) / image.sum(axis=1).max()
    assert line_error.max() > 0.01
    line_error = np.abs(with_jacobian.sum(axis=1) - image.sum(axis=1)) / image.sum(axis=1).max()
    assert line_error.max() < 0.01


def test_tables_reused_for_4d_and_shape_checks():
    rng = np.random.default_rng(4)
    shape = (6, 10, 3)
    shift = rng.uniform(-1.5, 1.5, shape)
    data = rng.random(shape + (5,)).astype(np.float32)
    whole = unwarp_array(data, shift, 1, interp="cubic")
    tables = build_tables(shift, 1, interp="cubic")
    for t in range(5):
        assert np.array_equal(apply_tables(tables, data[..., t]), whole[..., t])
    with pytest.raises(GeometryError):
        apply_tables(tables, data[:5, ..., 0])
    with pytest.raises(InputError):
        build_tables(shift, 1, interp="nearest")
    assert tables.index.shape == (60 * 3, 4) and tables.nbytes > 0


def test_integer_input_volume():
    shift = np.zeros((3, 4, 2))
    volume = np.arange(24, dtype=np.int16).reshape(3, 4, 2)
    assert np.array_equal(unwarp_volume(volume, shift, 1), volume.astype(np.float32))


def test_shift_maps_and_folds():
    field = np.zeros((2, 40, 2))
    field[:, 18:22, :] = 400.0  # a sharp field step folds the mapping at its far edge
    maps = shift_maps(field, "j", 0.0005)
    assert maps.pe_axis == 1 and maps.pe_sign == 1
    assert maps.shift_vox.max() == pytest.approx(400 * 0.0005 * 40)
    assert maps.fold.any() and maps.fold[0, 22, 0]
    assert not maps.fold[0, 5, 0]


def test_field_on_grid_through_affines():
    # A linear field along world y, sampled on a grid with twice the voxel size and an offset.
    src_affine = np.diag([1.0, 1.0, 1.0, 1.0])
    field = np.broadcast_to(5.0 * np.arange(30.0)[None, :, None], (10, 30, 10)).copy()
    dst_affine = np.diag([2.0, 2.0, 2.0, 1.0])
    dst_affine[:3, 3] = [1.0, 3.0, 1.0]
    values, inside = field_on_grid(field, src_affine, (4, 12, 4), dst_affine)
    world_y = 3.0 + 2.0 * np.arange(12)
    assert np.allclose(values[1, :, 1][inside[1, :, 1]], 5.0 * world_y[inside[1, :, 1]])


# ---------------------------------------------------------------------------------------
# Workflow and command line (small synthetic NIfTI files)

import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import nibabel as nib  # noqa: E402

from fieldfix.errors import MetadataError, OutputError  # noqa: E402
from fieldfix.io import load_image, save_image  # noqa: E402
from fieldfix.workflows.unwarp import run_unwarp  # noqa: E402

FIELDFIX = Path(sys.executable).with_name("fieldfix")


def _write_run(path, data, affine, tr_s=2.0, sidecar=None):
    image = nib.Nifti1Image(np.asarray(data, np.float32), affine)
    image.header.set_xyzt_units("mm", "sec")
    if np.asarray(data).ndim == 4:
        image.header.set_zooms(tuple(image.header.get_zooms()[:3]) + (tr_s,))
    nib.save(image, str(path))
    if sidecar is not None:
        Path(str(path).replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return Path(path)


@pytest.fixture
def scene(tmp_path):
    """A 4D run on an oblique-free 2.5 mm grid and a B0 map on a finer, offset grid."""
    rng = np.random.default_rng(11)
    shape = (10, 24, 4)
    affine = np.diag([2.5, 2.5, 3.0, 1.0])
    affine[:3, 3] = [-12.0, -30.0, -6.0]
    base = _smooth_object(shape, 1)
    data = base[..., None] * (1 + 0.05 * rng.standard_normal((1, 1, 1, 40))) + 0.01 * rng.random(shape + (40,))
    run = _write_run(tmp_path / "sub-01_task-rest_bold.nii.gz", data, affine, tr_s=1.5,
                     sidecar={"PhaseEncodingDirection": "j-", "TotalReadoutTime": 0.0345, "RepetitionTime": 1.5})
    b0_affine = np.diag([1.25, 1.25, 1.5, 1.0])
    b0_affine[:3, 3] = [-13.0, -31.0, -7.0]
    grid = np.meshgrid(*[np.arange(n, dtype=float) for n in (22, 50, 10)], indexing="ij")
    world_y = b0_affine[1, 1] * grid[1] + b0_affine[1, 3]
    b0 = 40.0 * np.sin(world_y / 12.0) + 10.0
    b0_path = save_image(tmp_path / "b0_hz.nii.gz", b0, b0_affine)
    mask = np.zeros(b0.shape)
    mask[3:-3, 5:-5, 1:-1] = 1
    save_image(tmp_path / "b0_mask.nii.gz", mask, b0_affine)
    return tmp_path, run, b0_path, data, affine


def test_workflow_streamed_equals_loaded_whole(scene):
    folder, run, b0_path, data, affine = scene
    summaries = run_unwarp([run], b0_path, folder / "out", interp="cubic")
    (summary,) = summaries
    outputs = summary.outputs.paths(folder / "out")
    corrected = load_image(outputs["corrected"])
    assert corrected.shape == data.shape and np.allclose(corrected.affine, affine)
    assert corrected.tr_s == pytest.approx(1.5) and corrected.header.get_data_dtype() == np.float32
    shift = load_image(outputs["shift_vox"]).get_fdata(np.float64)
    whole = unwarp_array(nib.load(str(run)).get_fdata(), shift, 1, interp="cubic")
    assert np.allclose(corrected.get_fdata(), whole, atol=1e-5)
    # Timing and direction came from the sidecar; the mask beside the B0 map was found.
    assert summary.pe_code == "j-" and summary.timing.source == "sidecar"
    assert summary.timing.echo_spacing_s == pytest.approx(0.0345 / 23)
    assert summary.b0_mask.endswith("b0_mask.nii.gz") and summary.n_volumes == 40
    assert summary.pe_direction_world == "anterior to posterior"
    # Shift = -field x spacing x 24 lines, field sampled through the affines at the run's voxel centres.
    world_y = affine[1, 1] * np.arange(24) + affine[1, 3]
    expected = -(40.0 * np.sin(world_y / 12.0) + 10.0) * (0.0345 / 23) * 24
    assert np.allclose(shift[5, :, 2], expected, atol=0.02)
    stored = json.loads(outputs["summary"].read_text())
    assert stored["max_abs_shift_mm"] == pytest.approx(summary.max_abs_shift_mm)
    assert 0 < stored["max_abs_shift_mm"] <= np.abs(expected).max() * 2.5 + 1e-6
    # Provenance sidecar beside each image.
    record = json.loads(outputs["corrected"].with_name("sub-01_task-rest_bold_corrected.json").read_text())
    assert record["Parameters"]["interp"] == "cubic" and len(record["Inputs"]) == 3


def test_workflow_displacement_field_and_masks(scene):
    folder, run, b0_path, data, affine = scene
    (summary,) = run_unwarp(run, b0_path, folder / "out", tag="x_")
    outputs = summary.outputs.paths(folder / "out")
    assert outputs["corrected"].name == "x_sub-01_task-rest_bold_corrected.nii.gz"
    disp = nib.load(str(outputs["displacement_mm"]))
    assert disp.header.get_intent()[0] == "displacement vector" and int(disp.header["intent_code"]) == 1006
    assert disp.shape == (10, 24, 4, 1, 3)
    shift = nib.load(str(outputs["shift_vox"])).get_fdata()
    vectors = disp.get_fdata()[:, :, :, 0, :]
    assert np.allclose(vectors[..., 1], 2.5 * shift, atol=1e-5) and np.allclose(vectors[..., [0, 2]], 0)
    fold = nib.load(str(outputs["fold_mask"])).get_fdata()
    jac = nib.load(str(outputs["jacobian"])).get_fdata()
    assert np.array_equal(fold > 0, jac <= 0.1)


def test_workflow_metadata_errors(scene):
    folder, run, b0_path, data, affine = scene
    with pytest.raises(MetadataError, match="contradicts") as err:
        run_unwarp([run], b0_path, folder / "a", readout_time_s=0.05)
    assert "bold" in str(err.value)
    (summary,) = run_unwarp([run], b0_path, folder / "b", readout_time_s=0.05, timing_win="arguments")
    assert summary.timing.readout_time_s == pytest.approx(0.05)
    with pytest.raises(MetadataError, match="phase-encode"):
        run_unwarp([run], b0_path, folder / "c", pe_code="j")
    (summary,) = run_unwarp([run], b0_path, folder / "d", pe_code="j", timing_win="arguments")
    assert summary.pe_code == "j"
    # Outputs exist: refused without overwrite, nothing replaced.
    with pytest.raises(OutputError):
        run_unwarp([run], b0_path, folder / "d", pe_code="j", timing_win="arguments")
    assert not (folder / "a").exists() or not any((folder / "a").iterdir())


def test_workflow_corrects_large_shifts_with_a_warning_and_refuses_unit_mistakes(scene):
    folder, run, b0_path, data, affine = scene
    # The field doubled (-60..+100 Hz) with a 0.1 s readout (4.3 ms per line): up to 0.1 / 23 * 100 * 24 =
    # 10.4 voxels, more than a quarter of the 24 voxels: large but plausible, corrected with a warning.
    b0 = load_image(b0_path)
    strong = save_image(folder / "b0_strong_hz.nii.gz", b0.get_fdata() * 2, b0.affine)
    (summary,) = run_unwarp([run], strong, folder / "o", readout_time_s=0.1, timing_win="arguments")
    assert summary.max_abs_shift_vox > 6 and summary.large_shifts
    assert summary.signal_max_abs_shift_vox > 0.25 * 24 and summary.signal_p99_abs_shift_vox <= 0.5 * 24
    assert any("large shifts" in w for w in summary.warnings)
    # The same map written in rad/s and read as Hz (x 2 pi): the bulk of the signal would move by more
    # than half the field of view, which means a unit mistake: refused unless forced.
    rads = save_image(folder / "b0_rads_as_hz.nii.gz", b0.get_fdata() * 2 * 2 * np.pi, b0.affine)
    with pytest.raises(GeometryError, match="half the field of view.*unit or timing mistake") as err:
        run_unwarp([run], rads, folder / "p", readout_time_s=0.1, timing_win="arguments")
    assert "sub-01_task-rest_bold" in str(err.value)
    (forced,) = run_unwarp([run], rads, folder / "p", readout_time_s=0.1, timing_win="arguments", force=True)
    assert forced.signal_p99_abs_shift_vox > 0.5 * 24


def test_workflow_several_runs_share_field_map(tmp_path):
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    shape = (8, 16, 3)
    b0 = np.full(shape, 25.0)
    b0_path = save_image(tmp_path / "field.nii.gz", b0, affine)
    img = np.zeros(shape + (3,))
    img[:, 8, :, :] = 1.0
    runs = [
        _write_run(tmp_path / "run1.nii.gz", img, affine, sidecar={"PhaseEncodingDirection": "j",
                                                                  "EffectiveEchoSpacing": 0.0005}),
        _write_run(tmp_path / "run2.nii.gz", img[..., 0], affine, sidecar={"PhaseEncodingDirection": "j-",
                                                                          "EffectiveEchoSpacing": 0.0005}),
    ]
    summaries = run_unwarp(runs, b0_path, tmp_path / "out", jacobian=False, parallel=False)
    assert [s.pe_code for s in summaries] == ["j", "j-"]
    # 25 Hz x 0.5 ms x 16 lines = 0.2 voxel; the corrected line moves against the shift.
    first = load_image(tmp_path / "out" / summaries[0].outputs.corrected).get_fdata()
    second = load_image(tmp_path / "out" / summaries[1].outputs.corrected).get_fdata()
    assert first.shape == shape + (3,) and second.shape == shape
    profile1 = first[4, :, 1, 0]
    profile2 = second[4, :, 1]
    # Default cubic B-spline: the cardinal spline reproduces linear functions, so the centroid
    # moves by the shift exactly up to its tails cut by the 16-voxel line (|sqrt(3) - 2|**8 ~ 3e-5).
    assert summaries[0].interp == "cubic"
    assert np.arange(16) @ profile1 / profile1.sum() == pytest.approx(8 - 0.2, abs=1e-3)
    assert np.arange(16) @ profile2 / profile2.sum() == pytest.approx(8 + 0.2, abs=1e-3)


def test_workflow_recovers_simulated_run(tmp_path):
    # End to end with the acquisition simulator: known object, known field, j- encoding.
    from fieldfix.simulate.epi import epi_sidecar, fine_coordinates, simulate_epi_run

    shape, oversample = (16, 32, 3), (2, 2, 2)
    x, y, _ = np.meshgrid(*fine_coordinates(shape, oversample), indexing="ij")
    obj = np.exp(-(((x - 7.5) / 4) ** 2 + ((y - 15.5) / 7) ** 2) / 2)
    field = 50 * np.sin(2 * np.pi * y / 32 + 0.4) + 15
    data, _ = simulate_epi_run(obj, field, 4, pe_code="j-", echo_spacing_s=0.0008, te_s=0.03,
                               oversample=oversample, noise_sd=0.002, rng=np.random.default_rng(0))
    affine = np.diag([3.0, 3.0, 3.0, 1.0])
    run = _write_run(tmp_path / "sim_bold.nii.gz", data, affine,
                     sidecar=epi_sidecar("j-", 32, 0.0008, 0.03))
    b0_path = save_image(tmp_path / "b0_hz.nii.gz",
                         field.reshape(16, 2, 32, 2, 3, 2).mean(axis=(1, 3, 5)), affine)
    (summary,) = run_unwarp([run], b0_path, tmp_path / "out", interp="cubic")
    corrected = load_image(tmp_path / "out" / summary.outputs.corrected).get_fdata()
    truth = obj.reshape(16, 2, 32, 2, 3, 2).mean(axis=(1, 3, 5))

    def nrmse(a):
        return np.sqrt(np.mean((a - truth) ** 2)) / np.sqrt(np.mean(truth ** 2))

    assert nrmse(data[..., 0]) > 0.1
    assert all(nrmse(corrected[..., t]) < 0.03 for t in range(4))


@pytest.mark.slow
def test_cli_end_to_end(scene):
    folder, run, b0_path, data, affine = scene
    out = folder / "cli_out"
    done = subprocess.run([str(FIELDFIX), "unwarp", str(run), "--b0", str(b0_path), "--phase-encoding", "j-",
                           "--readout-time", "34.5ms", "--interp", "linear", "--out", str(out), "--json"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr
    summary = json.loads(done.stdout)
    assert summary["runs"][0]["readout_time_ms"] == pytest.approx(34.5)
    for suffix in ("_corrected.nii.gz", "_shift_vox.nii.gz", "_jacobian.nii.gz", "_fold_mask.nii.gz",
                   "_displacement_mm.nii.gz", "_unwarp.json"):
        assert (out / f"sub-01_task-rest_bold{suffix}").is_file()
    # The quality report is built by default, and its numbers come from this run.
    assert summary["report"] == str(out / "report.html")
    report = json.loads((out / "report.json").read_text())
    assert report["runs"][0]["max_abs_shift_mm"] == pytest.approx(summary["runs"][0]["max_abs_shift_mm"], rel=1e-3)
    skipped = subprocess.run([str(FIELDFIX), "unwarp", str(run), "--b0", str(b0_path), "--phase-encoding", "j-",
                              "--readout-time", "34.5ms", "--no-report", "--quiet", "--out", str(folder / "plain")],
                             capture_output=True, text=True, timeout=120)
    assert skipped.returncode == 0, skipped.stderr
    assert not (folder / "plain" / "report.html").exists()
    assert (folder / "plain" / "sub-01_task-rest_bold_corrected.nii.gz").is_file()
    # A bare number has no unit: refused with exit status 2 and one error line.
    bad = subprocess.run([str(FIELDFIX), "unwarp", str(run), "--b0", str(b0_path), "--readout-time", "34.5",
                          "--out", str(folder / "bad")], capture_output=True, text=True, timeout=120)
    assert bad.returncode == 2 and len(bad.stderr.strip().splitlines()) == 1
    assert not (folder / "bad").exists()


def test_mirror_indices_match_scipy_mirror_mode():
    # scipy.ndimage 'mirror' mode (d c b | a b c d | c b a) on tiny and ordinary axes.
    from fieldfix.unwarp import _mirror

    for n in (1, 2, 3, 7):
        index = np.arange(-15, 22)
        signal = np.arange(n, dtype=float) * 10
        expected = ndimage.map_coordinates(signal, [index.astype(float)], order=0, mode="mirror")
        assert np.array_equal(signal[_mirror(index, n)], expected)


@pytest.mark.parametrize("interp", ["linear", "cubic", "sinc"])
def test_fortran_layout_tables_give_the_same_voxels(interp):
    rng = np.random.default_rng(9)
    shape = (5, 12, 4)
    shift = rng.uniform(-2, 2, shape)
    volume = rng.random(shape)
    reference = apply_tables(build_tables(shift, 1, interp=interp), volume)
    tables_f = build_tables(shift, 1, interp=interp, layout="F")
    for candidate in (np.asfortranarray(volume), np.ascontiguousarray(volume)):
        out = apply_tables(tables_f, candidate)
        assert out.flags.f_contiguous and np.array_equal(out, reference)
    with pytest.raises(ValueError):
        apply_tables(tables_f, volume, out=np.empty(shape, np.float32))  # C-ordered buffer for F tables


def test_workflow_failure_mid_run_leaves_no_partial_output(scene, monkeypatch):
    import fieldfix.workflows.unwarp as workflow
    from fieldfix.io import StreamingWriter

    folder, run, b0_path, data, affine = scene
    calls = {"n": 0}
    original = workflow.apply_tables

    def failing(tables, volume, out=None, **options):
        calls["n"] += 1
        if calls["n"] == 5:
            raise RuntimeError("simulated failure while unwarping")
        return original(tables, volume, out, **options)

    monkeypatch.setattr(workflow, "apply_tables", failing)
    with pytest.raises(RuntimeError, match="simulated"):
        run_unwarp([run], b0_path, folder / "fail1")
    assert not any((folder / "fail1").glob("*corrected*"))
    monkeypatch.setattr(workflow, "apply_tables", original)

    def failing_write(self, volume):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(StreamingWriter, "write", failing_write)
    with pytest.raises(OutputError, match="No space left"):
        run_unwarp([run], b0_path, folder / "fail2")
    assert not any((folder / "fail2").glob("*corrected*"))


def test_workflow_checks_every_run_before_writing(tmp_path):
    affine = np.eye(4)
    shape = (6, 16, 2)
    b0_path = save_image(tmp_path / "field.nii.gz", np.full(shape, 150.0), affine)
    fine = _write_run(tmp_path / "fine.nii.gz", np.ones(shape + (2,)), affine,
                      sidecar={"PhaseEncodingDirection": "j", "TotalReadoutTime": 0.005})  # 0.8 voxel
    huge = _write_run(tmp_path / "huge.nii.gz", np.ones(shape + (2,)), affine,
                      sidecar={"PhaseEncodingDirection": "j", "TotalReadoutTime": 0.06})  # 9.6 voxels > 16 / 2
    with pytest.raises(GeometryError, match="huge.nii.gz"):
        run_unwarp([fine, huge], b0_path, tmp_path / "out")
    assert not (tmp_path / "out").exists() or not any((tmp_path / "out").iterdir())


@pytest.mark.parametrize("layout", ["C", "F"])
@pytest.mark.parametrize("pe_axis", [0, 1, 2])
def test_tables_built_in_slabs_equal_one_piece(layout, pe_axis, monkeypatch):
    import fieldfix.unwarp as module

    rng = np.random.default_rng(12)
    shape = (5, 6, 7)
    shift = rng.uniform(-3, 3, shape)
    whole = build_tables(shift, pe_axis, interp="cubic", layout=layout)
    monkeypatch.setattr(module, "_SLAB_VOXELS", 20)  # several slabs, some of them uneven
    pieces = build_tables(shift, pe_axis, interp="cubic", layout=layout)
    assert np.array_equal(whole.index, pieces.index) and np.array_equal(whole.weight, pieces.weight)
    volume = rng.random(shape)
    reference = interpolate_along_axis(volume, np.indices(shape)[pe_axis] + shift, pe_axis, "cubic")
    jac = np.maximum(1 + np.gradient(shift, axis=pe_axis), 0.1)
    assert np.allclose(apply_tables(pieces, volume), reference * jac, atol=1e-5)


def test_workflow_refuses_bad_recon_matrix_and_non_finite_volumes(tmp_path):
    affine = np.eye(4)
    shape = (4, 8, 2)
    b0_path = save_image(tmp_path / "field.nii.gz", np.full(shape, 10.0), affine)
    sidecar = {"PhaseEncodingDirection": "j", "TotalReadoutTime": 0.01}
    for value in ("eight", [8], 8.5, True, 9):
        run = _write_run(tmp_path / "recon.nii.gz", np.ones(shape + (2,)), affine,
                         sidecar={**sidecar, "ReconMatrixPE": value})
        with pytest.raises(MetadataError, match="ReconMatrixPE") as err:
            run_unwarp([run], b0_path, tmp_path / "o1")
        assert "recon.json" in str(err.value)
    run = _write_run(tmp_path / "recon.nii.gz", np.ones(shape + (2,)), affine, sidecar={**sidecar, "ReconMatrixPE": 8.0})
    assert run_unwarp([run], b0_path, tmp_path / "o2")[0].timing.n_pe_lines == 8
    data = np.ones(shape + (3,))
    data[1, 2, 0, 2] = np.nan
    bad = _write_run(tmp_path / "nan_bold.nii.gz", data, affine, sidecar=sidecar)
    with pytest.raises(InputError, match="volume 2 contains NaN") as err:
        run_unwarp([bad], b0_path, tmp_path / "o3")
    assert "nan_bold.nii.gz" in str(err.value)
    assert not any((tmp_path / "o3").glob("*")) if (tmp_path / "o3").exists() else True


def test_workflow_keeps_a_one_volume_run_4d_with_its_tr(tmp_path):
    # a 4D run with a single volume is read as 3D; its corrected output is written 4D again,
    # with the TR of the input header (no sidecar TR here), checked through nibabel
    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    shape = (8, 16, 3)
    b0_path = save_image(tmp_path / "field.nii.gz", np.full(shape, 25.0), affine)
    img = np.zeros(shape + (1,))
    img[:, 8, :, 0] = 1.0
    run = _write_run(tmp_path / "one.nii.gz", img, affine, tr_s=2.2,
                     sidecar={"PhaseEncodingDirection": "j", "EffectiveEchoSpacing": 0.0005})
    loaded = load_image(run)
    assert loaded.shape == shape and loaded.file_shape == shape + (1,) and loaded.tr_s == pytest.approx(2.2)
    (summary,) = run_unwarp([run], b0_path, tmp_path / "out", jacobian=False, parallel=False)
    out = nib.load(tmp_path / "out" / summary.outputs.corrected)
    assert out.shape == shape + (1,)
    assert out.header.get_zooms()[3] == pytest.approx(2.2)
    profile = np.asanyarray(out.dataobj)[4, :, 1, 0]
    assert np.arange(16) @ profile / profile.sum() == pytest.approx(8 - 0.2, abs=1e-3)  # cubic: see above


# ---------------------------------------------------------------------------------------
# The fused cubic kernel (prefilter + gather per block of lines, no index tables)


@pytest.mark.parametrize("n", [1, 2, 3, 5, 28, 29, 97])
def test_bspline_prefilter_reference_matches_scipy(n):
    # External reference: scipy.ndimage.spline_filter1d (order 3, mirror), the same recursive
    # filter of Unser, Aldroubi & Eden 1993 (IEEE Trans. Signal Process. 41(2)).
    lines = np.random.default_rng(n).standard_normal((4, n))
    expected = ndimage.spline_filter1d(lines, order=3, axis=-1, mode="mirror")
    assert np.allclose(kernels.bspline_prefilter_reference(lines), expected, atol=1e-12)


@pytest.mark.parametrize("shape", [(3, 1, 4), (2, 2, 5), (3, 7, 40), (2, 45, 3), (5, 64, 1), (1, 300, 2)])
@pytest.mark.parametrize("parallel", [True, False])
def test_cubic_kernel_matches_plain_reference(shape, parallel):
    rng = np.random.default_rng(sum(shape))
    volume = rng.standard_normal(shape).astype(np.float32)
    n = shape[1]
    position = rng.uniform(0, n - 1, shape).astype(np.float32)
    position.flat[: min(3, position.size)] = [0.0, n - 1.0, 0.5][: min(3, position.size)]
    scale = rng.uniform(0.1, 2.0, shape).astype(np.float32)
    scale.flat[-1] = 0.0
    ours = kernels.cubic_lines(volume, position, scale, parallel=parallel)
    assert np.allclose(ours, kernels.cubic_lines_reference(volume, position, scale), atol=2e-6)


@pytest.mark.parametrize("layout", ["C", "F"])
@pytest.mark.parametrize("pe_axis", [0, 1, 2])
def test_cubic_tables_match_scipy_spline_along_one_axis(layout, pe_axis):
    # External reference: scipy's prefilter along the PE axis only (spline_filter1d, mirror)
    # followed by map_coordinates(order=3, prefilter=False, mode='mirror') line by line,
    # times the Jacobian weight; and the explicit four-tap table applied by the gather reference.
    rng = np.random.default_rng(pe_axis)
    shape = (9, 33, 6) if pe_axis == 1 else ((35, 8, 5) if pe_axis == 0 else (6, 7, 38))
    volume = rng.standard_normal(shape)
    shift = 2.5 * np.sin(np.indices(shape)[pe_axis] / 5.0) + rng.uniform(-0.3, 0.3, shape)
    tables = build_tables(shift, pe_axis, interp="cubic", jacobian=True, layout=layout)
    ours = apply_tables(tables, np.asarray(volume, order=layout))
    position = np.indices(shape)[pe_axis] + shift
    coefficients = np.moveaxis(ndimage.spline_filter1d(volume, order=3, axis=pe_axis, mode="mirror"), pe_axis, -1)
    where = np.moveaxis(np.clip(position, 0, shape[pe_axis] - 1), pe_axis, -1)
    sampled = np.empty(coefficients.shape)
    for line in np.ndindex(coefficients.shape[:2]):  # one line at a time: 1D sampling along the PE axis
        sampled[line] = ndimage.map_coordinates(coefficients[line], where[line][None], order=3, prefilter=False,
                                                mode="mirror")
    sampled = np.moveaxis(sampled, -1, pe_axis)
    inside = (position >= -0.5) & (position <= shape[pe_axis] - 0.5)
    jac = np.maximum(1 + np.gradient(shift, axis=pe_axis), 0.1)
    assert np.allclose(ours, np.where(inside, sampled * jac, 0.0), atol=1e-5)
    flat = ndimage.spline_filter1d(volume, order=3, axis=pe_axis, mode="mirror").ravel(order=layout)
    explicit = kernels.gather_reference(flat, tables.index, tables.weight).reshape(shape, order=layout)
    assert np.allclose(ours, explicit, atol=1e-5)
    assert tables.nbytes == 8 * volume.size  # one float32 position and one float32 factor per voxel


def test_cubic_is_the_library_default_and_exact_on_samples():
    rng = np.random.default_rng(5)
    volume = rng.standard_normal((4, 12, 3)).astype(np.float32)
    assert build_tables(np.zeros(volume.shape), 1).interp == "cubic"
    shift = np.full(volume.shape, 3.0)
    shift[:, 9:, :] = -2.0  # integer positions only
    out = unwarp_array(volume, shift, 1, jacobian=False)
    position = np.arange(12)[None, :, None] + shift
    expected = np.take_along_axis(volume, np.clip(position, 0, 11).astype(int), axis=1)
    assert np.array_equal(out, np.where(position <= 11.5, expected, 0.0))


# ---------------------------------------------------------------------------------------
# Output compression: as the run by default, or chosen


@pytest.mark.parametrize("run_name, compress, suffix", [
    ("run.nii", "auto", ".nii"), ("run.nii.gz", "auto", ".nii.gz"),
    ("run.nii", "gzip", ".nii.gz"), ("run.nii.gz", "none", ".nii"),
])
def test_outputs_keep_the_run_compression_unless_chosen(tmp_path, run_name, compress, suffix):
    import hashlib

    affine = np.diag([2.0, 2.0, 2.0, 1.0])
    data = np.random.default_rng(2).random((6, 12, 3, 4)) + 1.0
    run = _write_run(tmp_path / run_name, data, affine, sidecar=None)
    b0 = save_image(tmp_path / "b0_hz.nii.gz", np.full((6, 12, 3), 10.0), affine)
    (summary,) = run_unwarp([run], b0, tmp_path / "out", pe_code="j", echo_spacing_s=5e-4, compress=compress)
    outputs = summary.outputs
    for name in outputs.IMAGES:
        assert getattr(outputs, name).endswith(suffix) and not getattr(outputs, name).endswith(".nii" + ".nii")
        assert (tmp_path / "out" / getattr(outputs, name)).is_file()
    corrected = tmp_path / "out" / outputs.corrected
    assert (corrected.read_bytes()[:2] == b"\x1f\x8b") == (suffix == ".nii.gz")  # the gzip magic number
    # Outside reference: nibabel loads it; the voxels equal the in-memory correction.
    shift = shift_maps(np.full((6, 12, 3), 10.0), "j", 5e-4).shift_vox
    expected = unwarp_array(data.astype(np.float32), shift, 1)
    assert np.allclose(np.asarray(nib.load(corrected).dataobj), expected, atol=1e-6)
    # The run's hash in the provenance (taken while it streamed) is the file's SHA-256.
    record = json.loads((tmp_path / "out" / outputs.corrected.replace(suffix, ".json")).read_text())
    hashes = {Path(item["path"]).name: item["sha256"] for item in record["Inputs"]}
    assert hashes[run_name] == hashlib.sha256(run.read_bytes()).hexdigest()


def test_unknown_compression_is_refused(tmp_path):
    with pytest.raises(InputError, match="compress"):
        run_unwarp([tmp_path / "r.nii"], tmp_path / "b.nii.gz", tmp_path / "out", compress="zip")


def test_displacement_field_in_the_lps_frame_and_its_stated_convention(scene):
    folder, run, b0_path, data, affine = scene
    (ras,) = run_unwarp([run], b0_path, folder / "ras")
    (lps,) = run_unwarp([run], b0_path, folder / "lps", displacement_frame="lps")
    a = nib.load(folder / "ras" / ras.outputs.displacement_mm).get_fdata()
    b = nib.load(folder / "lps" / lps.outputs.displacement_mm).get_fdata()
    # LPS+ is RAS+ with x and y reversed (NIfTI's world axes; common practice, no source)
    np.testing.assert_allclose(b[..., 0, :], a[..., 0, :] * np.array([-1.0, -1.0, 1.0]))
    assert "LPS+" in lps.displacement_convention and "RAS+" in ras.displacement_convention
    side = json.loads((folder / "lps" / lps.outputs.displacement_mm.replace(".nii.gz", ".json")).read_text())
    assert side["DisplacementConvention"] == lps.displacement_convention and side["Units"] == "mm"
    with pytest.raises(InputError, match="frame"):
        run_unwarp([run], b0_path, folder / "bad", displacement_frame="xyz")
