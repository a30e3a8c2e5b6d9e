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
        source = rng.standard_normal(500).astype(source_dtype)
        index = rng.integers(0, 500, (300, 4)).astype(np.int32)
        weight = rng.standard_normal((300, 4)).astype(np.float32)
        assert np.allclose(kernels.gather(source, index, weight), kernels.gather_reference(source, index, weight),
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
