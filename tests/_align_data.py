"""Simulated heads for the alignment and motion tests (invented data, deterministic).

A procedural head (fieldfix.susceptibility.head_model geometry, evaluated exactly at any world
point) gives two contrasts from its labels: a gradient-echo magnitude for the field map (brain
bright, CSF darker) and an EPI contrast (CSF brightest, brain texture inverted). Its B0 field
comes from the Fourier dipole model at 3 T, shimmed to second order over the brain. A head that
moves carries its field along (first order, as the EPI simulator assumes). EPI volumes are
acquired line by line in k-space by fieldfix.simulate.epi.simulate_epi.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import ndimage

from fieldfix._pose import pose_matrix
from fieldfix.simulate.epi import fine_coordinates, simulate_epi
from fieldfix.susceptibility import HEAD_LABELS, field_from_susceptibility, head_labels_at, head_model, shim_field

EPI_CONTRAST = {"brain": 0.62, "csf": 1.0, "scalp": 0.55, "soft_tissue": 0.45, "skull": 0.08,
                "ethmoid_cells": 0.04, "mastoid_cells": 0.04}
GRE_CONTRAST = {"brain": 1.0, "csf": 0.42, "scalp": 0.85, "soft_tissue": 0.9, "skull": 0.12,
                "ethmoid_cells": 0.06, "mastoid_cells": 0.06}
FIELD_T = 3.0


def head_intensity(points_mm, contrast: dict, texture_sign: float) -> np.ndarray:
    """Intensity of the head at world points (..., 3) for one contrast, with a brain texture."""
    x, y, z = (points_mm[..., a] for a in range(3))
    labels = head_labels_at(x, y, z)
    lut = np.zeros(256)
    for name, value in contrast.items():
        lut[HEAD_LABELS[name]] = value
    values = lut[labels]
    brain = labels == HEAD_LABELS["brain"]
    # Grey / white matter: a folded boundary (sharp, as tissue boundaries are), contrast inverted
    # between the two images; two ventricles filled with CSF.
    folds = np.cos(x / 7.0) * np.sin(y / 8.0 + 0.5) * np.cos(z / 7.5 - 0.3)
    white = np.tanh(4.0 * folds)
    values[brain] *= 1.0 + texture_sign * 0.2 * white[brain]
    for side in (-1.0, 1.0):
        ventricle = (((x - side * 9.0) / 6.0) ** 2 + ((y + 4.0) / 22.0) ** 2 + ((z - 18.0) / 9.0) ** 2) < 1.0
        values[brain & ventricle] = contrast["csf"]
    return values


@lru_cache(maxsize=1)
def head_field():
    """(field_hz on a 4 mm grid around the head, its affine): dipole model, 3 T, brain shim."""
    model = head_model((44, 52, 56), 4.0, supersample=1)
    field = field_from_susceptibility(model.chi_ppm, model.affine, field_t=FIELD_T, oversample=1)
    shimmed, _ = shim_field(field, model.brain_mask, model.affine, order=2)
    return np.asarray(shimmed, float), model.affine


def field_at(points_mm) -> np.ndarray:
    """The head's field (Hz) at world points (..., 3), cubic interpolation, edge values outside."""
    field, affine = head_field()
    inverse = np.linalg.inv(affine)
    ijk = points_mm @ inverse[:3, :3].T + inverse[:3, 3]
    coords = np.moveaxis(ijk, -1, 0)
    return ndimage.map_coordinates(field, coords.reshape(3, -1), order=3, mode="nearest").reshape(ijk.shape[:-1])


def grid_points(shape, affine, oversample=1) -> np.ndarray:
    """World points (..., 3) of a grid's voxel centres, or of its fine sub-samples."""
    axes = fine_coordinates(shape, oversample) if oversample != 1 else [np.arange(n, dtype=float) for n in shape]
    ijk = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1)
    return ijk @ np.asarray(affine)[:3, :3].T + np.asarray(affine)[:3, 3]


def moved_back(points_mm, pose) -> np.ndarray:
    """Where the head point now at `points_mm` was before the pose (pose^-1 applied)."""
    inverse = np.linalg.inv(pose)
    return points_mm @ inverse[:3, :3].T + inverse[:3, 3]


def grid_affine(shape, voxel_mm, centre_mm=(0.0, 0.0, 0.0)) -> np.ndarray:
    affine = np.diag([voxel_mm, voxel_mm, voxel_mm, 1.0])
    affine[:3, 3] = np.asarray(centre_mm, float) - voxel_mm * (np.asarray(shape) - 1) / 2.0
    return affine


@dataclass(frozen=True)
class Acquisition:
    epi: np.ndarray            # distorted EPI volume on the run grid
    truth: np.ndarray          # undistorted moved object (block mean of the fine object), EPI contrast
    field_run_hz: np.ndarray   # true field of the moved head on the run grid
    affine: np.ndarray


