"""Readout timing to voxel shifts: shift maps, Jacobian, fold mask, displacement field.

Physics
-------
During an echo-planar readout, successive phase-encode (PE) lines are acquired one
effective echo spacing ``esp`` apart. A spin whose frequency is off by ``f`` hertz gains
an extra phase ``-2 pi f t`` that grows linearly from line to line, exactly like the
phase a PE gradient step imposes. One PE step (one line of the reconstructed k-space,
``1 / FOV``) takes ``esp`` seconds, so the off-resonant spin appears displaced along the
PE axis by::

    shift_vox = f * esp * n_pe_lines        (voxels of the reconstructed image)

where ``n_pe_lines`` is the number of PE lines of the *reconstructed* image (its
matrix size along the PE axis). ``esp`` is the *effective* echo spacing: the time
between neighbouring lines of the reconstructed k-space, i.e. the echo spacing between
acquired lines divided by the in-plane acceleration factor. When only the total
readout time is known (BIDS ``TotalReadoutTime``, defined as the time from the centre of
the first to the centre of the last line of the reconstructed k-space)::

    esp = total_readout_time / (n_pe_lines - 1)

Sign: with PE polarity ``+`` (codes ``i``, ``j``, ``k``) k-space is traversed towards
increasing index over time, and a positive field moves signal towards *increasing*
voxel index; polarity ``-`` reverses it. Both the factor and the sign are checked
against the EPI acquisition simulator in ``fieldfix.simulate.epi`` (tests/test_simulate_epi.py).
Distortion runs along the PE axis because that is the slowest direction of k-space
(common practice, no source); the readout direction is treated as instantaneous.

Mapping and Jacobian
--------------------
The B0 map is defined in undistorted space. A corrected (undistorted) voxel at index
``y`` along the PE axis was imaged at ``y + shift_vox(y)`` in the distorted image. The
signal of an interval ``dy`` lands on ``dy * (1 + d shift / dy)``, so conserving signal
gives the pull-back rule::

    corrected(y) = distorted(y + shift(y)) * J(y),   J = 1 + d shift / d y

(``d shift / d y`` by central differences along the PE axis, one-sided at the edges).

Folding: where ``J <= jacobian_floor`` (default 0.1) the mapping folds (J <= 0, several
positions land on the same distorted voxel) or is compressed more than tenfold; the
signal there piles up and cannot be separated again. Rule for folded voxels: they are
flagged in the fold mask and their pulled value is weighted by ``jacobian_floor``
instead of the Jacobian (so they are never zero or negative); their intensity is not
reliable and they should be excluded from analyses.

Examples
--------
>>> import numpy as np
>>> timing = resolve_timing(64, readout_time_s=0.0315)
>>> round(timing.echo_spacing_s * 1e3, 3)
0.5
>>> shift = shift_vox_from_field(np.full((2, 64, 2), 10.0), "j-", timing.echo_spacing_s)
>>> float(shift[0, 0, 0])
-0.32
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np

from .units import check_plausible
from .errors import GeometryError, InputError, MetadataError
from .geometry import parse_pe_code, voxel_sizes_mm

__all__ = [
    "READOUT_TIME_RANGE_S",
    "DEFAULT_JACOBIAN_FLOOR",
    "Timing",
    "resolve_timing",
    "echo_spacing_from_readout_time",
    "readout_time_from_echo_spacing",
    "shift_vox_from_field",
    "Readout",
    "jacobian_from_shift",
    "fold_mask",
    "intensity_weight",
    "displacement_field_mm",
    "ShiftStatistics",
    "shift_summary",
]

#: Plausible total readout times: 1 ms to 300 ms (from memory: clinical EPI readouts are
#: about 10-100 ms). Values outside almost always mean a unit mix-up.
READOUT_TIME_RANGE_S = (1e-3, 0.3)
#: Jacobian at or below which a voxel counts as folded (see module docstring).
DEFAULT_JACOBIAN_FLOOR = 0.1
#: Relative disagreement tolerated between two timing sources.
TIMING_REL_TOL = 0.01


@dataclass(frozen=True)
class Timing:
    """Readout timing of an EPI run, resolved for a given reconstructed PE matrix size.

    Attributes
    ----------
    echo_spacing_s : float
        Effective echo spacing (time between neighbouring reconstructed PE lines), s.
    readout_time_s : float
        Total readout time ``echo_spacing_s * (n_pe_lines - 1)``, s.
    n_pe_lines : int
        Reconstructed matrix size along the PE axis.
    source : str
        Where the timing came from: ``'arguments'``, ``'sidecar'`` or ``'arguments+sidecar'``.
    """

    echo_spacing_s: float
    readout_time_s: float
    n_pe_lines: int
    source: str

    def as_dict(self) -> dict:
        return asdict(self)


def echo_spacing_from_readout_time(readout_time_s: float, n_pe_lines: int) -> float:
    """Effective echo spacing from the total readout time: ``total / (lines - 1)``.

    Examples
    --------
    >>> echo_spacing_from_readout_time(0.0455, 92)
    0.0005
    """
    if n_pe_lines < 2:
        raise GeometryError(f"need at least 2 phase-encode lines, got {n_pe_lines}")
    return float(readout_time_s) / (int(n_pe_lines) - 1)


def readout_time_from_echo_spacing(echo_spacing_s: float, n_pe_lines: int) -> float:
    """Total readout time from the effective echo spacing: ``esp * (lines - 1)``.

    Examples
    --------
    >>> round(readout_time_from_echo_spacing(0.0005, 92), 6)
    0.0455
    """
    if n_pe_lines < 2:
        raise GeometryError(f"need at least 2 phase-encode lines, got {n_pe_lines}")
    return float(echo_spacing_s) * (int(n_pe_lines) - 1)


def _positive_finite(value, name: str, where: str) -> float | None:
    if value is None:
        return None
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise MetadataError(f"{name} from {where} is not a number: {value!r}") from None
    if not math.isfinite(number) or number <= 0:
        raise MetadataError(f"{name} from {where} must be a positive number of seconds, got {value!r}")
    return number


def _from_pair(readout_time_s, echo_spacing_s, n_pe_lines, where, rel_tol):
    """Turn an optional (readout, spacing) pair from one source into a spacing, checking agreement."""
    if readout_time_s is None and echo_spacing_s is None:
        return None
    from_readout = None if readout_time_s is None else echo_spacing_from_readout_time(readout_time_s, n_pe_lines)
    if from_readout is not None and echo_spacing_s is not None:
        if abs(from_readout - echo_spacing_s) > rel_tol * echo_spacing_s:
            raise MetadataError(
                f"{where}: total readout time {readout_time_s * 1e3:.4g} ms and effective echo spacing "
                f"{echo_spacing_s * 1e3:.4g} ms disagree for {n_pe_lines} phase-encode lines "
                f"(expected readout time = spacing x {n_pe_lines - 1} = "
                f"{echo_spacing_s * (n_pe_lines - 1) * 1e3:.4g} ms)"
            )
    return echo_spacing_s if echo_spacing_s is not None else from_readout


def resolve_timing(
    n_pe_lines: int,
    *,
    readout_time_s: float | None = None,
    echo_spacing_s: float | None = None,
    sidecar: dict | None = None,
    timing_win: str | None = None,
    rel_tol: float = TIMING_REL_TOL,
) -> Timing:
    """Work out the effective echo spacing of a run from arguments and/or its BIDS sidecar.

    Sources: the arguments (``readout_time_s``, ``echo_spacing_s``) and the sidecar keys
    ``TotalReadoutTime`` and ``EffectiveEchoSpacing`` (seconds, as BIDS defines them).
    Within one source, both values must agree (readout = spacing x (lines - 1), within
    `rel_tol`). When both sources give timing and they disagree, a
    :class:`~fieldfix.errors.MetadataError` is raised unless `timing_win` says which wins
    (``'arguments'`` or ``'sidecar'``). The result must lie in the plausible readout range
    1 ms to 300 ms.

    Parameters
    ----------
    n_pe_lines : int
        Reconstructed matrix size along the phase-encode axis.
    readout_time_s, echo_spacing_s : float, optional
        Timing given by the user, in seconds.
    sidecar : dict, optional
        The run's BIDS JSON sidecar.
    timing_win : {None, 'arguments', 'sidecar'}
        Which source wins a contradiction; None makes a contradiction an error.
    rel_tol : float
        Relative tolerance of the agreement checks.

    Returns
    -------
    Timing

    Examples
    --------
    >>> t = resolve_timing(92, sidecar={"TotalReadoutTime": 0.0455})
    >>> t.echo_spacing_s, t.source
    (0.0005, 'sidecar')
    """
    if timing_win not in (None, "arguments", "sidecar"):
        raise InputError(f"timing_win must be None, 'arguments' or 'sidecar', got {timing_win!r}")
    n_pe_lines = int(n_pe_lines)
    sidecar = sidecar or {}
    arg_readout = _positive_finite(readout_time_s, "readout time", "the arguments")
    arg_spacing = _positive_finite(echo_spacing_s, "echo spacing", "the arguments")
    side_readout = _positive_finite(sidecar.get("TotalReadoutTime"), "TotalReadoutTime", "the sidecar")
    side_spacing = _positive_finite(sidecar.get("EffectiveEchoSpacing"), "EffectiveEchoSpacing", "the sidecar")
    from_args = _from_pair(arg_readout, arg_spacing, n_pe_lines, "arguments", rel_tol)
    from_side = _from_pair(side_readout, side_spacing, n_pe_lines, "sidecar", rel_tol)
    if from_args is None and from_side is None:
        raise MetadataError(
            "no readout timing: give a total readout time or an effective echo spacing, or provide "
            "TotalReadoutTime / EffectiveEchoSpacing in the run's JSON sidecar"
        )
    if from_args is not None and from_side is not None:
        if abs(from_args - from_side) <= rel_tol * from_side:
            spacing, source = from_args, "arguments+sidecar"
        elif timing_win == "arguments":
            spacing, source = from_args, "arguments"
        elif timing_win == "sidecar":
            spacing, source = from_side, "sidecar"
        else:
            raise MetadataError(
                f"the given timing (effective echo spacing {from_args * 1e3:.4g} ms) contradicts the sidecar "
                f"({from_side * 1e3:.4g} ms); say which one wins"
            )
    elif from_args is not None:
        spacing, source = from_args, "arguments"
    else:
        spacing, source = from_side, "sidecar"
    readout = readout_time_from_echo_spacing(spacing, n_pe_lines)
    low, high = READOUT_TIME_RANGE_S
    if not low <= readout <= high:
        raise MetadataError(
            f"total readout time {readout * 1e3:.4g} ms (from {source}) is outside the plausible range "
            f"{low * 1e3:g}-{high * 1e3:g} ms; check the units (seconds in sidecars)"
        )
    return Timing(echo_spacing_s=float(spacing), readout_time_s=float(readout), n_pe_lines=n_pe_lines, source=source)


def shift_vox_from_field(
    b0_hz: np.ndarray, pe_code: str, echo_spacing_s: float, n_pe_lines: int | None = None
) -> np.ndarray:
    """Voxel shift along the phase-encode axis for a B0 map on the EPI grid.

    ``shift_vox = sign * b0_hz * echo_spacing_s * n_pe_lines`` with ``sign`` the PE
    polarity (+1 for ``i``, ``j``, ``k``; -1 for ``i-``, ``j-``, ``k-``). Positive values
    point towards increasing voxel index along the PE axis.

    Parameters
    ----------
    b0_hz : (X, Y, Z) array
        Off-resonance in Hz, already on the EPI grid.
    pe_code : str
        BIDS phase-encode code.
    echo_spacing_s : float
        Effective echo spacing in seconds.
    n_pe_lines : int, optional
        Reconstructed PE matrix size; defaults to ``b0_hz.shape[pe_axis]``.

    Returns
    -------
    (X, Y, Z) float64 array, voxels.

    Examples
    --------
    >>> import numpy as np
    >>> float(shift_vox_from_field(np.full((4, 4, 4), 50.0), "i", 0.0005)[0, 0, 0])
    0.1
    """
    b0_hz = np.asarray(b0_hz, dtype=float)
    axis, sign = parse_pe_code(pe_code)
    check_plausible("echo_spacing_s", echo_spacing_s)
    if b0_hz.ndim != 3:
        raise GeometryError(f"the B0 map must be 3D, got {b0_hz.ndim} dimensions")
    if n_pe_lines is None:
        n_pe_lines = b0_hz.shape[axis]
    return sign * b0_hz * float(echo_spacing_s) * int(n_pe_lines)


@dataclass(frozen=True)
class Readout:
    """Phase-encode code and effective echo spacing of a run: what turns a field into a shift.

    Attributes
    ----------
    pe_code : str, BIDS phase-encode code
    echo_spacing_s : float, effective echo spacing, s
    n_pe_lines : int, optional, reconstructed PE matrix (default: the grid's size)
    te_s : float, optional, echo time (s), when the readout passes the k-space centre: sets the
        signal the run keeps under the field (:func:`fieldfix.dropout.epi_signal_fraction`), not the shift

    Examples
    --------
    >>> Readout("j-", 5e-4, 64).shift_per_hz((64, 64, 30))
    -0.032
    """

    pe_code: str
    echo_spacing_s: float
    n_pe_lines: int | None = None
    te_s: float | None = None

    def shift_per_hz(self, shape) -> float:
        """Shift in voxels along the PE axis per hertz (signed by the polarity), on a grid of `shape`."""
        axis, _ = parse_pe_code(self.pe_code)
        if not np.isfinite(self.echo_spacing_s) or self.echo_spacing_s <= 0:
            raise InputError(f"echo_spacing_s must be a positive number of seconds, got {self.echo_spacing_s!r}")
        lines = shape[axis] if self.n_pe_lines is None else self.n_pe_lines
        return float(shift_vox_from_field(np.ones((1, 1, 1)), self.pe_code, self.echo_spacing_s, lines)[0, 0, 0])


def jacobian_from_shift(shift_vox: np.ndarray, pe_axis: int) -> np.ndarray:
    """Jacobian ``1 + d shift / d y`` of the pull-back mapping along the PE axis.

    Central differences inside, one-sided differences at the two ends
    (:func:`numpy.gradient`).

    Examples
    --------
    >>> import numpy as np
    >>> s = np.tile(0.25 * np.arange(6.0), (2, 1))
    >>> jacobian_from_shift(s, 1)[0].tolist()
    [1.25, 1.25, 1.25, 1.25, 1.25, 1.25]
    """
    shift_vox = np.asarray(shift_vox, dtype=float)
    if shift_vox.shape[pe_axis] < 2:
        return np.ones_like(shift_vox)
    return 1.0 + np.gradient(shift_vox, axis=pe_axis)


def fold_mask(jacobian: np.ndarray, jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR) -> np.ndarray:
    """Voxels where the mapping folds or is compressed beyond recovery (``J <= floor``)."""
    return np.asarray(jacobian) <= jacobian_floor


def intensity_weight(jacobian: np.ndarray, jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR) -> np.ndarray:
    """Intensity weight applied to pulled values: the Jacobian, or the floor in folded voxels.

    Examples
    --------
    >>> import numpy as np
    >>> intensity_weight(np.array([1.3, 0.5, 0.1, -0.4])).tolist()
    [1.3, 0.5, 0.1, 0.1]
    """
    return np.maximum(np.asarray(jacobian, dtype=float), jacobian_floor)


#: World frames a displacement field can be written in: NIfTI's RAS+ (x right, y anterior, z
#: superior) or LPS+ (x left, y posterior, z superior), the frame most registration toolkits use
#: for their physical space (common practice, no source).
DISPLACEMENT_FRAMES = ("ras", "lps")


def displacement_field_mm(shift_vox: np.ndarray, pe_axis: int, affine: np.ndarray, frame: str = "ras") -> np.ndarray:
    """World-space displacement vectors (mm) of the pull-back mapping.

    For each voxel of the corrected grid, the vector from its world position to the
    world position of the distorted-image point it is pulled from:
    ``shift_vox * affine[:3, pe_axis]`` (the affine column is one voxel step along the PE
    axis, in world mm, so oblique grids are handled). World axes are those of the NIfTI
    affine (RAS+), or with ``frame="lps"`` the first two components negated (LPS+).

    Returns
    -------
    (X, Y, Z, 3) float64 array

    Examples
    --------
    >>> import numpy as np
    >>> d = displacement_field_mm(np.full((2, 2, 2), 1.5), 1, np.diag([2.0, -3.0, 2.0, 1.0]))
    >>> d[0, 0, 0].tolist()
    [0.0, -4.5, 0.0]
    """
    if frame not in DISPLACEMENT_FRAMES:
        raise InputError(f"unknown displacement frame {frame!r}; choose ras or lps", parameter="displacement_frame")
    column = np.asarray(affine, dtype=float)[:3, pe_axis]
    if frame == "lps":
        column = column * np.array([-1.0, -1.0, 1.0])
    return np.asarray(shift_vox, dtype=float)[..., None] * column


@dataclass(frozen=True)
class ShiftStatistics:
    """Summary numbers of a shift map inside a mask (see :func:`shift_summary`).

    Attributes
    ----------
    max_abs_shift_vox, max_abs_shift_mm : float, largest shift magnitude (voxels; mm along the PE axis)
    percent_shifted_over_1_voxel : float, share of mask voxels shifted by more than one voxel
    folded_voxels : int, mask voxels whose Jacobian is at or below `jacobian_floor`
    voxels_in_mask : int
    pe_voxel_size_mm : float, voxel size along the phase-encode axis
    jacobian_floor : float
    """

    max_abs_shift_vox: float
    max_abs_shift_mm: float
    percent_shifted_over_1_voxel: float
    folded_voxels: int
    voxels_in_mask: int
    pe_voxel_size_mm: float
    jacobian_floor: float


def shift_summary(
    shift_vox: np.ndarray,
    jacobian: np.ndarray,
    pe_axis: int,
    affine: np.ndarray,
    mask: np.ndarray | None = None,
    jacobian_floor: float = DEFAULT_JACOBIAN_FLOOR,
) -> ShiftStatistics:
    """Summary numbers of a shift map inside a mask (the whole grid if None).

    Examples
    --------
    >>> import numpy as np
    >>> s = np.zeros((2, 4, 2)); s[0, 0, 0] = -2.0
    >>> shift_summary(s, np.ones_like(s), 1, np.eye(4)).max_abs_shift_mm
    2.0
    """
    shift_vox = np.asarray(shift_vox, dtype=float)
    mask = np.ones(shift_vox.shape, bool) if mask is None else np.asarray(mask, bool)
    size_mm = float(voxel_sizes_mm(affine)[pe_axis])
    inside = np.abs(shift_vox[mask])
    n = int(inside.size)
    return ShiftStatistics(
        max_abs_shift_vox=float(inside.max()) if n else 0.0,
        max_abs_shift_mm=float(inside.max() * size_mm) if n else 0.0,
        percent_shifted_over_1_voxel=float(100.0 * np.count_nonzero(inside > 1.0) / n) if n else 0.0,
        folded_voxels=int(np.count_nonzero(fold_mask(np.asarray(jacobian)[mask], jacobian_floor))),
        voxels_in_mask=n, pe_voxel_size_mm=size_mm, jacobian_floor=float(jacobian_floor))
