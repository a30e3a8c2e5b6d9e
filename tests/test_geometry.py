"""Phase-encode geometry and grid resampling, checked against nibabel and scipy.ndimage."""

import itertools

import nibabel as nib
import numpy as np
import pytest
from nibabel.orientations import aff2axcodes
from scipy import ndimage

from fieldfix.errors import GeometryError, InputError
from fieldfix.geometry import (
    PE_CODES,
    overlap_fraction,
    parse_pe_code,
    pe_code,
    pe_code_from_world,
    pe_world_direction,
    resample_to_grid,
    slice_normal_world,
    voxel_sizes_mm,
    world_gradient,
)

_WORD = {"R": "right", "L": "left", "A": "anterior", "P": "posterior", "S": "superior", "I": "inferior"}
_OPP = {"R": "L", "L": "R", "A": "P", "P": "A", "S": "I", "I": "S"}


def _orientations():
    """Affines for every axis permutation and flip (48 orientations), with 2/2.5/3 mm voxels."""
    sizes = np.array([2.0, 2.5, 3.0])
    for perm in itertools.permutations(range(3)):
        for flips in itertools.product([1, -1], repeat=3):
            affine = np.zeros((4, 4))
            for axis, (world, flip) in enumerate(zip(perm, flips)):
                affine[world, axis] = flip * sizes[axis]
            affine[:3, 3] = [-90, -100, -60]
            affine[3, 3] = 1
            yield affine


def test_parse_all_six_codes_and_back():
    for code in PE_CODES:
        axis, sign = parse_pe_code(code)
        assert pe_code(axis, sign) == code
    with pytest.raises(InputError, match="unknown phase-encode code"):
        parse_pe_code("y-")


@pytest.mark.parametrize("affine", list(_orientations()))
def test_world_direction_matches_nibabel_orientations(affine):
    # External reference: nibabel.orientations.aff2axcodes names the world direction in
    # which each voxel axis increases.
    codes = aff2axcodes(affine)
    for code in PE_CODES:
        axis, sign = parse_pe_code(code)
        toward = codes[axis] if sign > 0 else _OPP[codes[axis]]
        expected = f"{_WORD[_OPP[toward]]} to {_WORD[toward]}"
        assert pe_world_direction(code, affine) == expected
        assert pe_code_from_world(expected, affine) == code
        assert pe_code_from_world(f"{_OPP[toward]}>{toward}", affine) == code


def test_oblique_direction_is_flagged():
    rotation = nib.eulerangles.euler2mat(x=np.deg2rad(25))
    affine = np.eye(4)
    affine[:3, :3] = rotation * 2.0
    assert pe_world_direction("j", affine).endswith("(oblique)")
    assert pe_world_direction("i", affine) == "left to right"


def test_bad_direction_text():
    with pytest.raises(InputError):
        pe_code_from_world("up to down", np.eye(4))
    with pytest.raises(InputError):
        pe_code_from_world("anterior to right", np.eye(4))


def test_slice_normal_follows_axis():
    affine = np.diag([2.0, 2.0, -3.0, 1.0])
    assert np.allclose(slice_normal_world(affine, 2), [0, 0, -1])
    assert np.allclose(voxel_sizes_mm(affine), [2, 2, 3])


def _smooth_field(shape, seed=0):
    rng = np.random.default_rng(seed)
    return ndimage.gaussian_filter(rng.normal(size=shape), 2.0) * 100


@pytest.mark.parametrize("order", [1, 3])
def test_resample_identity_grid_returns_input(order):
    field = _smooth_field((12, 14, 10))
    affine = np.diag([2.0, 2.0, 2.5, 1.0])
    values, inside = resample_to_grid(field, affine, field.shape, affine.copy(), order=order)
    assert np.allclose(values, field)
    assert inside.all()


@pytest.mark.parametrize("order", [1, 3])
def test_resample_shifted_grid_matches_map_coordinates(order):
    # External reference: scipy.ndimage.map_coordinates at the same voxel coordinates.
    field = _smooth_field((16, 18, 12), seed=1)
    src = np.diag([2.0, 2.0, 2.5, 1.0])
    src[:3, 3] = [-16, -18, -15]
    dst = src.copy()
    dst[:3, 3] += [0.7, -1.3, 2.0]  # shifted by a fraction of a voxel on each axis
    values, inside = resample_to_grid(field, src, field.shape, dst, order=order)
    grid = np.indices(field.shape).astype(float)
    offset = np.array([0.7 / 2, -1.3 / 2, 2.0 / 2.5]).reshape(3, 1, 1, 1)
    reference = ndimage.map_coordinates(field, (grid + offset).reshape(3, -1), order=order,
                                        mode="nearest").reshape(field.shape)
    assert np.allclose(values, reference, atol=1e-10)
    # The shifted grid pokes out of the source on one side of each axis.
    assert not inside.all() and inside.mean() > 0.8
    assert inside[5:10, 5:10, 3:8].all()


