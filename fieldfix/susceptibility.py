"""Magnetic field offsets from susceptibility maps, a procedural head model and a shim.

The field offset produced by a weakly magnetic object in a uniform field B0 is computed with the
Fourier dipole kernel (Salomir, de Senneville and Moonen 2003, Concepts in Magnetic Resonance B 19:26;
Marques and Bowtell 2005, Concepts in Magnetic Resonance B 25:65)::

    dB(k) / B0 = chi(k) * (1/3 - (k . b)^2 / |k|^2)

where ``b`` is the unit vector of B0 and ``chi`` the (SI, dimensionless) volume susceptibility.

Lorentz-sphere correction
-------------------------
The ``1/3`` term is the Lorentz-sphere correction: the macroscopic field inside magnetised matter is
``B0 * chi * (1 - (k.b)^2/k^2)``; a nucleus sits in a small cavity of the medium and sees that field
minus ``2/3 * chi * B0`` (the field of the Lorentz sphere).  With this convention

* inside a uniformly magnetised sphere the offset is exactly zero,
* outside the sphere it is ``dchi/3 * B0 * (a/r)^3 * (3 cos^2(theta) - 1)``,
* inside an infinite cylinder at angle ``alpha`` to B0 it is ``dchi/6 * B0 * (3 cos^2(alpha) - 1)``,
* outside it is ``dchi/2 * B0 * sin^2(alpha) * (a/rho)^2 * cos(2 phi)``,

which are the expressions tested in ``tests/test_susceptibility.py``.

The kernel value at ``k = 0`` is set to zero, so the computed field has zero mean over the padded
domain.  For any object surrounded by enough padding inside a cubic (or spherical) domain this is the
exact answer (the average of the Lorentz-corrected field over such a domain vanishes by symmetry);
otherwise the field differs from the exact one by a constant, which any shim removes.  Before the
transform the susceptibility of the surrounding medium (by default the median of the grid border) is
subtracted, so that the zero padding continues the medium instead of creating a box-shaped object.

Conventions
-----------
Susceptibilities are in ppm (SI volume susceptibility times 1e6).  Directions are in the world (RAS+,
millimetre) coordinates of the image affine; a scanner's B0 runs along the bore, which for a supine,
head-first subject in a head-aligned world frame is ``(0, 0, 1)`` (superior).  Fields are returned in Hz
(``gamma/2pi * B0_T * dB/B0``).

This is research software, not a medical device.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import scipy.fft

from .shim import shim_basis, shim_field  # noqa: F401  (part of this module's API)
from .units import GAMMA_HZ_PER_T

__all__ = [
    "GAMMA_HZ_PER_T",
    "SUSCEPTIBILITY_PPM",
    "HEAD_LABELS",
    "HEAD_LABEL_SUSCEPTIBILITY_PPM",
    "HeadModel",
    "b0_direction_from_pitch",
    "dipole_kernel",
    "field_from_susceptibility",
    "head_extent_mm",
    "head_labels_at",
    "head_model",
    "susceptibility_from_labels",
    "shim_basis",
    "shim_field",
]

# Volume susceptibilities (SI, ppm).
#   water (37 C) -9.05 and air +0.36: Schenck 1996, Medical Physics 23:815 (values from memory).
#   soft tissue: Schenck 1996 reports human tissues within about +-10-20 % of water; the brain value
#   -9.04 used here is a representative figure (from memory).
#   cortical bone -8.86: Hopkins and Wehrli 1997, Magnetic Resonance in Medicine 37:494 (from memory);
#   Schenck 1996 places bone close to, slightly less diamagnetic than, water.
#   fat -8.44: Schenck 1996 (from memory).
SUSCEPTIBILITY_PPM: dict[str, float] = {
    "air": 0.36,
    "water": -9.05,
    "soft_tissue": -9.05,
    "brain": -9.04,
    "csf": -9.05,
    "bone": -8.86,
    "fat": -8.44,
}

# Label values of the procedural head model.
HEAD_LABELS: dict[str, int] = {
    "air": 0,
    "scalp": 1,
    "skull": 2,
    "csf": 3,
    "brain": 4,
    "frontal_sinus": 5,
    "sphenoid_sinus": 6,
    "ethmoid_cells": 7,
    "ear_canal": 8,
    "mastoid_cells": 9,
    "soft_tissue": 10,
}

# Ethmoid and mastoid "cells" are honeycombs of air and thin bone; the model treats them as an
# effective medium with the air fractions below (an assumption of this model, no source).
_ETHMOID_AIR_FRACTION = 0.7
_MASTOID_AIR_FRACTION = 0.5


def _mix(frac_air: float) -> float:
    return frac_air * SUSCEPTIBILITY_PPM["air"] + (1 - frac_air) * SUSCEPTIBILITY_PPM["bone"]


HEAD_LABEL_SUSCEPTIBILITY_PPM: dict[int, float] = {
    HEAD_LABELS["air"]: SUSCEPTIBILITY_PPM["air"],
    HEAD_LABELS["scalp"]: SUSCEPTIBILITY_PPM["soft_tissue"],
    HEAD_LABELS["skull"]: SUSCEPTIBILITY_PPM["bone"],
    HEAD_LABELS["csf"]: SUSCEPTIBILITY_PPM["csf"],
    HEAD_LABELS["brain"]: SUSCEPTIBILITY_PPM["brain"],
    HEAD_LABELS["frontal_sinus"]: SUSCEPTIBILITY_PPM["air"],
    HEAD_LABELS["sphenoid_sinus"]: SUSCEPTIBILITY_PPM["air"],
    HEAD_LABELS["ethmoid_cells"]: _mix(_ETHMOID_AIR_FRACTION),
    HEAD_LABELS["ear_canal"]: SUSCEPTIBILITY_PPM["air"],
    HEAD_LABELS["mastoid_cells"]: _mix(_MASTOID_AIR_FRACTION),
    HEAD_LABELS["soft_tissue"]: SUSCEPTIBILITY_PPM["soft_tissue"],
}


# ---------------------------------------------------------------------------------------------
# Dipole kernel and forward field
# ---------------------------------------------------------------------------------------------


def b0_direction_from_pitch(pitch_deg: float = 0.0, roll_deg: float = 0.0) -> np.ndarray:
    """Unit vector of B0 in head (RAS+) coordinates for a tilted head.

    Parameters
    ----------
    pitch_deg : float
        Head pitch in degrees, rotation about the left-right axis.  Positive pitch tilts the top of
        the head towards anterior in the scanner (chin towards chest).
    roll_deg : float
        Head roll in degrees, rotation about the anterior-posterior axis.  Positive roll tilts the top
        of the head towards the subject's right.

    Returns
    -------
    ndarray, shape (3,)
        B0 direction expressed in the head's right, anterior, superior axes.

    Example
    -------
    >>> b0_direction_from_pitch(0.0).round(6).tolist()
    [0.0, 0.0, 1.0]
    """
    p = np.deg2rad(float(pitch_deg))
    r = np.deg2rad(float(roll_deg))
    # Head axes in scanner coordinates: superior rotated towards anterior by p (about x), then
    # towards right by r (about y).  B0 (scanner z) in head coordinates is R^T z.
    # rot_x turns superior (0, 0, 1) into (0, sin p, cos p); rot_y turns it towards +x.
    rot_x = np.array([[1, 0, 0], [0, np.cos(p), np.sin(p)], [0, -np.sin(p), np.cos(p)]])
    rot_y = np.array([[np.cos(r), 0, np.sin(r)], [0, 1, 0], [-np.sin(r), 0, np.cos(r)]])
    head_in_scanner = rot_y @ rot_x  # columns: head R, A, S axes in scanner coordinates
    b = head_in_scanner.T @ np.array([0.0, 0.0, 1.0])
    return b / np.linalg.norm(b)


def _linear_part(affine_or_voxel_mm) -> np.ndarray:
    a = np.asarray(affine_or_voxel_mm, dtype=float)
    if a.shape == (4, 4):
        lin = a[:3, :3]
    elif a.shape == (3, 3):
        lin = a
    elif a.shape in ((3,), ()):
        lin = np.diag(np.broadcast_to(a, (3,)))
    else:
        raise ValueError("expected a 4x4 affine, a 3x3 matrix or voxel sizes in mm")
    if abs(np.linalg.det(lin)) < 1e-12:
        raise ValueError("affine is singular")
    return lin


def _unit(b0_direction) -> np.ndarray:
    b = np.asarray(b0_direction, dtype=float).reshape(3)
    n = np.linalg.norm(b)
    if not np.isfinite(n) or n == 0:
        raise ValueError("b0_direction must be a non-zero 3-vector")
    return b / n


def _axis_samples(n: int, real_half: bool, oversample: int):
    """Per-axis list of (frequency in cycles per voxel, weight) pairs for the kernel average."""
    f = np.fft.rfftfreq(n) if real_half else np.fft.fftfreq(n)
    if oversample == 1:
        if n % 2:
            return [(f, np.ones_like(f))]
        # A Nyquist bin stands for both +1/2 and -1/2 cycles per voxel: average both signs so
        # that K(k) = K(-k) and the field of a real map stays exactly real.
        w = np.ones_like(f)
        w[n // 2] = 0.5
        flipped = f.copy()
        flipped[n // 2] = -flipped[n // 2]
        w2 = np.zeros_like(f)
        w2[n // 2] = 0.5
        return [(f, w), (flipped, w2)]
    s = oversample
    out = []
    for j in range(s):
        fine = (f + j) / s  # cycles per fine voxel
        fine = (fine + 0.5) % 1.0 - 0.5
        with np.errstate(invalid="ignore", divide="ignore"):
            box = np.sin(np.pi * s * fine) / (s * np.sin(np.pi * fine))
        box = np.where(np.abs(fine) < 1e-12, 1.0, box)
        out.append((fine * s, box * box))
    return out


def dipole_kernel(
    shape, affine_or_voxel_mm=1.0, b0_direction=(0.0, 0.0, 1.0), *, oversample: int = 2
) -> np.ndarray:
    """Lorentz-corrected dipole kernel ``1/3 - (k.b)^2/|k|^2`` on an rfft grid.

    Parameters
    ----------
    shape : tuple of 3 ints
        Grid shape (after any padding).
    affine_or_voxel_mm : array_like
        4x4 voxel-to-world affine (mm), its 3x3 linear part, or voxel sizes in mm.  Oblique and
        anisotropic grids are handled exactly: wave vectors are mapped to world space by ``A^-T``.
    b0_direction : array_like, shape (3,)
        Direction of B0 in world coordinates (normalised internally).
    oversample : int
        Sub-voxel factor ``s``.  With ``s > 1`` the kernel is the exact equivalent of repeating each
        voxel ``s`` times per axis, applying the continuous kernel on that finer grid and averaging
        back, folded into the coarse grid: ``K_eff(f) = sum_j |B(F_j)|^2 K(F_j)`` over the ``s^3``
        fine frequencies ``F_j`` that alias to ``f``, ``B`` being the box response.  This removes
        the checkerboard ringing the plain kernel gives for B0 oblique to the grid, at the cost of
        ``s^3`` kernel evaluations (no larger FFT).  ``s = 1`` is the plain sampled kernel.

    Returns
    -------
    ndarray, shape ``(n0, n1, n2 // 2 + 1)``, float64
        Kernel for ``scipy.fft.rfftn`` of a real array of ``shape``; zero at ``k = 0``.

    Example
    -------
    >>> dipole_kernel((4, 4, 4)).shape
    (4, 4, 3)
    """
    shape = tuple(int(s) for s in shape)
    if len(shape) != 3:
        raise ValueError("shape must have three axes")
    oversample = int(oversample)
    if oversample < 1:
        raise ValueError("oversample must be >= 1")
    lin = _linear_part(affine_or_voxel_mm)
    b = _unit(b0_direction)
    m = np.linalg.inv(lin).T  # k_world = A^-T f  (cycles per mm)
    mb = m.T @ b  # (k_world . b) = f . (A^-1 b)
    samples = [_axis_samples(shape[0], False, oversample), _axis_samples(shape[1], False, oversample),
               _axis_samples(shape[2], True, oversample)]
    kern = np.zeros((shape[0], shape[1], shape[2] // 2 + 1))
    for g0, w0 in samples[0]:
        for g1, w1 in samples[1]:
            for g2, w2 in samples[2]:
                f0, f1, f2 = g0[:, None, None], g1[None, :, None], g2[None, None, :]
                kb = mb[0] * f0 + mb[1] * f1 + mb[2] * f2
                k2 = np.zeros_like(kern)
                for c in range(3):
                    kc = m[c, 0] * f0 + m[c, 1] * f1 + m[c, 2] * f2
                    k2 += kc * kc
                with np.errstate(invalid="ignore", divide="ignore"):
                    term = 1.0 / 3.0 - kb * kb / k2
                term[~np.isfinite(term)] = 0.0  # k = 0 (only in the j = 0 term)
                kern += (w0[:, None, None] * w1[None, :, None] * w2[None, None, :]) * term
    kern[0, 0, 0] = 0.0
    return kern


def _resolve_padding(shape, padding) -> tuple[int, ...]:
    if padding is None or (isinstance(padding, str) and padding == "auto"):
        pads = [s for s in shape]  # double every axis
    elif np.isscalar(padding):
        pads = [int(padding)] * 3
    else:
        pads = [int(p) for p in padding]
        if len(pads) != 3:
            raise ValueError("padding must be one value or three values")
    if any(p < 0 for p in pads):
        raise ValueError("padding must be non-negative")
    return tuple(scipy.fft.next_fast_len(s + p, real=True) if p > 0 else s for s, p in zip(shape, pads))


def field_from_susceptibility(
    chi_ppm: np.ndarray,
    affine_or_voxel_mm=1.0,
    *,
    field_t: float,
    b0_direction=(0.0, 0.0, 1.0),
    padding="auto",
    reference_ppm: float | str = "border",
    oversample: int = 2,
    workers: int | None = None,
) -> np.ndarray:
    """Field offset in Hz produced by a susceptibility distribution.

    Parameters
    ----------
    chi_ppm : ndarray, shape (X, Y, Z)
        Volume susceptibility in ppm (SI x 1e6).
    affine_or_voxel_mm : array_like
        4x4 affine (mm), its 3x3 linear part or voxel sizes in mm.
    field_t : float
        Main field strength in tesla.
    b0_direction : array_like, shape (3,)
        Direction of B0 in world coordinates; see :func:`b0_direction_from_pitch`.
    padding : "auto", int or 3 ints
        Zero padding in voxels added to each axis (``"auto"`` doubles each axis).  Use 0 on an axis
        along which the object is meant to be periodic (e.g. an infinite cylinder).
    reference_ppm : float or "border"
        Susceptibility of the surrounding medium, subtracted before the transform; ``"border"`` takes
        the median over the grid's faces.
    oversample : int
        Sub-voxel factor of the kernel (see :func:`dipole_kernel`); 2 by default, 1 for the plain
        sampled kernel.
    workers : int, optional
        Threads for scipy.fft.

    Returns
    -------
    ndarray, float32, same shape as ``chi_ppm``
        Lorentz-corrected field offset in Hz (zero mean over the padded domain).

    Example
    -------
    >>> chi = np.zeros((16, 16, 16)); chi[6:10, 6:10, 6:10] = -9.0
    >>> field_from_susceptibility(chi, 2.0, field_t=3.0).shape
    (16, 16, 16)
    """
    chi = np.asarray(chi_ppm, dtype=np.float64)
    if chi.ndim != 3:
        raise ValueError("chi_ppm must be a 3D array")
    if not np.all(np.isfinite(chi)):
        raise ValueError("chi_ppm contains non-finite values")
    if not (np.isfinite(field_t) and field_t > 0):
        raise ValueError("field_t must be a positive number of tesla")
    if isinstance(reference_ppm, str):
        if reference_ppm != "border":
            raise ValueError("reference_ppm must be a number or 'border'")
        faces = np.concatenate(
            [chi[0].ravel(), chi[-1].ravel(), chi[:, 0].ravel(), chi[:, -1].ravel(),
             chi[:, :, 0].ravel(), chi[:, :, -1].ravel()]
        )
        ref = float(np.median(faces))
    else:
        ref = float(reference_ppm)
    padded_shape = _resolve_padding(chi.shape, padding)
    work = np.zeros(padded_shape, dtype=np.float64)
    work[: chi.shape[0], : chi.shape[1], : chi.shape[2]] = chi - ref
    kern = dipole_kernel(padded_shape, affine_or_voxel_mm, b0_direction, oversample=oversample)
    spec = scipy.fft.rfftn(work, workers=workers)
    spec *= kern
    out = scipy.fft.irfftn(spec, s=padded_shape, workers=workers)
    out = out[: chi.shape[0], : chi.shape[1], : chi.shape[2]]
    scale = GAMMA_HZ_PER_T * float(field_t) * 1e-6
    return (out * scale).astype(np.float32)


# ---------------------------------------------------------------------------------------------
# Labels -> susceptibility
# ---------------------------------------------------------------------------------------------


def susceptibility_from_labels(labels: np.ndarray, table_ppm: Mapping[int, float]) -> np.ndarray:
    """Map an integer segmentation to susceptibility values in ppm.

    Parameters
    ----------
    labels : ndarray of int
        Segmentation, any shape.
    table_ppm : mapping int -> float
        Susceptibility in ppm for every label that occurs; e.g. ``{0: 0.36, 1: -9.05, 2: -8.86}``
        for air, soft tissue and bone.

    Returns
    -------
    ndarray, float64, same shape as ``labels``

    Raises
    ------
    ValueError
        If a label in the image is missing from the table, or labels are not integers.

    Example
    -------
    >>> susceptibility_from_labels(np.array([0, 1, 1]), {0: 0.36, 1: -9.05}).tolist()
    [0.36, -9.05, -9.05]
    """
    lab = np.asarray(labels)
    if lab.dtype.kind not in "iub":
        if lab.dtype.kind == "f" and np.all(np.isfinite(lab)) and np.all(lab == np.round(lab)):
            lab = lab.astype(np.int64)
        else:
            raise ValueError("labels must be integers")
    present = np.unique(lab)
    table = {int(k): float(v) for k, v in table_ppm.items()}
    missing = [int(v) for v in present if int(v) not in table]
    if missing:
        raise ValueError(f"labels without a susceptibility value: {missing}")
    out = np.empty(lab.shape, dtype=np.float64)
    for v in present:
        out[lab == v] = table[int(v)]
    return out


# ---------------------------------------------------------------------------------------------
# Procedural head model
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Ellipsoid:
    label: str
    center: tuple[float, float, float]
    semi_axes: tuple[float, float, float]

    def inside(self, x, y, z):
        cx, cy, cz = self.center
        ax, ay, az = self.semi_axes
        return ((x - cx) / ax) ** 2 + ((y - cy) / ay) ** 2 + ((z - cz) / az) ** 2 <= 1.0


@dataclass(frozen=True)
class _CylinderX:
    """Cylinder with axis along left-right (x), used for the ear canals."""

    label: str
    center: tuple[float, float, float]
    radius: float
    half_length: float

    def inside(self, x, y, z):
        cx, cy, cz = self.center
        return (np.abs(x - cx) <= self.half_length) & ((y - cy) ** 2 + (z - cz) ** 2 <= self.radius**2)


def _head_parts(scale: float):
    """Geometry of the procedural head in mm (RAS+, origin near the head centre).

    Dimensions are rough adult sizes (common practice, no source): head about 150 x 190 x 200 mm,
    skull about 7 mm, scalp about 5 mm; the cavities sit where anatomy atlases put them: frontal
    sinus behind the lower forehead, ethmoid cells between the orbits under the orbitofrontal
    cortex, sphenoid sinus under the pituitary behind the ethmoids, ear canals and mastoid air cells
    at the sides, below the temporal lobes.
    """
    s = float(scale)

    def e(label, c, a):
        return _Ellipsoid(label, tuple(s * v for v in c), tuple(s * v for v in a))

    outer = e("scalp", (0, 0, 0), (76, 96, 100))
    skull = e("skull", (0, 0, 2), (71, 91, 94))
    inner = e("soft_tissue", (0, 0, 3), (65, 85, 87))
    csf = e("csf", (0, 0, 6), (64, 84, 84))
    brain = e("brain", (0, -2, 10), (61, 80, 78))
    cavities = [
        e("frontal_sinus", (0, 80, -8), (15, 7, 11)),
        e("ethmoid_cells", (0, 55, -40), (9, 18, 12)),
        e("sphenoid_sinus", (0, 24, -48), (13, 12, 10)),
        e("mastoid_cells", (46, -22, -52), (10, 11, 12)),
        e("mastoid_cells", (-46, -22, -52), (10, 11, 12)),
        _CylinderX("ear_canal", (s * 66, s * -6, s * -48), s * 4.0, s * 13.0),
        _CylinderX("ear_canal", (s * -66, s * -6, s * -48), s * 4.0, s * 13.0),
    ]
    # The brain is cut flat below, as the skull base is: nothing of it below this height.
    brain_floor_mm = -38.0 * s
    return outer, skull, inner, csf, brain, cavities, brain_floor_mm


def head_labels_at(x, y, z, scale: float = 1.0) -> np.ndarray:
    """Label of the procedural head at world points (mm, RAS+, head centre at the origin).

    Parameters
    ----------
    x, y, z : array_like
        Coordinates in mm (broadcastable).
    scale : float
        Uniform size factor of the head.

    Returns
    -------
    ndarray uint8
        Values from ``HEAD_LABELS``.

    Example
    -------
    >>> int(head_labels_at(0.0, 0.0, 30.0)) == HEAD_LABELS["brain"]
    True
    """
    x, y, z = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (x, y, z)))
    return _labels_at(x, y, z, float(scale))


def head_extent_mm(scale: float = 1.0) -> np.ndarray:
    """Half-widths (mm) of the box that holds the procedural head, per world axis.

    Example
    -------
    >>> head_extent_mm(1.0).tolist()
    [76.0, 96.0, 100.0]
    """
    outer = _head_parts(float(scale))[0]
    return np.abs(np.asarray(outer.center)) + np.asarray(outer.semi_axes)


def _labels_at(x, y, z, scale: float) -> np.ndarray:
    outer, skull, inner, csf, brain, cavities, floor = _head_parts(scale)
    lab = np.full(np.shape(x), HEAD_LABELS["air"], dtype=np.uint8)
    lab[outer.inside(x, y, z)] = HEAD_LABELS["scalp"]
    lab[skull.inside(x, y, z)] = HEAD_LABELS["skull"]
    # Below the skull base (a bony plate under the brain) lie the soft tissues of face and neck.
    lab[inner.inside(x, y, z) & (z < floor - 10 * scale)] = HEAD_LABELS["soft_tissue"]
    lab[csf.inside(x, y, z) & (z > floor - 4 * scale)] = HEAD_LABELS["csf"]
    lab[brain.inside(x, y, z) & (z > floor)] = HEAD_LABELS["brain"]
    for part in cavities:
        lab[part.inside(x, y, z)] = HEAD_LABELS[part.label]
    return lab


@dataclass
class HeadModel:
    """Result of :func:`head_model`.

    Attributes
    ----------
    labels : ndarray uint8
        Label at each voxel centre (see ``HEAD_LABELS``).
    chi_ppm : ndarray float64
        Susceptibility in ppm, averaged over sub-voxel samples (partial volume).
    brain_mask : ndarray bool
        Voxels whose centre lies in brain.
    affine : ndarray (4, 4)
        Voxel-to-world affine in mm (RAS+).
    """

    labels: np.ndarray
    chi_ppm: np.ndarray
    brain_mask: np.ndarray
    affine: np.ndarray
    label_names: dict = field(default_factory=lambda: dict(HEAD_LABELS))


def head_model(
    shape=(64, 64, 64),
    voxel_size_mm: float | tuple[float, float, float] = 4.0,
    *,
    scale: float = 1.0,
    supersample: int = 2,
    center_mm=(0.0, 0.0, 0.0),
    table_ppm: Mapping[int, float] | None = None,
) -> HeadModel:
    """Build the procedural head: scalp, skull, CSF, brain and air cavities.

    Parameters
    ----------
    shape : tuple of 3 ints
        Grid shape.  The whole head (about 160 x 200 x 200 mm at ``scale=1``) should fit inside the
        field of view, otherwise the cut edge acts as an artificial interface.
    voxel_size_mm : float or 3 floats
        Voxel size in mm.
    scale : float
        Uniform size factor (a smaller or larger head).
    supersample : int
        Sub-samples per voxel edge used to average susceptibility (partial volume).
    center_mm : 3 floats
        World position (mm) of the grid centre relative to the head centre.
    table_ppm : mapping, optional
        Label -> susceptibility in ppm; defaults to ``HEAD_LABEL_SUSCEPTIBILITY_PPM``.

    Returns
    -------
    HeadModel

    Example
    -------
    >>> hm = head_model((48, 56, 56), 4.0)
    >>> bool(hm.brain_mask.any())
    True
    """
    shape = tuple(int(s) for s in shape)
    vox = np.broadcast_to(np.asarray(voxel_size_mm, dtype=float), (3,)).copy()
    if np.any(vox <= 0):
        raise ValueError("voxel_size_mm must be positive")
    if supersample < 1:
        raise ValueError("supersample must be >= 1")
    table = dict(HEAD_LABEL_SUSCEPTIBILITY_PPM if table_ppm is None else table_ppm)
    affine = np.diag([vox[0], vox[1], vox[2], 1.0])
    affine[:3, 3] = np.asarray(center_mm, float) - vox * (np.asarray(shape) - 1) / 2.0
    ax = [affine[i, 3] + vox[i] * np.arange(shape[i]) for i in range(3)]
    x, y = np.meshgrid(ax[0], ax[1], indexing="ij")
    labels = np.empty(shape, dtype=np.uint8)
    chi = np.zeros(shape, dtype=np.float64)
    lut = np.zeros(256, dtype=np.float64)
    for k, v in table.items():
        lut[int(k)] = v
    offs = (np.arange(supersample) + 0.5) / supersample - 0.5
    for k in range(shape[2]):  # slab by slab keeps memory small
        z = np.full_like(x, ax[2][k])
        labels[:, :, k] = _labels_at(x, y, z, scale)
        acc = np.zeros(x.shape)
        for ox in offs:
            for oy in offs:
                for oz in offs:
                    sub = _labels_at(x + ox * vox[0], y + oy * vox[1], z + oz * vox[2], scale)
                    acc += lut[sub]
        chi[:, :, k] = acc / supersample**3
    missing = sorted(set(np.unique(labels).tolist()) - set(table))
    if missing:
        raise ValueError(f"labels without a susceptibility value: {missing}")
    return HeadModel(labels=labels, chi_ppm=chi, brain_mask=labels == HEAD_LABELS["brain"], affine=affine)
