"""Tests of fieldfix.shift: timing resolution, shift maps, Jacobian, folds, displacement field."""

import numpy as np
import pytest

from fieldfix.errors import GeometryError, InputError, MetadataError
from fieldfix.shift import (
    displacement_field_mm,
    echo_spacing_from_readout_time,
    fold_mask,
    intensity_weight,
    jacobian_from_shift,
    readout_time_from_echo_spacing,
    resolve_timing,
    shift_summary,
    shift_vox_from_field,
)


def test_readout_time_and_echo_spacing_relation():
    # BIDS definition: TotalReadoutTime = EffectiveEchoSpacing * (ReconMatrixPE - 1).
    assert echo_spacing_from_readout_time(0.0455, 92) == pytest.approx(0.0005)
    assert readout_time_from_echo_spacing(0.0005, 92) == pytest.approx(0.0455)
    with pytest.raises(GeometryError):
        echo_spacing_from_readout_time(0.03, 1)


def test_resolve_timing_from_sidecar_and_arguments():
    t = resolve_timing(92, sidecar={"TotalReadoutTime": 0.0455})
    assert t.echo_spacing_s == pytest.approx(0.0005) and t.source == "sidecar"
    t = resolve_timing(92, echo_spacing_s=0.0005)
    assert t.readout_time_s == pytest.approx(0.0455) and t.source == "arguments"
    t = resolve_timing(92, readout_time_s=0.0455, sidecar={"EffectiveEchoSpacing": 0.0005})
    assert t.source == "arguments+sidecar"
    # Consistent pair inside one sidecar.
    t = resolve_timing(92, sidecar={"TotalReadoutTime": 0.0455, "EffectiveEchoSpacing": 0.0005})
    assert t.echo_spacing_s == pytest.approx(0.0005)


def test_resolve_timing_contradictions():
    with pytest.raises(MetadataError, match="disagree"):
        resolve_timing(92, sidecar={"TotalReadoutTime": 0.05, "EffectiveEchoSpacing": 0.0005})
    with pytest.raises(MetadataError, match="disagree"):
        resolve_timing(64, readout_time_s=0.05, echo_spacing_s=0.0005)
    with pytest.raises(MetadataError, match="contradicts"):
        resolve_timing(92, readout_time_s=0.06, sidecar={"TotalReadoutTime": 0.0455})
    won = resolve_timing(92, readout_time_s=0.06, sidecar={"TotalReadoutTime": 0.0455}, timing_win="arguments")
    assert won.readout_time_s == pytest.approx(0.06)
    won = resolve_timing(92, readout_time_s=0.06, sidecar={"TotalReadoutTime": 0.0455}, timing_win="sidecar")
    assert won.readout_time_s == pytest.approx(0.0455)
    with pytest.raises(InputError):
        resolve_timing(92, readout_time_s=0.06, timing_win="both")


def test_resolve_timing_missing_and_implausible():
    with pytest.raises(MetadataError, match="no readout timing"):
        resolve_timing(64, sidecar={"EchoTime": 0.03})
    with pytest.raises(MetadataError, match="plausible"):
        resolve_timing(64, sidecar={"TotalReadoutTime": 45.6})  # milliseconds written as seconds
    with pytest.raises(MetadataError, match="plausible"):
        resolve_timing(64, readout_time_s=0.0005)
    with pytest.raises(MetadataError):
        resolve_timing(64, sidecar={"TotalReadoutTime": "fast"})
    with pytest.raises(MetadataError):
        resolve_timing(64, echo_spacing_s=-0.0005)


@pytest.mark.parametrize("code, axis, sign", [("i", 0, 1), ("i-", 0, -1), ("j", 1, 1), ("j-", 1, -1),
                                              ("k", 2, 1), ("k-", 2, -1)])
def test_shift_size_and_sign(code, axis, sign):
    shape = [4, 5, 6]
    field = np.full(shape, 25.0)
    shift = shift_vox_from_field(field, code, 0.0004)
    assert np.allclose(shift, sign * 25.0 * 0.0004 * shape[axis])
    # An explicit reconstructed matrix size overrides the grid size.
    assert np.allclose(shift_vox_from_field(field, code, 0.0004, n_pe_lines=100), sign * 25.0 * 0.0004 * 100)


def test_jacobian_analytic():
    # shift = a * sin(2 pi y / n): J = 1 + a * 2 pi / n * cos(2 pi y / n) (central differences, O(h^2)).
    n = 200
    y = np.arange(n, dtype=float)
    shift = np.broadcast_to(3.0 * np.sin(2 * np.pi * y / n), (2, 3, n))
    jac = jacobian_from_shift(shift, 2)
    expected = 1 + 3.0 * 2 * np.pi / n * np.cos(2 * np.pi * y / n)
    assert np.allclose(jac[0, 0, 1:-1], expected[1:-1], atol=1e-4)
    assert jacobian_from_shift(np.zeros((3, 1, 2)), 1).tolist() == np.ones((3, 1, 2)).tolist()


def test_fold_mask_and_weight_rule():
    jac = np.array([1.5, 1.0, 0.3, 0.1, 0.0, -0.7])
    assert fold_mask(jac).tolist() == [False, False, False, True, True, True]
    assert intensity_weight(jac).tolist() == [1.5, 1.0, 0.3, 0.1, 0.1, 0.1]
    assert fold_mask(jac, jacobian_floor=0.0).tolist() == [False, False, False, False, True, True]


def test_displacement_field_oblique_affine():
    angle = np.deg2rad(30)
    affine = np.eye(4)
    affine[:3, :3] = np.array([[np.cos(angle), -np.sin(angle), 0], [np.sin(angle), np.cos(angle), 0], [0, 0, 1]])
    affine[:3, :3] *= np.array([2.0, 2.5, 3.0])
    shift = np.full((2, 2, 2), 2.0)
    disp = displacement_field_mm(shift, 1, affine)
    assert disp.shape == (2, 2, 2, 3)
    # Length is shift * voxel size along the PE axis, direction the PE axis in world space.
    assert np.linalg.norm(disp[0, 0, 0]) == pytest.approx(5.0)
    assert np.allclose(disp[0, 0, 0] / 5.0, affine[:3, 1] / 2.5)


def test_shift_summary():
    shift = np.zeros((3, 10, 2))
    shift[0, 2, 0] = 2.5
    shift[1, 3, 1] = -1.5
    shift[2, 4, 1] = 9.0  # outside the mask
    mask = np.ones(shift.shape, bool)
    mask[2, 4, 1] = False
    jac = np.ones(shift.shape)
    jac[0, 0, 0] = -0.2
    summary = shift_summary(shift, jac, 1, np.diag([2.0, 3.0, 4.0, 1.0]), mask)
    assert summary.max_abs_shift_vox == pytest.approx(2.5)
    assert summary.max_abs_shift_mm == pytest.approx(7.5)
    assert summary.percent_shifted_over_1_voxel == pytest.approx(100 * 2 / 59)
    assert summary.folded_voxels == 1
    assert summary.voxels_in_mask == 59