def test_resample_to_coarser_rotated_grid_of_linear_field_is_exact():
    # A linear field is reproduced exactly by linear interpolation wherever the point is inside.
    src = np.diag([1.0, 1.0, 1.0, 1.0])
    src[:3, 3] = -20
    ijk = np.indices((41, 41, 41)).astype(float)
    xyz = ijk - 20
    field = 3 * xyz[0] - 2 * xyz[1] + 0.5 * xyz[2]
    dst = np.eye(4)
    dst[:3, :3] = nib.eulerangles.euler2mat(z=0.3, x=0.2) * 2.5
    dst[:3, 3] = [-10, -10, -10]
    values, inside = resample_to_grid(field, src, (8, 8, 8), dst, order=1)
    world = np.einsum("ij,jxyz->ixyz", dst[:3, :3], np.indices((8, 8, 8)).astype(float)) + dst[:3, 3, None, None, None]
    expected = 3 * world[0] - 2 * world[1] + 0.5 * world[2]
    assert inside.sum() > 100
    assert np.allclose(values[inside], expected[inside], atol=1e-9)


def test_outside_fill_value_and_overlap():
    field = np.ones((4, 4, 4))
    dst = np.eye(4)
    dst[0, 3] = 2.0
    values, inside = resample_to_grid(field, np.eye(4), (4, 4, 4), dst, outside=np.nan)
    assert np.isnan(values[~inside]).all() and inside[:2].all() and not inside[2:].any()
    assert overlap_fraction((4, 4, 4), np.eye(4), (4, 4, 4), dst) == pytest.approx(0.5)
    far = np.eye(4)
    far[:3, 3] = 500
    assert overlap_fraction((4, 4, 4), np.eye(4), (4, 4, 4), far) == 0.0
    with pytest.raises(GeometryError):
        resample_to_grid(np.ones((4, 4)), np.eye(4), (4, 4, 4), np.eye(4))


def test_world_gradient_of_a_linear_field_on_an_oblique_grid():
    affine = np.eye(4)
    affine[:3, :3] = nib.eulerangles.euler2mat(z=0.4, y=-0.3, x=0.2) @ np.diag([2.0, 2.5, 3.0])
    affine[:3, 3] = [5, -3, 2]
    ijk = np.indices((6, 7, 8)).astype(float)
    xyz = np.einsum("ij,jxyz->ixyz", affine[:3, :3], ijk) + affine[:3, 3, None, None, None]
    field = 4.0 * xyz[0] - 1.5 * xyz[1] + 2.0 * xyz[2] + 7
    grad = world_gradient(field, affine)
    assert grad.shape == (6, 7, 8, 3)
    assert np.allclose(grad, [4.0, -1.5, 2.0], atol=1e-9)


@pytest.mark.parametrize("shape", [(6, 7, 8), (1, 5, 4), (5, 1, 2)])
def test_world_gradient_at_chosen_voxels_equals_the_full_map(shape):
    # the voxel-subset path against numpy.gradient on the whole grid, edges and flat axes included
    rng = np.random.default_rng(5)
    field = rng.normal(size=shape)
    affine = np.eye(4)
    affine[:3, :3] = nib.eulerangles.euler2mat(z=0.3, y=0.2, x=-0.4) @ np.diag([2.0, 1.5, 3.0])
    full = world_gradient(field, affine)
    at = rng.choice(field.size, size=min(field.size, 40), replace=False)
    assert np.allclose(world_gradient(field, affine, at=at), full.reshape(-1, 3)[at], atol=1e-12)


@pytest.mark.parametrize("shape", [(6, 7, 8), (1, 5, 4), (5, 1, 2), (4, 3, 1)])
def test_numba_gradient_rows_equal_the_numpy_subset_path(shape):
    # the planner's numba gradient against its plain-numpy twin (bit for bit) and numpy.gradient,
    # every voxel included so that each edge and each single-voxel axis is crossed
    from fieldfix import _dropout_kernels as kernels

    rng = np.random.default_rng(7)
    field = rng.normal(size=shape)
    affine = np.eye(4)
    affine[:3, :3] = nib.eulerangles.euler2mat(z=-0.5, y=0.1, x=0.3) @ np.diag([2.5, 1.0, 3.5])
    at = rng.permutation(field.size)
    rows = kernels.gradient_rows(field, at, np.ascontiguousarray(np.linalg.inv(affine[:3, :3]).T))
    assert rows.shape == (3, field.size)
    assert np.array_equal(rows, world_gradient(field, affine, at=at).T)
    assert np.allclose(rows.T, world_gradient(field, affine).reshape(-1, 3)[at], atol=1e-12)
