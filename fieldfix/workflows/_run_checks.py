"""Checks of an EPI run before it is corrected: direction, matrix, finite data, shift size.

Everything here raises a :class:`~fieldfix.errors.FieldfixError` whose message names the
run (or its sidecar) and says what is wrong; the unwarping job runs these checks for every
run before it writes anything.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import GeometryError, InputError, MetadataError
from ..geometry import parse_pe_code
from ..io import Image, sidecar_path
from ..outputs import FieldMapFiles

__all__ = ["resolve_pe_code", "check_recon_matrix", "finite_volume", "check_shift_size", "signal_mask",
           "ShiftCheck", "find_b0_mask", "find_beside_b0", "MAX_SHIFT_FOV_FRACTION", "LARGE_SHIFT_FOV_FRACTION"]

#: The guard against unit and timing mistakes: a run is refused (unless forced) when the 99th
#: percentile of |shift| over the voxels where it has signal exceeds this fraction of the field of
#: view along the phase-encode axis. Real fields shift brain tissue by a few voxels, and even at 7 T
#: only voxels beside air cavities move by a quarter of the field of view; half of it over the bulk
#: of the signal means the readout time or the field's units are wrong (ms written as s, a map in
#: rad/s or ppm read as Hz). Common practice, no source.
MAX_SHIFT_FOV_FRACTION = 0.5
#: Shifts that are large but plausible are corrected with a warning (and flagged in the summary):
#: any voxel with signal shifted by more than this fraction of the field of view.
LARGE_SHIFT_FOV_FRACTION = 0.25
#: Robust statistic of the guard.
SHIFT_GUARD_PERCENTILE = 99.0


def resolve_pe_code(pe_code: str | None, image: Image, timing_win: str | None) -> tuple[str, str]:
    """The run's phase-encode code and where it came from (arguments, sidecar or both)."""
    side = image.sidecar.get("PhaseEncodingDirection")
    if side is not None:
        try:
            parse_pe_code(side)
        except InputError:
            kind = "a number" if isinstance(side, (int, float)) and not isinstance(side, bool) else "not a BIDS code"
            raise MetadataError(f"PhaseEncodingDirection {side!r} in the sidecar is {kind}; BIDS writes it as "
                                "one of i j k i- j- k-", sidecar_path(image.path)) from None
    if pe_code is None and side is None:
        raise MetadataError("no phase-encode direction: give one (pe_code, e.g. j-) or add PhaseEncodingDirection "
                            "to the run's JSON sidecar", image.path)
    if pe_code is None:
        return side, "sidecar"
    parse_pe_code(pe_code)
    if side is None or side == pe_code:
        return pe_code, "arguments" if side is None else "arguments+sidecar"
    if timing_win == "sidecar":
        return side, "sidecar"
    if timing_win == "arguments":
        return pe_code, "arguments"
    raise MetadataError(f"phase-encode direction {pe_code} contradicts the sidecar's {side}; say which one wins "
                        "(timing_win)", image.path)


def find_beside_b0(b0_path: Path, given, role: str) -> Path | None:
    """The given file, else the field-map job's output `role` (a :class:`FieldMapFiles` field:
    ``'mask'``, ``'magnitude'``) beside a B0 map it named, with the map's tag, gzipped or not;
    else None."""
    if given is not None:
        return Path(given)
    name = b0_path.name
    plain = FieldMapFiles.named().b0_hz
    for suffix, ending in ((plain, ""), (plain.removesuffix(".gz"), ".gz")):
        if name.endswith(suffix):
            candidate = b0_path.with_name(getattr(FieldMapFiles.named(name[: -len(suffix)]), role).removesuffix(ending))
            if candidate.is_file():
                return candidate
    return None


def find_b0_mask(b0_path: Path, b0_mask_path) -> Path | None:
    """The given mask, else the field-map job's mask beside its B0 map (same tag), else None."""
    return find_beside_b0(b0_path, b0_mask_path, "mask")


def check_recon_matrix(image: Image, n_lines: int) -> None:
    """The sidecar's ReconMatrixPE, when present, must be the grid's size along the PE axis."""
    recon = image.sidecar.get("ReconMatrixPE")
    if recon is None:
        return
    where = sidecar_path(image.path)
    if isinstance(recon, bool) or not isinstance(recon, (int, float)) or not float(recon).is_integer():
        raise MetadataError(f"ReconMatrixPE in the sidecar must be a whole number of lines, got {recon!r}", where)
    if int(recon) != n_lines:
        raise MetadataError(f"ReconMatrixPE {int(recon)} in the sidecar differs from the image's {n_lines} voxels "
                            f"along the phase-encode axis", where)


def finite_volume(image: Image, volume: np.ndarray, t: int) -> np.ndarray:
    """Refuse a volume with NaN or infinite voxels: the interpolation would spread them."""
    if not np.isfinite(volume).all():
        where = f"volume {t}" if image.ndim == 4 else "the image"
        raise InputError(f"{where} contains NaN or infinite values; unwarping would spread them into "
                         f"neighbouring voxels", image.path)
    return volume


def signal_mask(volume: np.ndarray, within: np.ndarray) -> np.ndarray:
    """Voxels where an EPI volume has signal (Otsu rule of :func:`fieldfix.phase.magnitude_mask`)."""
    from ..phase import magnitude_mask

    volume = np.nan_to_num(np.abs(np.asarray(volume, np.float64)))
    if not np.any(volume > 0):
        return np.zeros(volume.shape, bool)
    try:
        return magnitude_mask(volume) & within
    except InputError:  # a constant image: every voxel carries (the same) signal
        return within & (volume > 0)


@dataclass(frozen=True)
class ShiftCheck:
    """What the shift-size guard found (voxels of the run with signal, inside the statistics mask)."""

    max_abs_shift_vox: float
    robust_abs_shift_vox: float
    signal_voxels: int
    large: bool
    warning: str | None


def check_shift_size(maps, signal, run_path, b0_path, force: bool) -> ShiftCheck:
    """Refuse shifts that mean a unit or timing mistake; warn about large but plausible ones.

    The statistic is the 99th percentile of |shift| over `signal` (the run's signal inside the
    field map's mask); voxels without signal, such as those beside air cavities, cannot trigger a
    refusal. See :data:`MAX_SHIFT_FOV_FRACTION` for the rule.
    """
    n = maps.shift_vox.shape[maps.pe_axis]
    values = np.abs(maps.shift_vox[signal]) if signal.any() else np.abs(maps.shift_vox).ravel()
    largest = float(values.max()) if values.size else 0.0
    robust = float(np.percentile(values, SHIFT_GUARD_PERCENTILE)) if values.size else 0.0
    if robust > MAX_SHIFT_FOV_FRACTION * n and not force:
        raise GeometryError(
            f"shifts of {robust:.1f} voxels (99th percentile over the run's signal) exceed half the field of view "
            f"along the phase-encode axis ({MAX_SHIFT_FOV_FRACTION * n:.1f} voxels) with the field map "
            f"{Path(b0_path).name}: almost certainly a unit or timing mistake (a readout time in ms written as s, or "
            f"a map in rad/s or ppm read as Hz); check them, or force the correction (force)", run_path)
    warning = None
    if largest > LARGE_SHIFT_FOV_FRACTION * n or robust > MAX_SHIFT_FOV_FRACTION * n:
        warning = (f"large shifts: up to {largest:.1f} voxels where the run has signal ({robust:.1f} at the 99th "
                   f"percentile; the phase-encode axis has {n} voxels); corrected, but inspect those regions")
    return ShiftCheck(largest, robust, int(signal.sum()), warning is not None, warning)
