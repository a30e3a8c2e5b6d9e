"""Voxel grids in world space: phase-encode codes, directions, resampling, gradients.

World coordinates are the scanner's RAS+ millimetres of NIfTI (x to the subject's Right,
y to Anterior, z to Superior). A voxel grid is a shape plus a 4x4 affine mapping voxel
indices (i, j, k) to world millimetres.

Phase-encode codes follow BIDS ``PhaseEncodingDirection``: ``i``, ``j``, ``k`` name the
voxel axis, a trailing ``-`` the opposite polarity (k-space traversed towards
decreasing index).

Examples
--------
>>> import numpy as np
>>> parse_pe_code("j-")
(1, -1)
>>> pe_world_direction("j", np.diag([2.0, 2.0, 2.0, 1.0]))
'posterior to anterior'
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from .errors import GeometryError, InputError

__all__ = [
    "PE_CODES",
    "pe_code_hint",
    "parse_pe_code",
    "slice_axis_of",
    "pe_code",
    "axis_direction_world",
    "pe_world_direction",
    "pe_code_from_world",
    "voxel_sizes_mm",
    "slice_normal_world",
    "voxel_to_world",
    "world_to_voxel",
    "same_grid",
    "resample_to_grid",
    "overlap_fraction",
    "world_gradient",
]

PE_CODES = ("i", "i-", "j", "j-", "k", "k-")

# World axis letter for the positive direction and the full words for each letter.
_POSITIVE = ("R", "A", "S")
_NEGATIVE = ("L", "P", "I")
_WORDS = {"R": "right", "L": "left", "A": "anterior", "P": "posterior", "S": "superior", "I": "inferior"}
_OPPOSITE = {"R": "L", "L": "R", "A": "P", "P": "A", "S": "I", "I": "S"}


def parse_pe_code(code: str) -> tuple[int, int]:
    """Parse a BIDS phase-encode code into (voxel axis, polarity).

    Parameters
    ----------
    code : {'i', 'i-', 'j', 'j-', 'k', 'k-'}

    Returns
    -------
    axis : int
        0, 1 or 2.
    sign : int
        +1 for traversal towards increasing index, -1 for the reverse.

    Examples
    --------
    >>> parse_pe_code("i")
    (0, 1)
    """
    text = str(code).strip() if isinstance(code, str) else code
    if text not in PE_CODES:
        raise InputError(f"unknown phase-encode code {code!r}; expected one of {', '.join(PE_CODES)}"
                         + pe_code_hint(code))
    return "ijk".index(text[0]), (-1 if text.endswith("-") else 1)


def slice_axis_of(sidecar: dict) -> int:
    """The slice voxel axis of an EPI from its BIDS sidecar: ``SliceEncodingDirection``, else k.

    Parameters
    ----------
    sidecar : dict
        The run's sidecar (may be empty).

    Returns
    -------
    int
        0, 1 or 2 (2 when the key is absent or empty).

    Examples
    --------
    >>> slice_axis_of({"SliceEncodingDirection": "i"}), slice_axis_of({})
    (0, 2)
    """
    code = sidecar.get("SliceEncodingDirection")
    return parse_pe_code(code)[0] if isinstance(code, str) and code.strip() else 2


_ANATOMICAL = {"ap", "pa", "lr", "rl", "si", "is", "ras", "lps"}


def pe_code_hint(code) -> str:
    """A hint for a near miss of a BIDS phase-encode code ("" when there is none to give).

    Examples
    --------
    >>> pe_code_hint("-j")
    ' (write j-: the voxel axis first, then the sign)'
    """
    if not isinstance(code, str):
        return f" (it is {type(code).__name__} {code!r}; BIDS codes are text such as \"j-\")"
    text = code.strip().lower()
    if len(text) == 2 and text[0] in "+-" and text[1] in "ijk":
        return f" (write {text[1]}{'-' if text[0] == '-' else ''}: the voxel axis first, then the sign)"
    if text.rstrip("+-") in ("x", "y", "z") and len(text) <= 2:
        axis = "ijk"["xyz".index(text[0])]
        return f" (BIDS codes use voxel axes i, j, k, not x, y, z: did you mean {axis}{'-' if text.endswith('-') else ''}?)"
    if text.replace("-", "").replace(">", "").replace("2", "") in _ANATOMICAL:
        return (" (BIDS codes name voxel axes, not anatomical directions: give the code of the voxel axis that runs "
                "that way in this image; with j running posterior to anterior, AP is j- and PA is j)")
    if text.endswith("+") and text[:-1] in ("i", "j", "k"):
        return f" (write {text[:-1]}: the positive polarity has no sign)"
    return ""


def pe_code(axis: int, sign: int) -> str:
    """Return the BIDS phase-encode code for a voxel axis and polarity.

    Examples
    --------
    >>> pe_code(1, -1)
    'j-'
    """
    if axis not in (0, 1, 2) or sign not in (1, -1):
        raise ValueError(f"axis must be 0, 1 or 2 and sign +1 or -1, got {axis}, {sign}")
    return "ijk"[axis] + ("-" if sign < 0 else "")


def voxel_sizes_mm(affine: np.ndarray) -> np.ndarray:
    """Voxel edge lengths in millimetres (norms of the affine's first three columns)."""
    return np.sqrt((np.asarray(affine, float)[:3, :3] ** 2).sum(axis=0))


def axis_direction_world(affine: np.ndarray, axis: int) -> np.ndarray:
    """Unit vector, in world coordinates, along which voxel index `axis` increases."""
    column = np.asarray(affine, float)[:3, axis]
    norm = np.linalg.norm(column)
    if norm == 0:
        raise GeometryError(f"the affine has a zero column for voxel axis {axis}")
    return column / norm


def _letter(vector: np.ndarray) -> tuple[str, float]:
    """Dominant world letter of a unit vector and the cosine with that world axis."""
    dominant = int(np.argmax(np.abs(vector)))
    letter = _POSITIVE[dominant] if vector[dominant] > 0 else _NEGATIVE[dominant]
    return letter, float(abs(vector[dominant]))


def pe_world_direction(code: str, affine: np.ndarray) -> str:
    """Describe a phase-encode code in world terms, e.g. ``'posterior to anterior'``.

    The direction is that of the nearest world axis; for oblique grids whose
    phase-encode axis is more than 10 degrees from it, ``' (oblique)'`` is appended.

    Examples
    --------
    >>> import numpy as np
    >>> pe_world_direction("i-", np.diag([-2.0, 2.0, 2.0, 1.0]))
    'left to right'
    """
    axis, sign = parse_pe_code(code)
    letter, cosine = _letter(sign * axis_direction_world(affine, axis))
    text = f"{_WORDS[_OPPOSITE[letter]]} to {_WORDS[letter]}"
    return text + (" (oblique)" if cosine < np.cos(np.deg2rad(10.0)) else "")


def pe_code_from_world(text: str, affine: np.ndarray) -> str:
    """Find the phase-encode code that runs in a world direction on a given grid.

    Parameters
    ----------
    text : str
        ``'posterior to anterior'`` or the arrow form ``'P>A'`` (also ``'P->A'``).
    affine : (4, 4) array

    Examples
    --------
    >>> import numpy as np
    >>> pe_code_from_world("anterior to posterior", np.diag([2.0, 2.0, 2.0, 1.0]))
    'j-'
    """
    words = {v: k for k, v in _WORDS.items()}
    cleaned = str(text).strip().lower().replace("->", ">")
    if ">" in cleaned:
        parts = [p.strip().upper() for p in cleaned.split(">")]
    else:
        parts = [words.get(p.strip(), "?") for p in cleaned.split(" to ")]
    if len(parts) != 2 or any(p not in _WORDS for p in parts) or _OPPOSITE[parts[0]] != parts[1]:
        raise InputError(f"cannot read {text!r} as a direction; write for example 'posterior to anterior' or 'P>A'")
    target = parts[1]
    for axis in range(3):
        letter, _ = _letter(axis_direction_world(affine, axis))
        if letter == target:
            return pe_code(axis, 1)
        if letter == _OPPOSITE[target]:
            return pe_code(axis, -1)
    raise GeometryError(f"no voxel axis of this grid runs {text!r}")


def slice_normal_world(affine: np.ndarray, axis: int = 2) -> np.ndarray:
    """Unit normal of the slice plane perpendicular to voxel axis `axis`, in world space.

    The normal is the cross product of the two in-plane axis directions, signed so that it
    points the way voxel index `axis` increases. For sheared grids it differs from
    :func:`axis_direction_world`.
    """
    others = [a for a in range(3) if a != axis]
    normal = np.cross(axis_direction_world(affine, others[0]), axis_direction_world(affine, others[1]))
    normal /= np.linalg.norm(normal)
    if np.dot(normal, axis_direction_world(affine, axis)) < 0:
        normal = -normal
    return normal


def voxel_to_world(affine: np.ndarray, ijk: np.ndarray) -> np.ndarray:
    """Map voxel coordinates of shape (..., 3) to world millimetres."""
    affine = np.asarray(affine, float)
    return np.asarray(ijk, float) @ affine[:3, :3].T + affine[:3, 3]


def world_to_voxel(affine: np.ndarray, xyz: np.ndarray) -> np.ndarray:
    """Map world millimetres of shape (..., 3) to (fractional) voxel coordinates."""
    inverse = np.linalg.inv(np.asarray(affine, float))
    return np.asarray(xyz, float) @ inverse[:3, :3].T + inverse[:3, 3]


def same_grid(shape_a, affine_a, shape_b, affine_b, *, atol_mm: float = 1e-3) -> bool:
    """True when two grids have the same shape (first three axes) and affines within `atol_mm`."""
    return tuple(shape_a[:3]) == tuple(shape_b[:3]) and np.allclose(affine_a, affine_b, atol=atol_mm)


def _source_coordinates(src_affine, dst_shape, dst_affine, k: int | None = None) -> np.ndarray:
    """Voxel coordinates in the source grid of every destination voxel (or of slice k), (3, ...)."""
    transform = np.linalg.inv(np.asarray(src_affine, float)) @ np.asarray(dst_affine, float)
    ks = np.arange(dst_shape[2]) if k is None else np.array([k])
    grid = np.meshgrid(np.arange(dst_shape[0]), np.arange(dst_shape[1]), ks, indexing="ij")
    ijk = np.stack([g.astype(float) for g in grid])
    return np.tensordot(transform[:3, :3], ijk, axes=1) + transform[:3, 3].reshape(3, 1, 1, 1)


def resample_to_grid(
    data: np.ndarray,
    src_affine: np.ndarray,
    dst_shape: tuple[int, ...],
    dst_affine: np.ndarray,
    *,
    order: int = 1,
    outside: str | float = "nearest",
) -> tuple[np.ndarray, np.ndarray]:
    """Sample a 3D map defined on one grid at the voxel centres of another grid.

    Sampling goes through world coordinates: destination voxel centres are mapped to
    world millimetres with `dst_affine` and into the source grid with the inverse of
    `src_affine`.

    Policy outside the source field of view: a destination point is *inside* when its
    source coordinate lies within ``[-0.5, n - 0.5]`` on every axis (the source voxels'
    extent). Outside points get the value at the nearest source edge
    (``outside='nearest'``, sensible for smooth maps such as a B0 map) or a constant
    (``outside=np.nan`` or any float). Either way the returned mask says which points
    were inside.

    Parameters
    ----------
    data : (X, Y, Z) array
    src_affine, dst_affine : (4, 4) arrays
    dst_shape : tuple
        Only the first three entries are used.
    order : {0, 1, 3}
        Nearest, linear or cubic B-spline interpolation (scipy.ndimage conventions).
    outside : 'nearest' or float

    Returns
    -------
    values : (X', Y', Z') float64 array
    inside : (X', Y', Z') bool array

    Examples
    --------
    >>> import numpy as np
    >>> field = np.arange(24.0).reshape(2, 3, 4)
    >>> values, inside = resample_to_grid(field, np.eye(4), (2, 3, 4), np.eye(4))
    >>> bool(np.allclose(values, field)), bool(inside.all())
    (True, True)
    """
    data = np.asarray(data)
    if data.ndim != 3:
        raise GeometryError(f"resampling needs a 3D map, got {data.ndim} dimensions")
    if order not in (0, 1, 3):
        raise ValueError("order must be 0, 1 or 3")
    dst_shape = tuple(int(n) for n in dst_shape[:3])
    if same_grid(data.shape, src_affine, dst_shape, dst_affine, atol_mm=1e-6):
        return data.astype(float, copy=True), np.ones(dst_shape, bool)
    source = data.astype(float)
    pad = 0
    if order == 3:
        # Edge padding before the B-spline prefilter, as scipy.ndimage does for mode 'nearest',
        # so values near the border equal map_coordinates(..., order=3, mode='nearest').
        pad = 12
        source = ndimage.spline_filter(np.pad(source, pad, mode="edge"), order=3, mode="nearest")
    values = np.empty(dst_shape, float)
    inside = np.empty(dst_shape, bool)
    upper = np.array(data.shape, float).reshape(3, 1, 1, 1) - 0.5
    for k in range(dst_shape[2]):  # slice by slice keeps the coordinate arrays small
        coords = _source_coordinates(src_affine, dst_shape, dst_affine, k)
        ok = np.all((coords >= -0.5 - 1e-6) & (coords <= upper + 1e-6), axis=0)[..., 0]
        sampled = ndimage.map_coordinates(source, coords.reshape(3, -1) + pad, order=order, mode="nearest",
                                          prefilter=False).reshape(dst_shape[:2])
        if outside != "nearest":
            sampled[~ok] = float(outside)
        values[..., k] = sampled
        inside[..., k] = ok
    return values, inside


def overlap_fraction(src_shape, src_affine, dst_shape, dst_affine) -> float:
    """Fraction of destination voxel centres that fall inside the source field of view."""
    _, inside = resample_to_grid(np.zeros(tuple(src_shape[:3])), src_affine, dst_shape, dst_affine, order=0)
    return float(inside.mean())


def world_gradient(field: np.ndarray, affine: np.ndarray, at: np.ndarray | None = None) -> np.ndarray:
    """Spatial gradient of a 3D map in world coordinates, per millimetre.

    Central differences along each voxel axis (one-sided at the edges,
    :func:`numpy.gradient`) give derivatives per voxel index; the chain rule
    ``df/dx = A^-T df/di`` with ``A`` the affine's 3x3 part turns them into derivatives
    along world x, y, z, so oblique and sheared grids are handled.

    Parameters
    ----------
    field : (X, Y, Z) array
        For example a B0 map in Hz, giving a gradient in Hz/mm.
    affine : (4, 4) array
    at : (N,) int array, optional
        Flat (C-order) indices of the voxels wanted; only their differences are computed,
        with the same values as the full map gives there.

    Returns
    -------
    (X, Y, Z, 3) float64 array, or (N, 3) with `at`
        Derivatives along world x (R), y (A), z (S). With `at` the array is the transpose of a
        C-ordered (3, N) array (``world_gradient(...).T`` is contiguous, one row per world axis).

    Examples
    --------
    >>> import numpy as np
    >>> i, j, k = np.meshgrid(*(np.arange(4.0),) * 3, indexing="ij")
    >>> g = world_gradient(3.0 * j, np.diag([1.0, 2.0, 1.0, 1.0]))
    >>> [round(float(v), 6) for v in g[1, 1, 1]]
    [0.0, 1.5, 0.0]
    """
    field = np.asarray(field, float)
    if field.ndim != 3:
        raise GeometryError(f"a world gradient needs a 3D map, got {field.ndim} dimensions")
    inverse_transpose = np.linalg.inv(np.asarray(affine, float)[:3, :3]).T
    if at is None:
        per_index = np.stack(
            [np.gradient(field, axis=a) if field.shape[a] > 1 else np.zeros_like(field) for a in range(3)], axis=-1
        )
        return per_index @ inverse_transpose.T
    return _gradient_rows(field, np.asarray(at, np.intp).ravel(), inverse_transpose).T


def _gradient_rows(field: np.ndarray, at: np.ndarray, inverse_transpose: np.ndarray) -> np.ndarray:
    """(3, N) world gradient at flat indices `at`; elementwise sums, not a matrix product (no BLAS threads)."""
    flat = field.ravel()
    per_index = np.zeros((3, at.size))
    stride = 1
    for a in (2, 1, 0):  # as numpy.gradient: central inside, one-sided at the edges
        n = field.shape[a]
        if n > 1:
            index = at // stride % n
            up = index < n - 1
            down = index > 0
            if up.all() and down.all():  # no voxel on this axis's edges: central differences only
                per_index[a] = (flat[at + stride] - flat[at - stride]) / 2.0
            else:
                per_index[a] = (flat[at + stride * up] - flat[at - stride * down]) / (up.astype(float) + down)
        stride *= n
    rows = np.empty_like(per_index)
    for r in range(3):  # row r of inverse_transpose @ per_index
        rows[r] = inverse_transpose[r, 0] * per_index[0] + inverse_transpose[r, 1] * per_index[1] \
            + inverse_transpose[r, 2] * per_index[2]
    return rows
