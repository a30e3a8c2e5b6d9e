"""A scanner's shim, modelled: real solid spherical harmonics up to second order, fitted by
least squares inside a mask and removed everywhere.

Used by the head model (:mod:`fieldfix.susceptibility`) and the invented scenarios; the
terms are the usual first- and second-order shim channels (x, y, z; xy, xz, yz,
x^2 - y^2, 2z^2 - x^2 - y^2; common practice, no source).
"""

from __future__ import annotations

import numpy as np

__all__ = ["shim_basis", "shim_field"]


def shim_basis(coords_mm: np.ndarray, order: int = 2) -> np.ndarray:
    """Real solid spherical harmonics up to ``order`` (0, 1 or 2) at given points.

    Parameters
    ----------
    coords_mm : ndarray, shape (N, 3)
        Point coordinates in mm (already centred and, for conditioning, scaled).
    order : int
        0 (constant), 1 (adds x, y, z) or 2 (adds xy, xz, yz, x^2 - y^2, 2z^2 - x^2 - y^2).

    Returns
    -------
    ndarray, shape (N, 1 | 4 | 9)

    Example
    -------
    >>> shim_basis(np.zeros((2, 3)), 2).shape
    (2, 9)
    """
    if order not in (0, 1, 2):
        raise ValueError("shim order must be 0, 1 or 2")
    c = np.asarray(coords_mm, dtype=float)
    x, y, z = c[:, 0], c[:, 1], c[:, 2]
    cols = [np.ones_like(x)]
    if order >= 1:
        cols += [x, y, z]
    if order >= 2:
        cols += [x * y, x * z, y * z, x * x - y * y, 2 * z * z - x * x - y * y]
    return np.stack(cols, axis=1)


def shim_field(
    field_hz: np.ndarray, mask: np.ndarray, affine=None, *, order: int = 2
) -> tuple[np.ndarray, np.ndarray]:
    """Remove spherical-harmonic terms up to ``order`` fitted by least squares inside ``mask``.

    Models a scanner's shim: the fitted terms are subtracted everywhere, not only in the mask.

    Parameters
    ----------
    field_hz : ndarray, shape (X, Y, Z)
        Field offset in Hz.
    mask : ndarray of bool, same shape
        Region the shim optimises (e.g. brain).
    affine : array_like (4, 4), optional
        Voxel-to-world affine in mm; identity if omitted.
    order : int
        Highest order removed (0, 1 or 2).

    Returns
    -------
    shimmed_hz : ndarray float32
        ``field_hz`` minus the fitted terms.
    coefficients : ndarray
        Fitted coefficients for ``shim_basis`` evaluated on coordinates centred at the mask
        centroid and divided by 100 mm.

    Example
    -------
    >>> f = np.ones((8, 8, 8)); m = np.ones((8, 8, 8), bool)
    >>> float(np.abs(shim_field(f, m)[0]).max()) < 1e-6
    True
    """
    f = np.asarray(field_hz, dtype=np.float64)
    m = np.asarray(mask, dtype=bool)
    if f.shape != m.shape or f.ndim != 3:
        raise ValueError("field_hz and mask must be 3D arrays of the same shape")
    nterms = {0: 1, 1: 4, 2: 9}.get(order)
    if nterms is None:
        raise ValueError("shim order must be 0, 1 or 2")
    if m.sum() < nterms:
        raise ValueError("mask has too few voxels for the shim fit")
    aff = np.eye(4) if affine is None else np.asarray(affine, dtype=float)
    idx = np.indices(f.shape, dtype=np.float64).reshape(3, -1).T
    world = idx @ aff[:3, :3].T + aff[:3, 3]
    centre = world[m.ravel()].mean(axis=0)
    coords = (world - centre) / 100.0
    basis = shim_basis(coords, order)
    sel = m.ravel()
    coef, *_ = np.linalg.lstsq(basis[sel], f.ravel()[sel], rcond=None)
    shimmed = f - (basis @ coef).reshape(f.shape)
    return shimmed.astype(np.float32), coef
