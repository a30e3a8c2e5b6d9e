"""File-level field-map job: gradient-echo images -> B0 map in Hz.

Takes exactly one kind of input:

* ``phase`` + ``magnitude``: two or more phase images (radians, degrees or scanner integer
  counts; detected per image, or given with ``phase_units``) and their magnitudes (one per
  echo, or a single one used for every echo);
* ``real`` + ``imag``: two or more pairs of real and imaginary images;
* ``phase_diff`` (+ ``magnitude``, one or two): a phase-difference image and two echo times;
* ``b0``: a ready field map with ``b0_units`` (``hz``, ``rad/s``, ``ppm`` or ``T``).

Echo times come from the BIDS sidecars (``EchoTime`` per echo, or ``EchoTime1`` /
``EchoTime2`` beside a phase difference) or from ``echo_times_s``; when both exist and
disagree a :class:`~fieldfix.errors.MetadataError` is raised unless ``echo_times_win`` says
which wins (``"arguments"`` or ``"sidecar"``).

Outputs in ``out_dir`` (``<p>`` = ``prefix``): ``<p>b0_hz.nii.gz`` (field in Hz on the
field-map grid, extended beyond the mask), ``<p>b0_mask.nii.gz``,
``<p>b0_magnitude.nii.gz`` (reference magnitude), ``<p>b0_summary.json``, optionally
``<p>b0_rads.nii.gz`` / ``<p>b0_ppm.nii.gz``, and a provenance JSON beside each image.

Research software, not a medical device: inspect the B0 map, and any image corrected with
it, before it is used for any decision about a person.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Sequence

import numpy as np

from .._progress import progress_bar
from ..errors import FieldfixError, GeometryError, InputError, MetadataError
from ..fieldmap import (
    b0_from_echoes,
    b0_from_map,
    b0_from_phase_difference,
    hz_to_units,
)
from ..geometry import voxel_sizes_mm
from ..outdir import check_name_prefix
from ..io import Image, Provenance, load_image, output_paths_guard, save_image, sidecar_path, write_json
from ..phase import (
    complex_from_polar,
    complex_from_real_imag,
    detect_phase_units,
    phase_to_radians,
    phase_units as lookup_phase_units,
)
from ..unwrap import METHODS

__all__ = ["run_fieldmap", "output_names", "CAUTION"]

CAUTION = ("Research software, not a medical device: inspect the B0 map, and any image corrected with it, "
           "before it is used for any decision about a person.")

_OUTPUTS = {
    "b0_hz": "b0_hz.nii.gz",
    "mask": "b0_mask.nii.gz",
    "magnitude": "b0_magnitude.nii.gz",
    "summary": "b0_summary.json",
}
_EXTRA = {"rad/s": ("b0_rads", "b0_rads.nii.gz"), "ppm": ("b0_ppm", "b0_ppm.nii.gz")}
PERCENTILES = (1, 5, 25, 50, 75, 95, 99)


def output_names(out_dir, prefix: str = "", also_units: Sequence[str] = ()) -> dict[str, Path]:
    """Output paths of the job.

    Example
    -------
    >>> output_names("/out", "sub-01_")["b0_hz"].name
    'sub-01_b0_hz.nii.gz'
    """
    check_name_prefix(prefix)
    names = {key: Path(out_dir) / (prefix + name) for key, name in _OUTPUTS.items()}
    for unit in also_units:
        key, name = _EXTRA[_extra_unit(unit)]
        names[key] = Path(out_dir) / (prefix + name)
    return names


def _extra_unit(unit: str) -> str:
    u = str(unit).strip().lower()
    if u in ("rad/s", "rads"):
        return "rad/s"
    if u == "ppm":
        return "ppm"
    raise InputError(f"extra output unit {unit!r} is not offered; use rad/s or ppm")


def _as_list(value) -> list:
    if value is None:
        return []
    if isinstance(value, (str, os.PathLike)):
        return [value]
    return list(value)


def _check_grid(images: list[Image], reference: Image) -> None:
    for img in images:
        if img.shape != reference.shape:
            raise GeometryError(f"image shape {img.shape} differs from {reference.path.name}'s {reference.shape}; "
                                "all field-map images must share one grid", img.path)
        if not np.allclose(img.affine, reference.affine, atol=1e-3, rtol=0):
            raise GeometryError(f"image affine differs from {reference.path.name}'s; all field-map images must "
                                "share one grid", img.path)


def _sidecar_time(img: Image, key: str) -> float | None:
    if key not in img.sidecar:
        return None
    value = img.sidecar[key]
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
        raise MetadataError(f"{key} in the sidecar is not a positive number of seconds ({value!r})",
                            sidecar_path(img.path))
    if value > 1.0:
        raise MetadataError(f"{key} = {value} in the sidecar is over one second; BIDS echo times are in seconds "
                            "(was it written in milliseconds?)", sidecar_path(img.path))
    return float(value)


#: Longest echo time accepted for a gradient-echo field map; a larger value is almost surely
#: seconds written as milliseconds (field-map echo times are milliseconds to tens of
#: milliseconds: common practice, no source).
MAX_ECHO_TIME_S = 0.5


def _resolve_echo_times(argument, sidecar_times, sources, n_needed, win):
    """Pick echo times from the argument or the sidecars; returns (times, source).

    Errors about sidecar values name the first source's sidecar; errors about the
    argument name the option.
    """
    where = sidecar_path(sources[0]) if sources else None
    win = {"cli": "arguments", "argument": "arguments", "arguments": "arguments", "sidecar": "sidecar",
           None: None}.get(win, "invalid")
    if win == "invalid":
        raise InputError("echo_times_win must be 'arguments' or 'sidecar'")
    side = None
    if sidecar_times and all(t is not None for t in sidecar_times):
        side = [float(t) for t in sidecar_times]
    elif sidecar_times and any(t is not None for t in sidecar_times):
        missing = [str(p) for p, t in zip(sources, sidecar_times) if t is None]
        if argument is None:
            raise MetadataError("echo time missing from the sidecar of " + ", ".join(missing)
                                + "; give the echo times explicitly", where)
    arg = None if argument is None else [float(t) for t in argument]
    if arg is not None:
        if len(arg) != n_needed:
            raise InputError(f"--echo-times: {len(arg)} echo times given but {n_needed} are needed")
        if any(not (t > 0) for t in arg):
            raise InputError("--echo-times: echo times must be positive")
        if any(t > MAX_ECHO_TIME_S for t in arg):
            raise InputError(f"--echo-times: {max(arg) * 1e3:g}ms is longer than a field-map echo time can be "
                             f"({MAX_ECHO_TIME_S * 1e3:g}ms at most); was a value in seconds written as ms?")
    if arg is None and side is None:
        raise MetadataError("no echo times: give them (for example --echo-times 4.92ms 7.38ms) or provide a BIDS "
                            "sidecar with EchoTime / EchoTime1 and EchoTime2",
                            sources[0] if sources else None)
    if arg is None:
        return side, "sidecar"
    if side is None:
        return arg, "arguments"
    if np.allclose(arg, side, rtol=1e-4, atol=1e-7):
        return arg, "arguments+sidecar"
    if win == "arguments":
        return arg, "arguments (sidecar overruled)"
    if win == "sidecar":
        return side, "sidecar (arguments overruled)"
    shown = ", ".join(f"{t * 1e3:g}ms" for t in side)
    given = ", ".join(f"{t * 1e3:g}ms" for t in arg)
    raise MetadataError(f"echo times {given} from the command line contradict the sidecar ({shown}); say which "
                        "one wins (--echo-times-win arguments|sidecar)", where)


def _read_phase(img: Image, units, report: list) -> np.ndarray:
    values = img.get_fdata(np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("phase image contains NaN or infinite values", img.path)
    if units is None:
        try:
            unit = detect_phase_units(values)
        except FieldfixError as err:
            raise type(err)(err.message, img.path) from None
        source = unit.reason
    else:
        unit = lookup_phase_units(units)
        source = "given"
    report.append({"path": str(img.path), "units": unit.name, "how": source})
    return phase_to_radians(values, unit)


def _read_magnitude(img: Image) -> np.ndarray:
    values = img.get_fdata(np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("magnitude image contains NaN or infinite values", img.path)
    return np.abs(values)


def run_fieldmap(
    out_dir,
    *,
    phase=(),
    magnitude=(),
    real=(),
    imag=(),
    phase_diff=None,
    b0=None,
    b0_units=None,
    echo_times_s=None,
    echo_times_win=None,
    phase_units=None,
    mask=None,
    smooth_mm: float = 4.0,
    unwrap_method: str = "quality",
    field_strength_t: float | None = None,
    also_units: Sequence[str] = (),
    reject_outliers: bool = True,
    prefix: str = "",
    overwrite: bool = False,
    progress: bool = False,
    command: str | None = None,
) -> dict:
    """Make a B0 map in Hz from field-map images and write it with its mask, magnitude and summary.

    Parameters
    ----------
    out_dir : path
        Output folder (created if missing).
    phase, magnitude, real, imag : sequences of paths
        Echo images (see the module docstring for the accepted combinations).
    phase_diff : path, optional
        Phase-difference image.
    b0 : path, optional
        Ready field map; ``b0_units`` is ``"hz"``, ``"rad/s"``, ``"ppm"`` (needs
        ``field_strength_t``) or ``"T"``.
    echo_times_s : sequence of float, optional
        Echo times in seconds (one per echo; two for a phase difference).
    echo_times_win : {"arguments", "sidecar"}, optional
        Which source wins when the argument and the sidecars disagree.
    phase_units : str, optional
        ``rad``, ``deg``, ``counts4096`` or ``counts8192``; default: detected per image.
    mask : path, optional
        Mask on the field-map grid (non-zero = inside); default: from the magnitude.
    smooth_mm : float
        FWHM in mm of the masked normalised smoothing (0: none).
    unwrap_method : {"quality", "laplacian"}
    field_strength_t : float, optional
        Needed for ppm input or output; reported in the summary.
    also_units : sequence of {"rad/s", "ppm"}
        Extra copies of the map in these units.
    reject_outliers : bool
    prefix : str
        Prepended to every output file name.
    overwrite, progress, command
        See :mod:`fieldfix.workflows`.

    Returns
    -------
    dict
        The summary (also written to ``<prefix>b0_summary.json``).
    """
    phase, magnitude, real, imag = (_as_list(x) for x in (phase, magnitude, real, imag))
    kinds = [k for k, present in (("phase", bool(phase)), ("real-imag", bool(real or imag)),
                                  ("phase-difference", phase_diff is not None), ("ready map", b0 is not None))
             if present]
    if len(kinds) != 1:
        raise InputError("give exactly one kind of field-map input: phase images, real+imaginary images, a phase "
                         "difference, or a ready B0 map" + (f" (got {', '.join(kinds)})" if kinds else ""))
    kind = kinds[0]
    if unwrap_method not in METHODS:
        raise InputError(f"unknown unwrap method {unwrap_method!r}; choose {' or '.join(METHODS)}")
    if smooth_mm is None or smooth_mm < 0 or not math.isfinite(smooth_mm):
        raise InputError(f"smoothing width must be zero or positive, got {smooth_mm}")
    also_units = [_extra_unit(u) for u in also_units]
    if "ppm" in also_units and not field_strength_t:
        raise InputError("ppm output needs the field strength (for example 3T)")
    if field_strength_t is not None and not (field_strength_t > 0):
        raise InputError(f"field strength must be positive, got {field_strength_t}")
    if phase_units is not None:
        lookup_phase_units(phase_units)

    input_paths = [Path(p) for p in [*phase, *magnitude, *real, *imag, phase_diff, b0, mask] if p is not None]
    outputs = output_names(out_dir, prefix, also_units)
    image_outputs = [p for k, p in outputs.items() if k != "summary"]
    output_paths_guard([*outputs.values(), *(sidecar_path(p) for p in image_outputs)], input_paths, overwrite)

    steps = progress_bar(total=4, desc="fieldmap", enabled=progress, unit="step")
    phase_report: list = []
    parameters = {"input_kind": kind, "smooth_fwhm_mm": float(smooth_mm), "unwrap_method": unwrap_method,
                  "phase_units": phase_units, "field_strength_t": field_strength_t,
                  "reject_outliers": reject_outliers}
    try:
        # ---- read ---------------------------------------------------------------------------
        mag_imgs = [load_image(p, ndim=(3,)) for p in magnitude]
        echo_times_source = None
        tes = None
        if kind == "phase":
            if len(phase) < 2:
                raise InputError("phase input needs at least two echoes (or use a phase difference)")
            ph_imgs = [load_image(p, ndim=(3,)) for p in phase]
            if len(mag_imgs) not in (0, 1, len(ph_imgs)):
                raise InputError(f"{len(mag_imgs)} magnitude images for {len(ph_imgs)} phase images; give one per "
                                 "echo or a single one")
            if not mag_imgs and mask is None:
                raise InputError("phase images need magnitude images (or at least a mask)")
            reference = ph_imgs[0]
            _check_grid(ph_imgs + mag_imgs, reference)
            tes, echo_times_source = _resolve_echo_times(
                echo_times_s, [_sidecar_time(i, "EchoTime") for i in ph_imgs], phase, len(ph_imgs), echo_times_win)
            phases = [_read_phase(i, phase_units, phase_report) for i in ph_imgs]
            mags = [_read_magnitude(i) for i in mag_imgs] or [np.ones(reference.shape)]
            if len(mags) == 1:
                mags = mags * len(phases)
            echoes = [complex_from_polar(m, p) for m, p in zip(mags, phases)]
        elif kind == "real-imag":
            if len(real) != len(imag) or len(real) < 2:
                raise InputError(f"real/imaginary input needs the same number (at least two) of each; got "
                                 f"{len(real)} real and {len(imag)} imaginary")
            re_imgs = [load_image(p, ndim=(3,)) for p in real]
            im_imgs = [load_image(p, ndim=(3,)) for p in imag]
            reference = re_imgs[0]
            _check_grid(re_imgs + im_imgs + mag_imgs, reference)
            tes, echo_times_source = _resolve_echo_times(
                echo_times_s, [_sidecar_time(i, "EchoTime") for i in re_imgs], real, len(re_imgs), echo_times_win)
            echoes = [complex_from_real_imag(r.get_fdata(np.float64), i.get_fdata(np.float64))
                      for r, i in zip(re_imgs, im_imgs)]
            if not all(np.all(np.isfinite(z)) for z in echoes):
                raise InputError("real/imaginary images contain NaN or infinite values", real[0])
        elif kind == "phase-difference":
            pd_img = load_image(phase_diff, ndim=(3,))
            reference = pd_img
            _check_grid(mag_imgs, reference)
            if not mag_imgs and mask is None:
                raise InputError("a phase difference needs a magnitude image (or at least a mask)", phase_diff)
            side = [_sidecar_time(pd_img, "EchoTime1"), _sidecar_time(pd_img, "EchoTime2")]
            if side == [None, None] and len(mag_imgs) == 2:  # fall back to the magnitudes' EchoTime
                side = [_sidecar_time(mag_imgs[0], "EchoTime"), _sidecar_time(mag_imgs[1], "EchoTime")]
            tes, echo_times_source = _resolve_echo_times(echo_times_s, side, [phase_diff, phase_diff], 2,
                                                         echo_times_win)
            dphi = _read_phase(pd_img, phase_units, phase_report)
        else:
            b0_img = load_image(b0, ndim=(3,))
            reference = b0_img
            _check_grid(mag_imgs, reference)
            units = b0_units or b0_img.sidecar.get("Units")
            if units is None:
                raise InputError("give the units of the ready B0 map (Hz, rad/s, ppm or T); the sidecar has no "
                                 "Units", b0)
            parameters["b0_units"] = units
            b0_values = b0_img.get_fdata(np.float64)
        if tes is not None:
            if len(set(tes)) != len(tes):
                source = reference.path if echo_times_source.startswith("arguments") else sidecar_path(reference.path)
                raise MetadataError("echo times must differ from each other "
                                    f"({', '.join(f'{t * 1e3:g}ms' for t in tes)})", source)
        mask_values = None
        if mask is not None:
            mask_img = load_image(mask, ndim=(3,))
            _check_grid([mask_img], reference)
            mask_values = mask_img.get_fdata(np.float64) > 0.5
            if not mask_values.any():
                raise InputError("mask is empty", mask)
        steps.update(1)

        # ---- compute ------------------------------------------------------------------------
        voxel_mm = tuple(float(v) for v in voxel_sizes_mm(reference.affine))
        common = dict(mask=mask_values, voxel_size_mm=voxel_mm, smooth_fwhm_mm=float(smooth_mm))
        # Errors found in the data (for example a constant magnitude, from which no mask can be
        # derived) name the magnitude image, or the main input when there is none.
        try:
            if kind in ("phase", "real-imag"):
                result = b0_from_echoes(echoes, tes, unwrap_method=unwrap_method, reject_outliers=reject_outliers,
                                        **common)
            elif kind == "phase-difference":
                first = min(range(2), key=lambda i: tes[i])
                mag = _read_magnitude(mag_imgs[first if len(mag_imgs) == 2 else 0]) if mag_imgs else None
                t1, t2 = tes
                if t2 < t1:
                    raise MetadataError(f"EchoTime2 ({t2 * 1e3:g} ms) is shorter than EchoTime1 ({t1 * 1e3:g} ms); the "
                                        "phase difference is taken as echo 2 minus echo 1", phase_diff)
                result = b0_from_phase_difference(dphi, t2 - t1, magnitude=mag, unwrap_method=unwrap_method,
                                                  reject_outliers=reject_outliers, **common)
            else:
                mag = _read_magnitude(mag_imgs[0]) if mag_imgs else None
                if not np.any(np.isfinite(b0_values)):
                    raise InputError("the B0 map has no finite values", b0)
                result = b0_from_map(b0_values, units, magnitude=mag, field_strength_t=field_strength_t,
                                     reject_outliers=reject_outliers, **common)
        except FieldfixError as err:
            if err.path is not None:
                raise
            raise type(err)(err.message, mag_imgs[0].path if mag_imgs else reference.path) from None
        if not result.mask.any():
            raise InputError("the mask is empty: no voxel is bright enough in the magnitude image; give a mask",
                             mag_imgs[0].path if mag_imgs else reference.path)
        steps.update(1)

        # ---- write --------------------------------------------------------------------------
        provenance = Provenance(command, parameters, input_paths)
        inputs = input_paths
        save_image(outputs["b0_hz"], result.b0_hz, reference.affine, template=reference, inputs=inputs,
                   overwrite=overwrite, provenance=provenance,
                   sidecar_extra={"Units": "Hz", "Description": "B0 field map in Hz, extended beyond the mask"})
        save_image(outputs["mask"], result.mask, reference.affine, template=reference, dtype=np.uint8,
                   inputs=inputs, overwrite=overwrite, provenance=provenance,
                   sidecar_extra={"Description": "voxels where the field was measured"})
        save_image(outputs["magnitude"], result.magnitude, reference.affine, template=reference, inputs=inputs,
                   overwrite=overwrite, provenance=provenance,
                   sidecar_extra={"Description": "reference magnitude (shortest echo)"})
        for unit in also_units:
            key = _EXTRA[unit][0]
            save_image(outputs[key], hz_to_units(result.b0_hz, unit, field_strength_t=field_strength_t),
                       reference.affine, template=reference, inputs=inputs, overwrite=overwrite,
                       provenance=provenance, sidecar_extra={"Units": unit})
        steps.update(1)

        # ---- summary ------------------------------------------------------------------------
        inside = result.b0_hz[result.mask]
        voxel_ml = float(np.prod(voxel_mm)) / 1000.0
        summary = {
            "input_kind": kind,
            "method": result.method,
            "echo_times_s": list(tes) if tes is not None else None,
            "echo_times_source": echo_times_source,
            "delta_te_s": (max(tes) - min(tes)) if tes is not None and len(tes) == 2 else None,
            "unaliased_range_hz": result.unaliased_range_hz,
            "phase_units": phase_report,
            "mask_source": "given" if mask is not None else "magnitude (Otsu rule, see fieldfix.phase)",
            "mask_voxels": int(result.mask.sum()),
            "mask_volume_ml": float(result.mask.sum()) * voxel_ml,
            "mask_fraction_of_grid": float(result.mask.mean()),
            "field_percentiles_hz": {f"p{q}": float(v) for q, v in zip(PERCENTILES, np.percentile(inside, PERCENTILES))},
            "field_mean_hz": float(inside.mean()),
            "voxels_offset_changed": int(result.n_offset_changed),
            "mask_regions": int(result.n_regions),
            "outlier_voxels": int(result.outliers.sum()),
            "smooth_fwhm_mm": float(smooth_mm),
            "unwrap_method": unwrap_method if kind != "ready map" else None,
            "voxel_size_mm": list(voxel_mm),
            "field_strength_t": field_strength_t,
            "outputs": {k: str(p) for k, p in outputs.items()},
            "caution": CAUTION,
        }
        if field_strength_t:
            summary["field_percentiles_ppm"] = {
                k: float(hz_to_units(v, "ppm", field_strength_t=field_strength_t))
                for k, v in summary["field_percentiles_hz"].items()}
        if tes is not None and result.unaliased_range_hz is not None:
            beyond = np.abs(inside) > result.unaliased_range_hz
            summary["percent_mask_beyond_unaliased_range"] = float(100.0 * beyond.mean())
        write_json(outputs["summary"], summary, inputs=inputs, overwrite=overwrite)
        steps.update(1)
    finally:
        steps.close()
    return summary
