"""Edge agreement: do two images of one grid have their edges in the same places?

The measure is built on the normalised gradient fields (NGF) of Haber and Modersitzki
(2006, "Intensity gradient based registration and fusion of multi-modal images", MICCAI
2006, LNCS 4191; and Methods Inf Med 2007;46:292-299). Each image's gradient is
normalised, ``n = grad I / sqrt(|grad I|^2 + eps^2)``, and the agreement is

``A = sum w (n_I . n_R)^2 / sqrt(sum w |n_I|^4 * sum w |n_R|^4)``

over a mask. Squaring makes it blind to contrast inversion (an EPI volume and a field-map
magnitude need not share contrast). Three choices are ours: ``eps`` is each image's
median gradient magnitude in the mask (so scaling either image changes nothing); the
normalisation by the self-agreements makes 1 mean "every edge parallel, with proportional
strength" and 0 "perpendicular or absent" (Cauchy-Schwarz keeps ``0 <= A <= 1``); and the
optional weight ``w`` (``along=axis``) is the squared cosine between the reference's
gradient and a voxel axis. B0 distortion moves signal along the phase-encode axis only,
so only edges whose normal has a phase-encode component can be displaced; with
``along=pe_axis`` the edges that distortion cannot move no longer dilute the measure.

:func:`moved_region` gives the voxels a correction moved: those displaced by more than a
threshold, together with the path along the phase-encode axis to where their signal lay
in the distorted run.

Examples
--------
>>> import numpy as np
>>> i, j, k = np.meshgrid(*(np.arange(8.0),) * 3, indexing="ij")
>>> round(edge_agreement(i + j, 2 * (i + j), np.eye(4)), 6)
1.0
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError

__all__ = ["edge_agreement", "edge_agreement_by_slice", "moved_region"]


def _normalised_gradients(image: np.ndarray, affine: np.ndarray, mask: np.ndarray) -> np.ndarray:
    from ..geometry import world_gradient

    gradient = world_gradient(np.asarray(image, float), affine)
    magnitude = np.sqrt(np.sum(gradient**2, axis=-1))
    inside = magnitude[mask]
    inside = inside[inside > 0]
    if inside.size == 0:
        return np.zeros_like(gradient)
    eps = float(np.median(inside))
    return gradient / np.sqrt(magnitude**2 + eps**2)[..., None]


def _ngf_terms(image, reference, affine, mask, along):
    image = np.asarray(image, float)
    reference = np.asarray(reference, float)
    if image.shape != reference.shape or image.ndim != 3:
        raise InputError(f"edge agreement needs two 3D images of one shape, got {image.shape} and {reference.shape}")
    mask = np.ones(image.shape, bool) if mask is None else np.asarray(mask, bool)
    if mask.shape != image.shape:
        raise InputError(f"mask shape {mask.shape} differs from image shape {image.shape}")
    # Work in the mask's bounding box padded by one voxel: central differences inside the
    # mask then see the same neighbours as on the whole grid, so the result is unchanged.
    box = tuple(slice(0, n) for n in image.shape)
    if mask.any() and not mask.all():
        hits = np.nonzero(mask)
        box = tuple(slice(max(int(h.min()) - 1, 0), min(int(h.max()) + 2, n)) for h, n in zip(hits, image.shape))
    image, reference, mask = image[box], reference[box], mask[box]
    n_i = _normalised_gradients(image, affine, mask)
    n_r = _normalised_gradients(reference, affine, mask)
    weight = np.ones(mask.shape)
    if along is not None:
        column = np.asarray(affine, float)[:3, int(along)]
        direction = column / np.linalg.norm(column)
        size = np.sum(n_r**2, axis=-1)
        weight = np.where(size > 0, (n_r @ direction) ** 2 / np.where(size > 0, size, 1.0), 0.0)
    cross = weight * np.sum(n_i * n_r, axis=-1) ** 2
    self_i = weight * np.sum(n_i * n_i, axis=-1) ** 2
    self_r = weight * np.sum(n_r * n_r, axis=-1) ** 2
    return cross, self_i, self_r, mask, box


def edge_agreement(image: np.ndarray, reference: np.ndarray, affine: np.ndarray, mask: np.ndarray | None = None,
                   *, along: int | None = None) -> float:
    """Agreement of edge directions between two images on one grid (0 to 1).

    Parameters
    ----------
    image, reference : (X, Y, Z) arrays
        For example an EPI volume and the field-map magnitude resampled onto the EPI grid.
    affine : (4, 4) array
        Voxel-to-world affine of the shared grid (gradients are taken in millimetres).
    mask : (X, Y, Z) bool array, optional
        Where to measure; everywhere by default.
    along : int, optional
        Voxel axis (the phase-encode axis) whose edges alone count: each voxel is weighted
        by the squared cosine between the reference's gradient and that axis.

    Returns
    -------
    float
        NaN when neither image has any gradient in the mask (or none along `along`).

    Examples
    --------
    >>> import numpy as np
    >>> i, j, k = np.meshgrid(*(np.arange(6.0),) * 3, indexing="ij")
    >>> round(edge_agreement(i, j, np.eye(4)), 6)  # perpendicular ramps
    0.0
    """
    cross, self_i, self_r, mask, _ = _ngf_terms(image, reference, affine, mask, along)
    denominator = math.sqrt(float(self_i[mask].sum()) * float(self_r[mask].sum()))
    if denominator == 0.0:
        return float("nan")
    return float(cross[mask].sum()) / denominator


def edge_agreement_by_slice(image: np.ndarray, reference: np.ndarray, affine: np.ndarray,
                            mask: np.ndarray | None = None, *, axis: int = 2, along: int | None = None) -> np.ndarray:
    """The :func:`edge_agreement` of each slice along voxel axis `axis` (NaN where empty).

    Gradients are taken in 3D once; only the sums are split by slice.

    Examples
    --------
    >>> import numpy as np
    >>> i, j, k = np.meshgrid(*(np.arange(5.0),) * 3, indexing="ij")
    >>> edge_agreement_by_slice(i + j, i + j, np.eye(4)).round(6).tolist()
    [1.0, 1.0, 1.0, 1.0, 1.0]
    """
    n_slices = np.shape(image)[axis]
    cross, self_i, self_r, mask, box = _ngf_terms(image, reference, affine, mask, along)
    other = tuple(a for a in range(3) if a != axis)
    c, si, sr = np.zeros(n_slices), np.zeros(n_slices), np.zeros(n_slices)
    c[box[axis]] = np.where(mask, cross, 0.0).sum(axis=other)
    si[box[axis]] = np.where(mask, self_i, 0.0).sum(axis=other)
    sr[box[axis]] = np.where(mask, self_r, 0.0).sum(axis=other)
    denominator = np.sqrt(si * sr)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(denominator > 0, c / np.where(denominator > 0, denominator, 1.0), np.nan)


def moved_region(shift_vox: np.ndarray, pe_axis: int, mask: np.ndarray, threshold_vox: float = 1.0) -> np.ndarray:
    """Voxels the correction moved: displaced by more than `threshold_vox`, and their paths.

    A corrected voxel at index ``y`` along the phase-encode axis took its signal from
    ``y + shift_vox`` in the distorted run (fieldfix's displacement convention); the
    region holds every voxel of `mask` with ``|shift_vox| > threshold_vox`` and every voxel
    on the segment from ``y`` to ``y + shift_vox`` (both endpoints included), so that it
    covers where an edge was before correction as well as where it is after.

    Examples
    --------
    >>> import numpy as np
    >>> shift = np.zeros((1, 8, 1)); shift[0, 2, 0] = 3.0
    >>> np.nonzero(moved_region(shift, 1, np.ones(shift.shape, bool))[0, :, 0])[0].tolist()
    [2, 3, 4, 5]
    """
    shift_vox = np.nan_to_num(np.asarray(shift_vox, float))
    moved = np.asarray(mask, bool) & (np.abs(shift_vox) > threshold_vox)
    region = moved.copy()
    index = np.nonzero(moved)
    if not index[0].size:
        return region
    shift = shift_vox[index]
    steps = int(np.ceil(np.abs(shift).max())) * 2 + 1
    length = shift_vox.shape[pe_axis]
    for fraction in np.linspace(0.0, 1.0, steps):
        position = list(index)
        position[pe_axis] = np.clip(np.rint(index[pe_axis] + fraction * shift).astype(int), 0, length - 1)
        region[tuple(position)] = True
    return region