def acquire_epi(shape, affine, pose, *, pe_code="j-", echo_spacing_s=5e-4, oversample=2, noise_sd=0.0,
                seed=0, smooth_fine=0.0, te_s=0.03) -> Acquisition:
    """EPI of the head moved by `pose` (4x4, head world -> run world), k-space simulator."""
    fine = grid_points(shape, affine, oversample)
    source = moved_back(fine, pose)
    # smooth_fine > 0 widens tissue boundaries (Gaussian sigma in fine samples).
    obj = head_intensity(source, EPI_CONTRAST, -1.0)
    if smooth_fine > 0:
        obj = ndimage.gaussian_filter(obj, smooth_fine)
    field = field_at(source)
    epi = simulate_epi(obj, field, pe_code=pe_code, echo_spacing_s=echo_spacing_s, te_s=te_s,
                       oversample=oversample, noise_sd=noise_sd, rng=np.random.default_rng(seed))
    o = oversample
    truth = obj.reshape(shape[0], o, shape[1], o, shape[2], o).mean(axis=(1, 3, 5))
    field_run = field.reshape(shape[0], o, shape[1], o, shape[2], o).mean(axis=(1, 3, 5))
    return Acquisition(epi, truth, field_run, np.asarray(affine, float))


def fieldmap(shape, affine, supersample=2):
    """(gradient-echo magnitude, b0_hz) of the head in its own (field-map) position."""
    fine = grid_points(shape, affine, supersample)
    s = supersample
    magnitude = head_intensity(fine, GRE_CONTRAST, +1.0).reshape(shape[0], s, shape[1], s, shape[2], s)
    return magnitude.mean(axis=(1, 3, 5)), field_at(grid_points(shape, affine))


def pose(translation_mm=(0.0, 0.0, 0.0), rotation_deg=(0.0, 0.0, 0.0), centre_mm=(0.0, 0.0, 0.0)):
    return pose_matrix(np.asarray(translation_mm, float), np.deg2rad(rotation_deg), centre_mm)


def smooth_head(points_mm) -> np.ndarray:
    """A smooth invented head (two nested soft ellipsoids and a folded texture) at world points (..., 3)."""
    x, y, z = points_mm[..., 0], points_mm[..., 1], points_mm[..., 2]
    r2 = (x / 70.0) ** 2 + (y / 88.0) ** 2 + (z / 80.0) ** 2
    inner = 1.0 / (1.0 + np.exp((r2 - 0.8) * 40.0))
    outer = 1.0 / (1.0 + np.exp((r2 - 1.0) * 40.0))
    return 0.6 * outer + inner * (0.5 + 0.2 * np.cos(x / 8.0) * np.sin(y / 9.0) * np.cos(z / 7.0))


def smooth_field(points_mm) -> np.ndarray:
    """Its field (Hz): a frontal off-resonance bump and a gentle gradient along y."""
    x, y, z = points_mm[..., 0], points_mm[..., 1], points_mm[..., 2]
    return 120.0 * np.exp(-((x / 25.0) ** 2 + ((y - 55.0) / 20.0) ** 2 + ((z + 30.0) / 20.0) ** 2)) + 0.15 * y


#: The acceptance case: run and field-map grids, and the head's move between them (pitched 3 deg,
#: 4 mm anterior, 3 mm superior).
MOVED_RUN = ((64, 64, 40), 3.5, (0.0, -5.0, 10.0))
MOVED_FIELDMAP = ((56, 60, 44), 3.8, (2.0, 0.0, 5.0))
MOVE_MM, MOVE_DEG = (0.0, 4.0, 3.0), (3.0, 0.0, 0.0)


def moved_head_scan(echo_spacing_s: float = 5e-4) -> dict:
    """The acceptance case: EPI of the moved head (and without distortion), the field map where it was."""
    run_affine = grid_affine(*MOVED_RUN)
    fm_affine = grid_affine(*MOVED_FIELDMAP)
    shape = MOVED_RUN[0]
    centre = run_affine[:3, :3] @ ((np.array(shape) - 1) / 2) + run_affine[:3, 3]
    move = pose(MOVE_MM, MOVE_DEG, centre)
    run = acquire_epi(shape, run_affine, move, echo_spacing_s=echo_spacing_s, noise_sd=0.005)
    still = acquire_epi(shape, run_affine, move, echo_spacing_s=1e-7)  # no distortion
    magnitude, b0_hz = fieldmap(MOVED_FIELDMAP[0], fm_affine)
    return dict(run=run, still=still, magnitude=magnitude, b0_hz=b0_hz, fm_affine=fm_affine, run_affine=run_affine,
                pose=move)
