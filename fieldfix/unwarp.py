"""Unwarping EPI volumes along the phase-encode axis, and the forward (distorting) model.

The correction is a pull-back along the phase-encode (PE) axis (see :mod:`fieldfix.shift`
for the physics)::

    corrected(y) = distorted(y + shift_vox(y)) * w(y)

with ``w`` the Jacobian ``1 + d shift / d y`` (the floor value in folded voxels) or 1
without intensity correction. The positions, interpolation taps and weights depend only
on the shift map, so they are computed once per run into an :class:`UnwarpTables` and
applied to every volume by a parallel numba kernel (:mod:`fieldfix._unwarp_kernels`).

Interpolation along the PE axis (``interp``):

``'cubic'`` (the default)
    Cubic B-spline, four taps on coefficients obtained by the 1D B-spline prefilter along
    the PE axis only (mirror boundary), as in Unser, Aldroubi & Eden 1993, IEEE Trans.
    Signal Process. 41(2); values agree with ``scipy.ndimage.map_coordinates(order=3)``.
    The tables hold one float32 position and one float32 factor per voxel; the kernel
    prefilters and samples each block of lines in one pass
    (:func:`fieldfix._unwarp_kernels.cubic_lines`).
``'linear'``
    Two taps.
``'sinc'``
    Band-limited: Lanczos-windowed sinc with radius 4 (eight taps, weights normalised to
    sum to one, mirror boundary).

Positions within half a voxel outside the first or last voxel centre take the edge value;
positions further out (signal that came from outside the field of view) give zero.

Examples
--------
>>> import numpy as np
>>> shift = np.full((4, 16, 3), 0.5)
>>> tables = build_tables(shift, pe_axis=1, interp="linear", jacobian=True)
>>> volume = np.tile(np.arange(16.0), (4, 1))[..., None].repeat(3, axis=2)
>>> float(apply_tables(tables, volume)[0, 3, 0])
3.5
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import _unwarp_kernels as kernels
from .errors import GeometryError, InputError, check_choice
from .geometry import parse_pe_code, resample_to_grid
from .shift import (
    DEFAULT_JACOBIAN_FLOOR,
    fold_mask,
    intensity_weight,
    jacobian_from_shift,
    shift_vox_from_field,
)

__all__ = [
    "INTERPOLATIONS",
    "LANCZOS_RADIUS",
    "ShiftMaps",
    "UnwarpTables",
    "shift_maps",
    "field_on_grid",
    "build_tables",
    "apply_tables",
    "unwarp_volume",
    "unwarp_array",
    "interpolate_along_axis",
    "distort",
    "distort_with_field",
]

INTERPOLATIONS = ("linear", "cubic", "sinc")
#: Radius (in voxels) of the Lanczos window of the band-limited interpolation.
LANCZOS_RADIUS = 4


@dataclass
class ShiftMaps:
    """Shift map of one EPI grid and the quantities derived from it.

    Attributes
    ----------
    shift_vox : (X, Y, Z) float64, voxels along the PE axis (positive = increasing index)
    jacobian : (X, Y, Z) float64
    fold : (X, Y, Z) bool, Jacobian at or below `jacobian_floor`
    inside : (X, Y, Z) bool, EPI voxels covered by the B0 map's field of view
    pe_axis : int
    pe_sign : int
    jacobian_floor : float
    """

    shift_vox: np.ndarray
    jacobian: np.ndarray
    fold: np.ndarray
    inside: np.ndarray
    pe_axis: int
    pe_sign: int
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR


class UnwarpTables:
    """Tables of one run: computed once, applied to every volume.

    Linear and sinc tables list the taps of every voxel (`index`, `weight`). Cubic tables
    store one float32 position along the PE axis and one float32 factor per voxel; the
    kernel recomputes the four weights and prefilters each line itself
    (:func:`fieldfix._unwarp_kernels.cubic_lines`), so no index table exists. For
    inspection, `index` and `weight` of cubic tables are derived on demand.

    Attributes
    ----------
    shape : tuple of int, the volume shape
    pe_axis : int
    interp : str
    index : (n_voxels, taps) int32/int64, flat source positions in `layout` order
    weight : (n_voxels, taps) float32, interpolation weight times intensity weight
    layout : {'C', 'F'}
        Memory order of the volumes the tables index: rows and flat positions follow it.
        NIfTI volumes read through nibabel are Fortran-ordered; using ``'F'`` for them
        avoids a transposing copy on the way in and on the way out.
    position : (n_voxels,) float32 or None
        Cubic only: sampling position along the PE axis (voxels, clipped to the axis).
    scale : (n_voxels,) float32 or None
        Cubic only: intensity weight, 0 where the position lies outside the field of view.
    """

    def __init__(self, shape, pe_axis, interp, index=None, weight=None, layout="C", *, position=None, scale=None):
        self.shape = tuple(shape)
        self.pe_axis = int(pe_axis)
        self.interp = interp
        self.layout = layout
        self.position = position
        self.scale = scale
        self._index = index
        self._weight = weight

    def __repr__(self) -> str:
        return (f"UnwarpTables(shape={self.shape}, pe_axis={self.pe_axis}, interp={self.interp!r}, "
                f"layout={self.layout!r}, nbytes={self.nbytes})")

    @property
    def index(self) -> np.ndarray:
        if self._index is None:
            self._index, self._weight = _explicit_cubic(self)
        return self._index

    @property
    def weight(self) -> np.ndarray:
        if self._weight is None:
            self._index, self._weight = _explicit_cubic(self)
        return self._weight

    @property
    def lines(self) -> tuple[int, int, int]:
        """``(outer, n, inner)``: the flat volume in `layout` order seen as lines along the PE axis."""
        a = self.pe_axis
        before = int(np.prod(self.shape[:a], dtype=np.int64))
        after = int(np.prod(self.shape[a + 1:], dtype=np.int64))
        return (after, self.shape[a], before) if self.layout == "F" else (before, self.shape[a], after)

    @property
    def nbytes(self) -> int:
        parts = (self.position, self.scale) if self.interp == "cubic" else (self._index, self._weight)
        return int(sum(p.nbytes for p in parts if p is not None))


def field_on_grid(
    b0_hz: np.ndarray, b0_affine: np.ndarray, epi_shape: tuple, epi_affine: np.ndarray, *, order: int = 1
) -> tuple[np.ndarray, np.ndarray]:
    """Resample a B0 map (Hz, undistorted space) onto an EPI grid through the affines.

    Uses :func:`fieldfix.geometry.resample_to_grid` (edge values outside the B0 map's
    field of view). Returns ``(b0_hz_on_epi, inside)``.
    """
    return resample_to_grid(np.asarray(b0_hz, float), b0_affine, tuple(epi_shape[:3]), epi_affine, order=order)


def shift_maps(
    b0_hz: np.ndarray,
    pe_code: str,
    echo_spacing_s: float,
    *,
    n_pe_lines: int | None = None,
    inside: np.ndarray | None = None,
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR,
) -> ShiftMaps:
    """Shift, Jacobian and fold mask for a B0 map already on the EPI grid.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array, Hz on the EPI grid
    pe_code : str, BIDS phase-encode code
    echo_spacing_s : float, effective echo spacing in seconds
    n_pe_lines : int, optional, reconstructed PE matrix (default: the grid's size)
    inside : bool array, optional, where the B0 map is defined
    jacobian_floor : float

    Examples
    --------
    >>> import numpy as np
    >>> maps = shift_maps(np.full((3, 8, 2), 20.0), "j", 0.0005)
    >>> float(maps.shift_vox[0, 0, 0]), bool(maps.fold.any())
    (0.08, False)
    """
    axis, sign = parse_pe_code(pe_code)
    shift = shift_vox_from_field(b0_hz, pe_code, echo_spacing_s, n_pe_lines)
    jac = jacobian_from_shift(shift, axis)
    inside = np.ones(shift.shape, bool) if inside is None else np.asarray(inside, bool)
    return ShiftMaps(shift, jac, fold_mask(jac, jacobian_floor), inside, axis, sign, float(jacobian_floor))


def _mirror(index: np.ndarray, n: int) -> np.ndarray:
    """Mirror-reflect integer indices into [0, n - 1] (scipy.ndimage 'mirror' mode)."""
    if n == 1:
        return np.zeros_like(index)
    period = 2 * (n - 1)
    if index.min() < -(n - 1) or index.max() > period:  # several reflections (tiny axes)
        index = np.mod(index, period)
        return np.where(index >= n, period - index, index)
    index = np.abs(index)  # one reflection at each end
    return np.where(index >= n, period - index, index)


def _taps(position: np.ndarray, n: int, interp: str) -> tuple[np.ndarray, np.ndarray]:
    """Interpolation taps (indices along the axis, weights) for positions inside [0, n-1]."""
    if interp == "linear":
        if n == 1:
            return np.zeros(position.shape + (1,), np.int64), np.ones(position.shape + (1,))
        base = np.minimum(np.floor(position).astype(np.int64), n - 2)
        frac = position - base
        return np.stack([base, base + 1], axis=-1), np.stack([1.0 - frac, frac], axis=-1)
    if interp == "cubic":
        base = np.floor(position).astype(np.int64)
        f = position - base
        f2, f3 = f * f, f * f * f
        weights = np.stack(
            [(1.0 - f) ** 3 / 6.0, (4.0 - 6.0 * f2 + 3.0 * f3) / 6.0, (1.0 + 3.0 * f + 3.0 * f2 - 3.0 * f3) / 6.0,
             f3 / 6.0], axis=-1)
        offsets = np.arange(-1, 3)
        return _mirror(base[..., None] + offsets, n), weights
    if interp == "sinc":
        a = LANCZOS_RADIUS
        base = np.floor(position).astype(np.int64)
        offsets = np.arange(-a + 1, a + 1)
        taps = base[..., None] + offsets
        x = position[..., None] - taps
        weights = np.sinc(x) * np.sinc(x / a)
        weights /= weights.sum(axis=-1, keepdims=True)
        return _mirror(taps, n), weights
    check_choice("interp", interp, INTERPOLATIONS, "interpolation")
    raise AssertionError(f"interpolation {interp!r} has no kernel")


def interpolate_along_axis(volume: np.ndarray, positions: np.ndarray, axis: int, interp: str = "linear") -> np.ndarray:
    """Sample `volume` at fractional `positions` along one axis (plain numpy, no tables).

    ``out[..., y, ...] = volume[..., positions[..., y, ...], ...]`` by the chosen
    interpolation, using the same boundary rule as the unwarping tables (edge value
    within half a voxel outside, zero further out). Useful as a reference and for
    one-off resampling.
    """
    return apply_tables(_tables_for(np.asarray(positions, float), axis, interp, None, "C"), volume)


#: Voxels per slab while building tables (bounds the temporary arrays to a few MiB).
_SLAB_VOXELS = 1 << 17


def _tables_for(position: np.ndarray, axis: int, interp: str, scale: np.ndarray | None, layout: str) -> UnwarpTables:
    """Tables for sampling at `position` along `axis` (compact for cubic, taps otherwise)."""
    if layout not in ("C", "F"):
        raise InputError(f"layout must be 'C' or 'F', got {layout!r}")
    if interp == "cubic":
        return _build_cubic(position, axis, scale, layout)
    return _build_taps(position, axis, interp, scale, layout)


def _build_cubic(position: np.ndarray, axis: int, scale: np.ndarray | None, layout: str) -> UnwarpTables:
    """Cubic tables: the clipped position and the factor (0 outside the field of view), float32."""
    n = position.shape[axis]
    flat = np.asarray(position).ravel(order=layout)
    ok = (flat >= -0.5) & (flat <= n - 0.5)
    factor = ok.astype(np.float32)
    if scale is not None:
        factor *= np.asarray(scale, np.float32).ravel(order=layout)
    clipped = np.clip(flat, 0.0, n - 1.0).astype(np.float32)
    # float32 rounding must not lift a position to n - 1 + ulp: the kernel takes floor by truncation
    np.minimum(clipped, np.float32(n - 1), out=clipped)
    return UnwarpTables(position.shape, axis, "cubic", layout=layout, position=clipped, scale=factor)


def _explicit_cubic(tables: UnwarpTables) -> tuple[np.ndarray, np.ndarray]:
    """The four taps per voxel of cubic tables (indices into the prefiltered volume, weights)."""
    position = tables.position.astype(np.float64).reshape(tables.shape, order=tables.layout)
    scale = tables.scale.reshape(tables.shape, order=tables.layout)
    explicit = _build_taps(position, tables.pe_axis, "cubic", scale, tables.layout)
    return explicit.index, explicit.weight


def _build_taps(position: np.ndarray, axis: int, interp: str, scale: np.ndarray | None, layout: str) -> UnwarpTables:
    """Tables for sampling at `position` along `axis`, built slab by slab.

    Rows follow the voxels in `layout` order, so slabs along the slowest axis of that
    order (the first for C, the last for F) fill contiguous blocks of rows; the
    temporaries of one slab are all that exists besides the finished tables.
    """
    shape = position.shape
    ndim = len(shape)
    n = shape[axis]
    size = int(np.prod(shape))
    if layout == "C":
        strides = [int(np.prod(shape[a + 1:])) for a in range(ndim)]
        slow = 0
    else:
        strides = [int(np.prod(shape[:a])) for a in range(ndim)]
        slow = ndim - 1
    dtype = np.int32 if size < 2**31 else np.int64
    taps = _taps(np.zeros(1), n, interp)[0].shape[-1]
    index = np.empty((size, taps), dtype)
    weight = np.empty((size, taps), np.float32)
    plane = size // shape[slow] if shape[slow] else 0
    step = max(1, _SLAB_VOXELS // max(plane, 1))
    for first in range(0, shape[slow], step):
        last = min(shape[slow], first + step)
        part = [slice(None)] * ndim
        part[slow] = slice(first, last)
        part = tuple(part)
        pos = position[part]
        ok = (pos >= -0.5) & (pos <= n - 0.5)
        along, w = _taps(np.clip(pos, 0.0, n - 1.0), n, interp)
        w = np.where(ok[..., None], w, 0.0)
        if scale is not None:
            w *= scale[part][..., None]
        coords = np.indices(pos.shape, sparse=True)
        own_flat = sum((c + (first if a == slow else 0)) * strides[a] for a, c in enumerate(coords))
        base = own_flat - coords[axis] * strides[axis] - (first * strides[axis] if axis == slow else 0)
        idx = base[..., None] + along * strides[axis]
        if layout == "F":  # rows in Fortran order of the voxels
            idx = idx.transpose(tuple(range(ndim - 1, -1, -1)) + (ndim,))
            w = w.transpose(tuple(range(ndim - 1, -1, -1)) + (ndim,))
        rows = slice(first * plane, last * plane)
        index[rows] = idx.reshape(-1, taps)
        weight[rows] = w.reshape(-1, taps)
    return UnwarpTables(shape=tuple(shape), pe_axis=int(axis), interp=interp, index=index, weight=weight,
                        layout=layout)


def build_tables(
    shift_vox: np.ndarray,
    pe_axis: int,
    *,
    interp: str = "cubic",
    jacobian: bool = True,
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR,
    layout: str = "C",
) -> UnwarpTables:
    """Compute the index/weight tables of the pull-back for one shift map.

    Parameters
    ----------
    shift_vox : (X, Y, Z) array, voxels along `pe_axis`
    pe_axis : int
    interp : {'cubic', 'linear', 'sinc'}
        Interpolation along the PE axis (default cubic B-spline).
    jacobian : bool
        Multiply by the Jacobian intensity weight (floor in folded voxels).
    jacobian_floor : float
    layout : {'C', 'F'}
        Memory order of the volumes the tables will be applied to (either works with
        any volume; the matching one avoids a copy).

    Returns
    -------
    UnwarpTables
    """
    shift_vox = np.asarray(shift_vox, float)
    if shift_vox.ndim != 3:
        raise GeometryError(f"the shift map must be 3D, got {shift_vox.ndim} dimensions")
    check_choice("interp", interp, INTERPOLATIONS, "interpolation")
    own = np.indices(shift_vox.shape, sparse=True)[pe_axis]
    position = own + shift_vox
    scale = intensity_weight(jacobian_from_shift(shift_vox, pe_axis), jacobian_floor) if jacobian else None
    return _tables_for(position, pe_axis, interp, scale, layout)


def apply_tables(tables: UnwarpTables, volume: np.ndarray, out: np.ndarray | None = None, *,
                 parallel: bool = True) -> np.ndarray:
    """Unwarp one 3D volume with precomputed tables (numba kernel, parallel).

    Parameters
    ----------
    tables : UnwarpTables
    volume : (X, Y, Z) array, the distorted volume on the tables' grid (any memory order;
        one in the tables' layout is used without a copy)
    out : (X, Y, Z) float32 array contiguous in the tables' layout, optional
    parallel : bool
        Run the kernel on all numba threads (False: one thread, for callers that already
        run one process per core).

    Returns
    -------
    (X, Y, Z) float32 array, contiguous in the tables' layout
    """
    volume = np.asarray(volume)
    layout = tables.layout
    if volume.shape != tables.shape:
        raise GeometryError(f"volume shape {volume.shape} does not match the tables' grid {tables.shape}")
    if out is None:
        out = np.empty(tables.shape, np.float32, order=layout)
    flat_out = out.ravel(order=layout)
    if out.dtype != np.float32 or not np.shares_memory(flat_out, out):
        raise ValueError(f"out must be a float32 array contiguous in {layout!r} order")
    if tables.interp == "cubic":
        lines = tables.lines
        source = volume.astype(np.float32, order=layout, copy=False).ravel(order=layout)
        kernels.cubic_lines(source.reshape(lines), tables.position.reshape(lines), tables.scale.reshape(lines),
                            flat_out.reshape(lines), parallel=parallel)
        return out
    if volume.dtype not in (np.float32, np.float64):
        volume = volume.astype(np.float32)
    source = volume.ravel(order=layout)  # a view when the volume is already in that order
    kernels.gather(source, tables.index, tables.weight, flat_out, parallel=parallel)
    return out


def unwarp_volume(volume: np.ndarray, shift_vox: np.ndarray, pe_axis: int, **options) -> np.ndarray:
    """Unwarp a single 3D volume (builds the tables, then applies them).

    `options` are those of :func:`unwarp_array` (`interp`, `jacobian`, `jacobian_floor`); a 4D
    array is refused here.

    Examples
    --------
    >>> import numpy as np
    >>> vol = np.zeros((1, 9, 1)); vol[0, 5, 0] = 1.0
    >>> unwarp_volume(vol, np.full(vol.shape, 2.0), 1)[0, :, 0].tolist()  # cubic: exact on samples
    [0.0, 0.0, 0.0, 1.0, 0.0, 0.0, 0.0, 0.0, 0.0]
    """
    if np.ndim(volume) != 3:
        raise GeometryError(f"expected a 3D volume, got {np.ndim(volume)} dimensions")
    return unwarp_array(volume, shift_vox, pe_axis, **options)


def unwarp_array(
    data: np.ndarray,
    shift_vox: np.ndarray,
    pe_axis: int,
    *,
    interp: str = "cubic",
    jacobian: bool = True,
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR,
) -> np.ndarray:
    """Unwarp a 3D volume or a whole in-memory 4D run (volumes along the last axis).

    Returns float32 of the same shape.
    """
    data = np.asarray(data)
    layout = "F" if data.flags.f_contiguous and not data.flags.c_contiguous else "C"
    tables = build_tables(shift_vox, pe_axis, interp=interp, jacobian=jacobian, jacobian_floor=jacobian_floor,
                          layout=layout)
    if data.ndim == 3:
        return apply_tables(tables, data)
    if data.ndim != 4:
        raise GeometryError(f"expected a 3D volume or a 4D run, got {data.ndim} dimensions")
    out = np.empty(data.shape, np.float32, order=layout)
    volume_out = np.empty(tables.shape, np.float32, order=layout)
    for t in range(data.shape[3]):
        out[..., t] = apply_tables(tables, data[..., t], volume_out)
    return out


def distort(image: np.ndarray, shift_vox: np.ndarray, pe_axis: int) -> np.ndarray:
    """Forward model: distort an undistorted 3D image by a shift map (signal-conserving).

    Each undistorted voxel ``[y - 1/2, y + 1/2]`` maps to the interval between its edges'
    positions ``e + shift(e)`` (edge shifts linearly interpolated between voxel centres,
    extrapolated at the ends); its signal is spread uniformly over that interval and
    integrated over each distorted voxel. Compression brightens, stretching darkens,
    folds pile up, and the summed signal is kept apart from what leaves the field of
    view. The inverse of :func:`unwarp_volume` with the Jacobian.

    Parameters
    ----------
    image : (X, Y, Z) array, undistorted
    shift_vox : (X, Y, Z) array, voxels, on the same (undistorted) grid
    pe_axis : int

    Returns
    -------
    (X, Y, Z) float64 array

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((1, 8, 1)); img[0, 2, 0] = 1.0
    >>> distort(img, np.full(img.shape, 1.5), 1)[0, :, 0].tolist()
    [0.0, 0.0, 0.0, 0.5, 0.5, 0.0, 0.0, 0.0]
    """
    image = np.asarray(image, float)
    shift = np.asarray(shift_vox, float)
    if image.shape != shift.shape or image.ndim != 3:
        raise GeometryError(f"image {image.shape} and shift map {shift.shape} must be 3D on the same grid")
    values = np.moveaxis(image, pe_axis, -1)
    s = np.moveaxis(shift, pe_axis, -1)
    shape = values.shape
    n = shape[-1]
    values = values.reshape(-1, n)
    s = s.reshape(-1, n)
    if n > 1:
        first = s[:, :1] - 0.5 * (s[:, 1:2] - s[:, :1])
        last = s[:, -1:] + 0.5 * (s[:, -1:] - s[:, -2:-1])
        edge_shift = np.concatenate([first, 0.5 * (s[:, 1:] + s[:, :-1]), last], axis=1)
    else:
        edge_shift = np.concatenate([s, s], axis=1)
    edges = np.arange(n + 1) - 0.5 + edge_shift
    out = kernels.splat_lines(values, edges[:, :-1], edges[:, 1:])
    return np.moveaxis(out.reshape(shape), -1, pe_axis)


def distort_with_field(
    image: np.ndarray, b0_hz: np.ndarray, pe_code: str, echo_spacing_s: float, n_pe_lines: int | None = None
) -> np.ndarray:
    """Forward model with a B0 map (Hz) on the image grid: what an EPI run would show.

    Examples
    --------
    >>> import numpy as np
    >>> img = np.zeros((1, 10, 1)); img[0, 4, 0] = 1.0
    >>> out = distort_with_field(img, np.full(img.shape, 100.0), "j-", 0.001)
    >>> int(np.argmax(out[0, :, 0]))
    3
    """
    axis, _ = parse_pe_code(pe_code)
    return distort(image, shift_vox_from_field(b0_hz, pe_code, echo_spacing_s, n_pe_lines), axis)
