"""The kinds of BIDS field maps: what each needs, how EPI groups form, and phase-unit checks.

* :func:`classify_gre` names a gradient-echo acquisition's kind from its files and lists
  what is missing (a missing ``magnitude1`` beside a ``magnitude2`` is worked around, with
  a warning).
* :func:`epi_groups` forms reversed phase-encode field maps from ``fmap/*_epi`` images and
  ``perf/*_m0scan`` images with a ``B0FieldIdentifier``: one group per identifier, else
  per shared ``IntendedFor``, else per entity stem without ``dir-``.
* :func:`check_declared_phase_units` refuses a sidecar ``Units`` that contradicts the
  values: ``deg`` on a phase image whose values span +-pi would give a field 57 times too
  small (a few Hz across a head, which no scanner gives), so both readings are named.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from ..errors import UnitError
from .bids import as_list, parse_bids_name, pe_code_problem
from .inventory import FieldMapAcquisition

__all__ = ["classify_gre", "epi_groups", "check_declared_phase_units", "declared_phase_units", "number"]

_PHASE_UNITS = {"rad": "rad", "radian": "rad", "radians": "rad", "deg": "deg", "degree": "deg", "degrees": "deg"}


def number(meta: dict, key: str) -> float | None:
    """A finite number from a sidecar (None when absent or not a number)."""
    value = meta.get(key)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        return None
    return float(value)


def declared_phase_units(meta: dict) -> str | None:
    """``rad`` or ``deg`` from a sidecar's BIDS ``Units`` (None when absent or other)."""
    return _PHASE_UNITS.get(str(meta.get("Units") or "").strip().lower())


def classify_gre(fm: FieldMapAcquisition) -> None:
    """Set the kind of a gradient-echo acquisition and list what it lacks."""
    roles = set(fm.files)
    if "phasediff" in roles:
        fm.kind = "phasediff"
        if "magnitude1" not in roles and "magnitude2" in roles:
            fm.warnings.append(f"{fm.key}: no magnitude1 image; magnitude2 is used for the mask and the reference")
        elif "magnitude1" not in roles:
            fm.add_problem("phase-difference field map has no magnitude image (magnitude1 or magnitude2)")
        meta = fm.metadata.get("phasediff", {})
        for key in ("EchoTime1", "EchoTime2"):
            if number(meta, key) is None:
                fm.add_problem(f"phasediff sidecar has no numeric {key}")
    elif "phase1" in roles or "phase2" in roles:
        fm.kind = "phase-pair"
        for role in ("phase1", "phase2", "magnitude1", "magnitude2"):
            if role not in roles:
                fm.add_problem(f"two-phase field map has no {role} image")
        for role in ("phase1", "phase2"):
            if role in roles and number(fm.metadata.get(role, {}), "EchoTime") is None:
                fm.add_problem(f"{role} sidecar has no numeric EchoTime")
    elif "fieldmap" in roles:
        fm.kind = "fieldmap"
        if "magnitude" not in roles:
            fm.add_problem("field map has no magnitude image")
        if not fm.metadata.get("fieldmap", {}).get("Units"):
            fm.add_problem("fieldmap sidecar has no Units")
    else:
        fm.kind = "unsupported"
        fm.add_problem("magnitude image(s) without a phase or field-map image: " + ", ".join(sorted(roles)))


def _group_of(meta: dict, name) -> tuple:
    idents = as_list(meta.get("B0FieldIdentifier"))
    if idents:
        return ("identifier", str(idents[0]))
    intended = tuple(sorted(str(e) for e in as_list(meta.get("IntendedFor"))))
    if intended:
        return ("intended", intended)
    return ("entities", name.stem(drop=("dir",)))


