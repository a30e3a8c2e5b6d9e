"""Checks of an EPI run before it is corrected: direction, matrix, finite data, shift size.

Everything here raises a :class:`~fieldfix.errors.FieldfixError` whose message names the
run (or its sidecar) and says what is wrong; the unwarping job runs these checks for every
run before it writes anything.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import GeometryError, InputError, MetadataError
from ..geometry import parse_pe_code
from ..io import Image, sidecar_path

__all__ = ["resolve_pe_code", "check_recon_matrix", "finite_volume", "check_shift_size", "b0_values",
           "find_b0_mask", "MAX_SHIFT_FOV_FRACTION"]

#: Shifts larger than this fraction of the field of view along the PE axis are refused
#: unless forced: they almost always mean wrong timing units or a wrong field map.
MAX_SHIFT_FOV_FRACTION = 0.25


def resolve_pe_code(pe_code: str | None, image: Image, timing_win: str | None) -> tuple[str, str]:
    """The run's phase-encode code and where it came from (arguments, sidecar or both)."""
    side = image.sidecar.get("PhaseEncodingDirection")
    if side is not None:
        try:
            parse_pe_code(side)
        except InputError:
            raise MetadataError(f"PhaseEncodingDirection {side!r} in the sidecar is not a BIDS code",
                                sidecar_path(image.path)) from None
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


def b0_values(b0: Image) -> np.ndarray:
    """The B0 map's values, refused when not finite everywhere."""
    values = b0.get_fdata(np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("the B0 map contains NaN or infinite values; it must be defined (extended) everywhere",
                         b0.path)
    return values


def find_b0_mask(b0_path: Path, b0_mask_path) -> Path | None:
    """The given mask, else ``<tag>b0_mask.nii.gz`` beside a ``<tag>b0_hz.nii.gz``, else None."""
    if b0_mask_path is not None:
        return Path(b0_mask_path)
    name = b0_path.name
    for suffix in ("b0_hz.nii.gz", "b0_hz.nii"):
        if name.endswith(suffix):
            candidate = b0_path.with_name(name[: -len(suffix)] + "b0_mask" + suffix[len("b0_hz"):])
            if candidate.is_file():
                return candidate
    return None


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


def check_shift_size(maps, mask, run_path, b0_path, force: bool) -> float:
    """The largest shift in the mask; refused beyond a quarter of the field of view unless forced."""
    n = maps.shift_vox.shape[maps.pe_axis]
    inside = np.abs(maps.shift_vox[mask]) if mask.any() else np.abs(maps.shift_vox).ravel()
    largest = float(inside.max()) if inside.size else 0.0
    limit = MAX_SHIFT_FOV_FRACTION * n
    if largest > limit and not force:
        raise GeometryError(
            f"shifts up to {largest:.1f} voxels exceed a quarter of the field of view along the phase-encode axis "
            f"({limit:.1f} voxels) with the field map {Path(b0_path).name}; check the readout timing units and the "
            f"field map, or force the correction (force)", run_path)
    return largest
