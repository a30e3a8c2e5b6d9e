"""Reading and checking the inputs of the field-map job, one reader per input kind.

Each reader takes the job's :class:`~fieldfix.workflows.fieldmap.FieldMapSettings` and
returns a :class:`FieldMapData`: the reference image (whose grid the map is written on),
what the computation needs (complex echoes, a phase difference, or a ready map) and what
the summary reports about the inputs (echo times and their source, phase units).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import FieldfixError, GeometryError, InputError, MetadataError
from ..geometry import parse_pe_code
from ..io import Image, load_image, sidecar_path
from ..outputs import PhaseUnitsRecord
from ..units import PLAUSIBLE, check_plausible
from ..phase import (
    check_given_phase_units,
    complex_from_polar,
    complex_from_real_imag,
    detect_phase_units,
    phase_to_radians,
    phase_units as lookup_phase_units,
)

__all__ = ["FieldMapData", "READERS", "as_list", "check_grid", "read_mask", "read_magnitude", "MAX_ECHO_TIME_S"]

_PHASE_UNIT_WORDS = {"rad", "radian", "radians", "deg", "degree", "degrees"}

#: Longest echo time accepted for a gradient-echo field map (see fieldfix.units.PLAUSIBLE).
MAX_ECHO_TIME_S = PLAUSIBLE["echo_times_s"].high


@dataclass
class FieldMapData:
    """What one input kind provides to the computation."""

    reference: Image
    magnitudes: list[Image]
    echo_times_s: list[float] | None = None
    echo_times_source: str | None = None
    echoes: list[np.ndarray] | None = None
    phase_diff_rad: np.ndarray | None = None
    b0_values: np.ndarray | None = None
    b0_units: str | None = None
    phase_units: list[PhaseUnitsRecord] = field(default_factory=list)
    epi_volumes: list[np.ndarray] | None = None
    epi_encodings: list | None = None
    epi_sources: list[tuple[Path, int]] = field(default_factory=list)
    pair: object = None  # the fieldfix.pairs.PairFieldResult, once computed


def as_list(value) -> list:
    if value is None:
        return []
    if isinstance(value, (str, os.PathLike)):
        return [value]
    return list(value)


def check_grid(images: list[Image], reference: Image) -> None:
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


def _check_argument_times(arg: list[float], n_needed: int) -> None:
    if len(arg) != n_needed:
        raise InputError(f"echo_times_s: {len(arg)} echo times given but {n_needed} are needed")
    for t in arg:
        check_plausible("echo_times_s", t)


def resolve_echo_times(argument, sidecar_times, sources, n_needed, win):
    """Pick echo times from the argument or the sidecars; returns (times, source).

    Errors about sidecar values name the first source's sidecar; errors about the
    argument name the parameter.
    """
    where = sidecar_path(sources[0]) if sources else None
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
        _check_argument_times(arg, n_needed)
    if arg is None and side is None:
        raise MetadataError("no echo times: give them (echo_times_s, for example 4.92ms and 7.38ms) or provide a "
                            "BIDS sidecar with EchoTime / EchoTime1 and EchoTime2", sources[0] if sources else None)
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
    raise MetadataError(f"echo times {given} given contradict the sidecar ({shown}); say which one wins "
                        "(echo_times_win: arguments or sidecar)", where)


def read_phase(img: Image, units, report: list, delta_te_s: float | None = None) -> np.ndarray:
    """Phase in radians; units given, named by the sidecar, or detected (physically, for a difference).

    With `delta_te_s` (a phase difference) a given or sidecar unit is checked against the field it
    implies (:func:`fieldfix.phase.check_given_phase_units`).
    """
    values = img.get_fdata(np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("phase image contains NaN or infinite values", img.path)
    side = img.sidecar.get("Units")
    side = side if isinstance(side, str) and side.strip().lower() in _PHASE_UNIT_WORDS else None
    try:
        if units is None and side is None:
            unit = detect_phase_units(values, delta_te_s=delta_te_s)
            source = unit.reason
        else:
            unit = lookup_phase_units(units if units is not None else side)
            source = "given" if units is not None else "the sidecar's Units"
            if delta_te_s:
                check_given_phase_units(values, unit, delta_te_s)
    except FieldfixError as err:
        raise type(err)(err.message, img.path) from None
    report.append(PhaseUnitsRecord(path=str(img.path), units=unit.name, how=source))
    return phase_to_radians(values, unit)


def read_magnitude(img: Image) -> np.ndarray:
    values = img.get_fdata(np.float64)
    if not np.all(np.isfinite(values)):
        raise InputError("magnitude image contains NaN or infinite values", img.path)
    return np.abs(values)


def _read_phase_echoes(s) -> FieldMapData:
    if len(s.phase) < 2:
        raise InputError("phase input needs at least two echoes (or use a phase difference)")
    ph_imgs = [load_image(p, ndim=(3,)) for p in s.phase]
    mag_imgs = [load_image(p, ndim=(3,)) for p in s.magnitude]
    if len(mag_imgs) not in (0, 1, len(ph_imgs)):
        raise InputError(f"{len(mag_imgs)} magnitude images for {len(ph_imgs)} phase images; give one per echo or a "
                         "single one")
    if not mag_imgs and s.mask is None:
        raise InputError("phase images need magnitude images (or at least a mask)")
    reference = ph_imgs[0]
    check_grid(ph_imgs + mag_imgs, reference)
    tes, source = resolve_echo_times(s.echo_times_s, [_sidecar_time(i, "EchoTime") for i in ph_imgs], s.phase,
                                     len(ph_imgs), s.echo_times_win)
    report: list = []
    phases = [read_phase(i, s.phase_units, report) for i in ph_imgs]
    mags = [read_magnitude(i) for i in mag_imgs] or [np.ones(reference.shape)]
    if len(mags) == 1:
        mags = mags * len(phases)
    echoes = [_complex64(complex_from_polar(m, p)) for m, p in zip(mags, phases)]
    return FieldMapData(reference, mag_imgs, tes, source, echoes=echoes, phase_units=report)


def _complex64(z: np.ndarray) -> np.ndarray:
    """Echoes are kept as complex64: half the memory, and a phase error of about 1e-7 rad."""
    return np.asarray(z).astype(np.complex64, copy=False)


def _read_real_imag(s) -> FieldMapData:
    if len(s.real) != len(s.imag) or len(s.real) < 2:
        raise InputError(f"real/imaginary input needs the same number (at least two) of each; got {len(s.real)} real "
                         f"and {len(s.imag)} imaginary")
    re_imgs = [load_image(p, ndim=(3,)) for p in s.real]
    im_imgs = [load_image(p, ndim=(3,)) for p in s.imag]
    mag_imgs = [load_image(p, ndim=(3,)) for p in s.magnitude]
    reference = re_imgs[0]
    check_grid(re_imgs + im_imgs + mag_imgs, reference)
    tes, source = resolve_echo_times(s.echo_times_s, [_sidecar_time(i, "EchoTime") for i in re_imgs], s.real,
                                     len(re_imgs), s.echo_times_win)
    echoes = [_complex64(complex_from_real_imag(r.get_fdata(np.float64), i.get_fdata(np.float64)))
              for r, i in zip(re_imgs, im_imgs)]
    if not all(np.all(np.isfinite(z)) for z in echoes):
        raise InputError("real/imaginary images contain NaN or infinite values", s.real[0])
    return FieldMapData(reference, mag_imgs, tes, source, echoes=echoes)


def _read_phase_difference(s) -> FieldMapData:
    pd_img = load_image(s.phase_diff, ndim=(3,))
    mag_imgs = [load_image(p, ndim=(3,)) for p in s.magnitude]
    check_grid(mag_imgs, pd_img)
    if not mag_imgs and s.mask is None:
        raise InputError("a phase difference needs a magnitude image (or at least a mask)", s.phase_diff)
    side = [_sidecar_time(pd_img, "EchoTime1"), _sidecar_time(pd_img, "EchoTime2")]
    if side == [None, None] and len(mag_imgs) == 2:  # fall back to the magnitudes' EchoTime
        side = [_sidecar_time(mag_imgs[0], "EchoTime"), _sidecar_time(mag_imgs[1], "EchoTime")]
    tes, source = resolve_echo_times(s.echo_times_s, side, [s.phase_diff, s.phase_diff], 2, s.echo_times_win)
    report: list = []
    dphi = read_phase(pd_img, s.phase_units, report, delta_te_s=abs(tes[1] - tes[0]) or None)
    t1, t2 = tes
    if t2 < t1:
        raise MetadataError(f"EchoTime2 ({t2 * 1e3:g} ms) is shorter than EchoTime1 ({t1 * 1e3:g} ms); the phase "
                            "difference is taken as echo 2 minus echo 1", s.phase_diff)
    return FieldMapData(pd_img, mag_imgs, tes, source, phase_diff_rad=dphi, phase_units=report)


def _read_ready_map(s) -> FieldMapData:
    b0_img = load_image(s.b0, ndim=(3,))
    mag_imgs = [load_image(p, ndim=(3,)) for p in s.magnitude]
    check_grid(mag_imgs, b0_img)
    units = s.b0_units or b0_img.sidecar.get("Units")
    if units is None:
        raise InputError("give the units of the ready B0 map (Hz, rad/s, ppm or T); the sidecar has no Units", s.b0)
    values = b0_img.get_fdata(np.float64)
    if not np.any(np.isfinite(values)):
        raise InputError("the B0 map has no finite values", s.b0)
    return FieldMapData(b0_img, mag_imgs, b0_values=values, b0_units=str(units))


def _per_image(values, n_images: int, n_volumes: int, name: str) -> list | None:
    """Values given per image, or per volume (then grouped back per image); None when not given."""
    if values is None:
        return None
    values = list(values)
    if len(values) == n_images:
        return [[v] for v in values]
    if len(values) == sum(n_volumes):
        out, start = [], 0
        for n in n_volumes:
            out.append(values[start:start + n])
            start += n
        return out
    raise InputError(f"{len(values)} values for {n_images} images ({sum(n_volumes)} volumes); give one per image "
                     "or one per volume", parameter=name)


def _epi_code(img: Image, given: str | None, win: str | None) -> str:
    side = img.sidecar.get("PhaseEncodingDirection")
    if side is not None and not isinstance(side, str):
        raise MetadataError(f"PhaseEncodingDirection is {side!r}, not one of i j k i- j- k-", sidecar_path(img.path))
    if given is None and side is None:
        raise MetadataError("no phase-encode code: give one per image (epi_pe_codes) or add PhaseEncodingDirection "
                            "to its sidecar", img.path)
    chosen = given if given is not None else side
    if given is not None and side is not None and given != side:
        if win is None:
            raise MetadataError(f"phase-encode code {given} given contradicts the sidecar's {side}; say which one wins "
                                "(epi_win: arguments or sidecar)", img.path)
        chosen = given if win == "arguments" else side
    try:
        parse_pe_code(chosen)
    except InputError:
        raise MetadataError(f"phase-encode code {chosen!r} is not one of i j k i- j- k-", img.path) from None
    return chosen


def _read_epi_pair(s) -> FieldMapData:
    from ..pairs import PhaseEncoding
    from ..shift import resolve_timing

    images = [load_image(p, ndim=(3, 4)) for p in s.epi]
    if len(images) < 1 or (len(images) == 1 and images[0].n_volumes < 2):
        raise InputError("reversed phase-encode field maps need at least two images (or one 4D image with "
                         "per-volume codes)", s.epi[0] if s.epi else None)
    reference = images[0]
    for img in images[1:]:
        if img.shape[:3] != reference.shape[:3] or not np.allclose(img.affine, reference.affine, atol=1e-3, rtol=0):
            raise GeometryError(f"grid {img.shape[:3]} / affine differs from {reference.path.name}'s; all images of a "
                                "reversed phase-encode field map must share one grid", img.path)
    n_volumes = [img.n_volumes for img in images]
    codes = _per_image(s.epi_pe_codes, len(images), n_volumes, "epi_pe_codes")
    readouts = _per_image(s.epi_readout_times_s, len(images), n_volumes, "epi_readout_times_s")
    volumes, encodings, sources = [], [], []
    for i, img in enumerate(images):
        for t in range(img.n_volumes):
            given = None if codes is None else codes[i][t if len(codes[i]) > 1 else 0]
            code = _epi_code(img, given, s.epi_win)
            axis = parse_pe_code(code)[0]
            readout = None if readouts is None else readouts[i][t if len(readouts[i]) > 1 else 0]
            try:
                timing = resolve_timing(img.shape[axis], readout_time_s=readout, sidecar=img.sidecar,
                                        timing_win=s.epi_win)
            except MetadataError as err:
                raise MetadataError(err.message, img.path) from None
            volume = img.volume(t, np.float64)
            if not np.isfinite(volume).all():
                raise InputError(f"volume {t} contains NaN or infinite values", img.path)
            volumes.append(volume)
            encodings.append(PhaseEncoding(code, timing.echo_spacing_s, timing.n_pe_lines))
            sources.append((img.path, t))
    axes = {}
    for enc, (path, _) in zip(encodings, sources):
        axis, sign = parse_pe_code(enc.pe_code)
        axes.setdefault(axis, set()).add(sign)
    if not any(len(signs) == 2 for signs in axes.values()):
        raise MetadataError("all images have the same phase-encode polarity; a reversed phase-encode field map needs "
                            f"opposite codes on one axis (found {sorted({e.pe_code for e in encodings})})",
                            images[0].path)
    return FieldMapData(reference, [], epi_volumes=volumes, epi_encodings=encodings, epi_sources=sources)


#: One reader per input kind (the kind names are those the summary reports).
READERS = {
    "phase": _read_phase_echoes,
    "real-imag": _read_real_imag,
    "phase-difference": _read_phase_difference,
    "ready map": _read_ready_map,
    "epi-pair": _read_epi_pair,
}


def read_mask(path, reference: Image) -> np.ndarray | None:
    """A mask on the field-map grid (non-zero inside), or None when no path is given."""
    if path is None:
        return None
    mask_img = load_image(path, ndim=(3,))
    check_grid([mask_img], reference)
    values = mask_img.get_fdata(np.float64) > 0.5
    if not values.any():
        raise InputError("mask is empty", path)
    return values


def input_paths(s) -> list[Path]:
    """Every input file of the job (they are never overwritten)."""
    return [Path(p) for p in [*s.phase, *s.magnitude, *s.real, *s.imag, *s.epi, s.phase_diff, s.b0, s.mask]
            if p is not None]