def epi_groups(context, subject: str, members: list[tuple[Path, str]], taken: set[str]
               ) -> list[FieldMapAcquisition]:
    """Reversed phase-encode field maps from EPI images (``fmap`` epi, ``perf`` m0scan).

    Each group's key is the entity stem of its first image without ``dir-``; each image's
    role is its file stem. A group needs images of at least two phase-encode directions,
    each with a BIDS phase-encode code and a readout time (TotalReadoutTime or
    EffectiveEchoSpacing), possibly inherited.
    """
    groups: dict[tuple, list[tuple[Path, str, dict, list[str]]]] = {}
    for path, session in members:
        name = parse_bids_name(path.name)
        meta = context.sidecars.metadata(path)
        problems = meta.problems + [p for p in [context.input_problem(path)] if p]
        groups.setdefault((session, name.suffix, _group_of(meta.values, name)), []).append(
            (path, name.stem(drop=("dir",)), meta.values, problems))
    found = []
    for (session, _, _), items in sorted(groups.items(), key=lambda kv: str(kv[0])):
        items.sort(key=lambda item: item[0].name)
        fm = FieldMapAcquisition(items[0][1], subject, session, kind="epi")
        if fm.key in taken:
            fm.add_problem(f"another field map of this subject has the entities {fm.key}; give the reversed "
                           "phase-encode images their own acq- entity")
        taken.add(fm.key)
        codes = []
        for path, _, meta, problems in items:
            role = path.name.split(".")[0]
            fm.files[role] = context.relative(path)
            fm.metadata[role] = meta
            fm.unreadable.extend(p for p in problems if not p.startswith(fm.files[role]))
            for problem in problems:
                fm.add_problem(problem)
            _check_member(fm, context.relative(path), meta, codes)
        if len(set(codes)) < 2:
            shown = ", ".join(sorted(set(codes))) or "none"
            fm.add_problem("a reversed phase-encode field map needs images of at least two phase-encode "
                           f"directions (found {shown})")
        found.append(fm)
    return found


def _check_member(fm: FieldMapAcquisition, rel: str, meta: dict, codes: list[str]) -> None:
    problem = pe_code_problem(meta.get("PhaseEncodingDirection"), rel)
    if problem:
        fm.add_problem(problem)
    else:
        codes.append(meta["PhaseEncodingDirection"])
    if number(meta, "TotalReadoutTime") is None and number(meta, "EffectiveEchoSpacing") is None:
        fm.add_problem(f"{rel}: sidecar has neither TotalReadoutTime nor EffectiveEchoSpacing")


def check_declared_phase_units(values: np.ndarray, declared: str, delta_te_s: float | None, path) -> None:
    """Refuse a declared phase unit that the values contradict, naming both readings.

    The field a reading implies decides (common practice, no source): wrapped phase in
    radians lies in [-pi, pi]; a phase image declared in degrees whose values all stay
    within +-pi (1% tolerance) would mean fields of at most pi/180 / (2 pi dTE), a few Hz
    for millisecond echo spacings, across a whole head, which no scanner gives; declared
    in radians, values beyond +-pi cannot be wrapped radians. A nearly constant image
    (spread under 0.1) decides nothing.

    Raises
    ------
    UnitError
        With the range of the values and the field each reading gives.

    Examples
    --------
    >>> check_declared_phase_units(np.array([-3.1, 0.0, 3.1]), "deg", 0.00246, "pd.nii.gz")
    ... # doctest: +IGNORE_EXCEPTION_DETAIL
    Traceback (most recent call last):
    fieldfix.errors.UnitError: pd.nii.gz: the sidecar says Units deg, but ...
    """
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return
    lo, hi = float(finite.min()), float(finite.max())
    peak = max(abs(lo), abs(hi))
    within_pi = peak <= math.pi * 1.01

    def field_hz(scale: float) -> str:
        return f"+-{peak * scale / (2 * math.pi * delta_te_s):.3g} Hz" if delta_te_s else "n/a"

    readings = (f"read as degrees the field would span {field_hz(math.pi / 180)}, read as radians "
                f"{field_hz(1.0)}")
    if declared == "deg" and within_pi and hi - lo > 0.1:
        raise UnitError(f"the sidecar says Units deg, but the values span {lo:.3g} to {hi:.3g}, within the range "
                        f"of radians; {readings}; no scanner gives a field of a few Hz across a head: give the phase "
                        "units explicitly (phase_units)", path)
    if declared == "rad" and not within_pi:
        raise UnitError(f"the sidecar says Units rad, but the values span {lo:.3g} to {hi:.3g}, beyond +-pi; "
                        f"{readings}: give the phase units explicitly (phase_units)", path)
