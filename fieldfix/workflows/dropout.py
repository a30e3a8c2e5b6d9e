"""File-level dropout job: B0 map -> retention and BOLD-sensitivity maps for one protocol.

The maps are computed on the B0 map's grid (undistorted space). The slice geometry comes
from an EPI image (``like_path``: its affine, slice axis and phase-encode axis, and its
sidecar's ``PhaseEncodingDirection``, ``SliceEncodingDirection`` and
``EffectiveEchoSpacing`` when not given) or from the B0 grid itself (``slice_axis``), plus
an optional extra tilt about the left-right axis (:func:`fieldfix.dropout.tilt_rotation`).

Outputs in ``out_dir`` (``<p>`` = prefix): ``<p>retention.nii.gz`` (through-plane
retention at the nominal TE), ``<p>bold_sensitivity.nii.gz`` (when the phase-encode code
and echo spacing are known), ``<p>dropout.json`` (parameters, geometry and statistics),
and a provenance JSON beside each image. With an EPI image on another grid, the maps are
also written resampled (linear interpolation, 0 outside the B0 map) onto the EPI grid:
``<p>retention_on_epi.nii.gz`` and ``<p>bold_sensitivity_on_epi.nii.gz``, for overlays on
the (corrected) EPI.

Research software, not a medical device: predicted maps are a planning aid.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ..dropout import PROFILES, acquisition_window_s, dropout_maps, frame_from_affine, slice_profile, zshim_cyc_per_mm
from ..errors import GeometryError, InputError, MetadataError
from ..geometry import overlap_fraction, parse_pe_code, pe_world_direction, resample_to_grid, same_grid
from ..outdir import check_name_prefix
from ..io import Provenance, load_image, output_paths_guard, save_image, sidecar_path, write_json

__all__ = ["run_dropout", "load_mask_on_grid", "CAUTION", "MAX_TE_S"]

#: Longest echo time accepted (s); longer values are almost always a unit mistake.
MAX_TE_S = 0.5

CAUTION = ("Research software, not a medical device: predicted dropout maps are a planning aid and must be "
           "checked against acquired images before any decision about a person.")


def load_mask_on_grid(path, shape, affine, *, what: str = "mask") -> np.ndarray:
    """Read a mask image and bring it onto a grid (nearest neighbour through the affines)."""
    image = load_image(path, ndim=(3,))
    data = image.get_fdata(np.float32)
    if not np.isfinite(data).all():
        raise InputError(f"the {what} contains non-finite values", path)
    if not (data > 0.5).any():
        raise InputError(f"the {what} is empty (no voxel above 0.5)", path)
    if same_grid(image.shape, image.affine, shape, affine):
        return data > 0.5
    values, inside = resample_to_grid(data, image.affine, shape, affine, order=0, outside=0.0)
    if not inside.any():
        raise GeometryError(f"the {what} does not overlap the B0 map", path)
    mask = (values > 0.5) & inside
    if not mask.any():
        raise InputError(f"the {what} is empty on the B0 grid", path)
    return mask


def _stats(values: np.ndarray, mask: np.ndarray, threshold: float) -> dict:
    v = values[mask]
    if v.size == 0:
        return {"median": None, "pct_below": None, "voxels": 0}
    return {"median": float(np.median(v)), "pct_below": float(100.0 * np.count_nonzero(v < threshold) / v.size),
            "voxels": int(v.size)}


_DESCRIPTIONS = {"retention": "through-plane signal retention at the nominal TE",
                 "bold_sensitivity": "BOLD sensitivity: retention at the local echo time x TE'/TE"}


def run_dropout(
    b0_path,
    out_dir,
    *,
    te_s: float,
    thickness_mm: float,
    like_path=None,
    slice_axis: int | None = None,
    tilt_deg: float = 0.0,
    pe_code: str | None = None,
    echo_spacing_s: float | None = None,
    profile: str = "rect",
    tbw: float = 4.0,
    zshim_mtms_per_m: float = 0.0,
    partial_fourier: float = 1.0,
    mask_path=None,
    threshold: float = 0.5,
    prefix: str = "",
    overwrite: bool = False,
    progress: bool = False,
    command: str | None = None,
) -> dict:
    """Predict retention (and BOLD sensitivity) maps for one protocol and write them.

    Parameters
    ----------
    b0_path : path
        B0 map in Hz (3D NIfTI).
    out_dir : path
    te_s, thickness_mm : float
        Echo time (s) and nominal slice thickness (mm).
    like_path : path, optional
        EPI image giving the slice geometry (and sidecar timing).
    slice_axis : int, optional
        Voxel axis across slices (of the EPI image, or of the B0 grid without one).
        Default: the sidecar's ``SliceEncodingDirection`` or axis 2.
    tilt_deg : float
        Extra tilt about the world left-right axis (positive: anterior edge up).
    pe_code : str, optional
        BIDS phase-encode code on the EPI grid (or the B0 grid); default: the sidecar.
    echo_spacing_s : float, optional
        Effective echo spacing (s); default: the sidecar's ``EffectiveEchoSpacing``.
    profile : {'rect', 'gaussian', 'rf'}
    tbw : float
        Time-bandwidth product of the windowed-sinc pulse for ``profile='rf'``.
    zshim_mtms_per_m : float
        Z-shim moment along the slice normal (mT*ms/m).
    partial_fourier : float
        Fraction of k-space acquired along the phase-encode axis.
    mask_path : path, optional
        Brain mask: statistics inside it, maps set to 0 outside.
    threshold : float
        Level under which a voxel counts as lost in the statistics.
    prefix : str
        Prepended to every output file name.
    overwrite, progress, command
        See the workflow conventions.

    Returns
    -------
    dict
        JSON-serialisable summary (also written as ``<prefix>dropout.json``).
    """
    b0_path = Path(b0_path)
    out_dir = Path(out_dir)
    if not te_s > 0:
        raise InputError(f"the echo time must be positive, got {te_s}")
    if te_s > MAX_TE_S:
        raise InputError(f"echo time {te_s:g} s is implausible for a gradient-echo protocol (at most "
                         f"{MAX_TE_S:g} s); check the unit")
    if not thickness_mm > 0:
        raise InputError(f"the slice thickness must be positive, got {thickness_mm}")
    if profile not in PROFILES:
        raise InputError(f"unknown slice profile {profile!r}; use one of {', '.join(PROFILES)}")
    inputs = [p for p in (b0_path, like_path, mask_path) if p is not None]
    check_name_prefix(prefix)
    names = {"retention": out_dir / f"{prefix}retention.nii.gz",
             "bold_sensitivity": out_dir / f"{prefix}bold_sensitivity.nii.gz",
             "summary": out_dir / f"{prefix}dropout.json",
             "retention_on_epi": out_dir / f"{prefix}retention_on_epi.nii.gz",
             "bold_sensitivity_on_epi": out_dir / f"{prefix}bold_sensitivity_on_epi.nii.gz"}

    b0_img = load_image(b0_path, ndim=(3,))
    b0 = b0_img.get_fdata(np.float64)
    like = load_image(like_path, ndim=(3, 4)) if like_path is not None else None
    sidecar = like.sidecar if like is not None else {}
    geometry_src = like if like is not None else b0_img
    if like is not None and overlap_fraction(like.shape[:3], like.affine, b0.shape, b0_img.affine) == 0.0:
        raise GeometryError("the EPI image does not overlap the B0 map; check that both are in the same "
                            "scanner space", like_path)

    if slice_axis is None:
        code = sidecar.get("SliceEncodingDirection")
        slice_axis = parse_pe_code(code)[0] if isinstance(code, str) and code.strip() else 2
    if pe_code is None and like is not None and isinstance(sidecar.get("PhaseEncodingDirection"), str):
        pe_code = sidecar["PhaseEncodingDirection"]
    if echo_spacing_s is None and like is not None and sidecar.get("EffectiveEchoSpacing") is not None:
        try:
            echo_spacing_s = float(sidecar["EffectiveEchoSpacing"])
        except (TypeError, ValueError):
            raise MetadataError("EffectiveEchoSpacing in the sidecar is not a number", like_path) from None
    pe_axis = pe_sign = None
    if pe_code is not None:
        pe_axis, pe_sign = parse_pe_code(pe_code)
        if pe_axis == slice_axis:
            raise GeometryError(f"phase encoding {pe_code!r} runs along the slice axis {'ijk'[slice_axis]}")
        if echo_spacing_s is None:
            raise MetadataError("BOLD sensitivity needs the effective echo spacing (--echo-spacing, or "
                                "EffectiveEchoSpacing in the EPI sidecar)")
        if not 1e-6 < echo_spacing_s < 0.01:
            raise MetadataError(f"effective echo spacing {echo_spacing_s * 1e3:g} ms is implausible "
                                "(expected 0.001-10 ms); check the unit")
    frame = frame_from_affine(geometry_src.affine, slice_axis, pe_axis, tilt_deg=tilt_deg,
                              shape=geometry_src.shape[:3])
    if pe_code is not None:
        start, _ = acquisition_window_s(te_s, echo_spacing_s, frame.pe_lines, partial_fourier)
        if start < 0:
            raise MetadataError(f"echo time {te_s * 1e3:g} ms is shorter than the time to reach the k-space centre "
                                f"({(te_s - start) * 1e3:g} ms) with {frame.pe_lines} lines and this echo spacing")

    on_epi = like is not None and not same_grid(like.shape[:3], like.affine, b0.shape, b0_img.affine)
    kinds = ["retention"] + (["bold_sensitivity"] if pe_code is not None else [])
    kinds += [f"{k}_on_epi" for k in kinds] if on_epi else []
    wanted = [names["summary"]] + [names[k] for k in kinds] + [sidecar_path(names[k]) for k in kinds]
    output_paths_guard(wanted, inputs, overwrite)

    if mask_path is not None:
        mask = load_mask_on_grid(mask_path, b0.shape, b0_img.affine, what="brain mask")
    else:
        mask = np.isfinite(b0) & (b0 != 0)
    if not np.isfinite(b0[mask]).all():
        raise InputError("the B0 map has non-finite values inside the mask", b0_path)
    b0 = np.where(np.isfinite(b0), b0, 0.0)

    prof = slice_profile(profile, tbw=tbw)
    maps = dropout_maps(b0, b0_img.affine, frame, te_s=te_s, thickness_mm=thickness_mm, profile=prof,
                        zshim_cyc_per_mm=zshim_cyc_per_mm(zshim_mtms_per_m), pe_sign=pe_sign,
                        echo_spacing_s=echo_spacing_s if pe_code is not None else None,
                        partial_fourier=partial_fourier)
    parameters = {
        "te_s": te_s, "thickness_mm": thickness_mm, "tilt_deg": tilt_deg, "slice_axis": "ijk"[slice_axis],
        "pe_code": pe_code, "echo_spacing_s": echo_spacing_s, "partial_fourier": partial_fourier,
        "zshim_mtms_per_m": zshim_mtms_per_m, "threshold": threshold, **prof.as_dict(),
    }
    provenance = Provenance(command, parameters, inputs)
    retention = np.where(mask, maps["retention"], 0.0)
    save_image(names["retention"], retention, b0_img.affine, template=b0_img, inputs=inputs, overwrite=overwrite,
               provenance=provenance, sidecar_extra={"Description": _DESCRIPTIONS["retention"]})
    outputs = {"retention": str(names["retention"])}
    written = {"retention": retention}  # masked maps on the B0 grid, for the EPI-grid copies
    summary = {
        "b0": str(b0_path),
        "geometry_from": str(like_path) if like_path is not None else "B0 grid",
        "frame": frame.as_dict(),
        "parameters": parameters,
        "mask": str(mask_path) if mask_path is not None else "non-zero B0 voxels",
        "retention": _stats(maps["retention"], mask, threshold),
    }
    if pe_code is not None:
        bs = np.where(mask, maps["bold_sensitivity"], 0.0)
        save_image(names["bold_sensitivity"], bs, b0_img.affine, template=b0_img, inputs=inputs,
                   overwrite=overwrite, provenance=provenance,
                   sidecar_extra={"Description": _DESCRIPTIONS["bold_sensitivity"]})
        outputs["bold_sensitivity"] = str(names["bold_sensitivity"])
        written["bold_sensitivity"] = bs
        summary["pe_direction_world"] = pe_world_direction(pe_code, geometry_src.affine)
        summary["bold_sensitivity"] = _stats(maps["bold_sensitivity"], mask, threshold)
        summary["percent_echo_lost"] = float(100.0 * np.count_nonzero(~maps["echo_inside"][mask]) / max(mask.sum(), 1))
    if on_epi:  # the same maps on the EPI grid, for overlays
        for kind, values in written.items():
            resampled, _ = resample_to_grid(values, b0_img.affine, like.shape[:3], like.affine, order=1, outside=0.0)
            note = f"{_DESCRIPTIONS[kind]}, resampled (linear) onto the grid of {like.path.name}"
            save_image(names[f"{kind}_on_epi"], resampled, like.affine, template=like, inputs=inputs,
                       overwrite=overwrite, provenance=provenance, sidecar_extra={"Description": note})
            outputs[f"{kind}_on_epi"] = str(names[f"{kind}_on_epi"])
    outputs["summary"] = str(names["summary"])
    summary["outputs"] = outputs
    summary["caution"] = CAUTION
    write_json(names["summary"], summary, inputs=inputs, overwrite=overwrite)
    return summary
