"""A simulated head at 3 T for the pairs tests: susceptibility field, k-space EPI of both polarities.

The field comes from fieldfix.susceptibility (procedural head, Fourier dipole kernel, second-order
shim in the brain); the images from fieldfix.simulate.epi's line-by-line k-space simulator, which
knows nothing of shift maps. Spin-echo contrast (T2-weighted, invented values): CSF brightest,
then brain, scalp and soft tissue; bone and air dark.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import ndimage

from fieldfix import susceptibility as sus
from fieldfix.simulate.epi import fine_coordinates, simulate_epi

VOXEL_MM = 2.5
ECHO_SPACING_S = 5e-4
#: Intensity per tissue (invented, roughly T2-weighted).
CONTRAST = {"air": 0.0, "scalp": 0.6, "skull": 0.05, "soft_tissue": 0.5, "csf": 1.4, "brain": 1.0}


@dataclass
class Head:
    shape: tuple
    oversample: tuple
    object_fine: np.ndarray
    field_fine: np.ndarray
    truth: np.ndarray  # undistorted object at the image resolution
    b0_hz: np.ndarray  # true field at the image resolution (block mean of the fine field)
    brain: np.ndarray
    affine: np.ndarray


def _intensity(labels):
    lut = np.zeros(256)
    for name, value in CONTRAST.items():
        lut[sus.HEAD_LABELS[name]] = value
    for name, number in sus.HEAD_LABELS.items():
        if name not in CONTRAST:
            lut[number] = 0.0  # air cavities
    return lut[labels]


def _block_mean(fine, oversample):
    shape = [n // o for n, o in zip(fine.shape, oversample)]
    return fine.reshape(shape[0], oversample[0], shape[1], oversample[1], shape[2], oversample[2]).mean(axis=(1, 3, 5))


@lru_cache(maxsize=2)
def head(n_slices: int = 20, z_centre_mm: float = -10.0, oversample=(1, 2, 2)) -> Head:
    """A head on a 64 x 80 x `n_slices` grid of 2.5 mm voxels (80 lines along j, A-P), at 3 T."""
    full = sus.head_model((64, 80, 88), VOXEL_MM, supersample=2)
    field = sus.field_from_susceptibility(full.chi_ppm, full.affine, field_t=3.0)
    field, _ = sus.shim_field(field, full.brain_mask, full.affine, order=2)
    shape = (64, 80, n_slices)
    first = int(round((z_centre_mm - full.affine[2, 3]) / VOXEL_MM - n_slices / 2))
    coords = fine_coordinates(shape, oversample)
    x = full.affine[0, 3] + VOXEL_MM * coords[0]
    y = full.affine[1, 3] + VOXEL_MM * coords[1]
    z = full.affine[2, 3] + VOXEL_MM * (coords[2] + first)
    grid = np.meshgrid(x, y, z, indexing="ij")
    labels = sus.head_labels_at(*grid)
    obj = _intensity(labels)
    index = [(g - full.affine[a, 3]) / VOXEL_MM for a, g in enumerate(grid)]
    field_fine = ndimage.map_coordinates(np.asarray(field, float), index, order=3, mode="nearest")
    affine = np.diag([VOXEL_MM, VOXEL_MM, VOXEL_MM, 1.0])
    affine[:3, 3] = full.affine[:3, 3] + np.array([0.0, 0.0, first * VOXEL_MM])
    brain = _block_mean((labels == sus.HEAD_LABELS["brain"]).astype(float), oversample) > 0.99
    return Head(shape, tuple(oversample), obj, field_fine, _block_mean(obj, oversample),
                _block_mean(field_fine, oversample), brain, affine)


def acquire(h: Head, pe_code: str, *, spin_echo: bool, te_s: float, noise_sd: float, seed: int,
            gain: float = 1.0) -> np.ndarray:
    """One EPI volume of the head by the k-space simulator (magnitude)."""
    image = simulate_epi(h.object_fine, h.field_fine, pe_code=pe_code, echo_spacing_s=ECHO_SPACING_S,
                         te_s=te_s, oversample=h.oversample, spin_echo=spin_echo,
                         noise_sd=noise_sd, rng=np.random.default_rng(seed))
    return gain * image
