"""Discovery: the field maps and EPI runs of a BIDS dataset, and which belong together.

Per subject and session :func:`discover` finds the field-map acquisitions BIDS describes:

* gradient-echo: a phase difference with magnitudes (``phasediff``, ``magnitude1`` /
  ``magnitude2``), two phases with magnitudes (``phase1`` / ``phase2``), a ready field map
  with a magnitude (``fieldmap``, ``magnitude``);
* reversed phase-encode EPI: ``fmap/*_dir-<label>_epi`` images, and ``perf/*_m0scan``
  images that carry a ``B0FieldIdentifier``, grouped by ``B0FieldIdentifier`` or else by a
  shared ``IntendedFor`` (the ``dir-`` entity differs within a group);

and the EPI runs (``func``, ``dwi``, ``perf``) each is meant for, through ``IntendedFor``
and ``B0FieldIdentifier`` / ``B0FieldSource``. Nothing is dropped: runs with no field map,
field maps with no target, and every problem (an unreadable sidecar, an input that
resolves outside the dataset, a wrong entry) are kept with their reasons, on the run or
field map they concern. Discovery reads names and sidecars only, never image data.

Inputs that resolve (through symbolic links) outside the dataset are refused unless
allowed; links into the dataset's own object store (``.git/annex/objects`` inside the
root) resolve inside it and are followed.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from ..errors import FieldfixError, InputError
from ..jsonfile import read_json
from .fieldmaps import classify_gre, epi_groups
from .inventory import FieldMapAcquisition, Inventory, Run
from .bids import (
    IntendedTarget,
    SidecarIndex,
    as_list,
    check_label,
    parse_bids_name,
    resolve_intended_for,
)

__all__ = ["RUN_SUFFIXES", "RUN_DATATYPES", "FieldMapAcquisition", "Run", "Inventory", "discover"]

#: Suffixes of the runs that can be unwarped (EPI acquisitions).
RUN_SUFFIXES = ("bold", "cbv", "sbref", "dwi", "asl", "m0scan")
#: Data-type folders searched for runs.
RUN_DATATYPES = ("func", "dwi", "perf")
_GRE_ROLES = ("phasediff", "phase1", "phase2", "magnitude1", "magnitude2", "magnitude", "fieldmap")
_NIFTI = (".nii.gz", ".nii")


# ----------------------------------------------------------------------------- the dataset
@dataclass
class _Context:
    """What every step of one discovery needs."""

    root: Path
    sidecars: SidecarIndex
    allow_outside: bool
    self_names: set[str]
    problems: list[str]

    def relative(self, path: Path) -> str:
        return path.relative_to(self.root).as_posix()

    def input_problem(self, path: Path) -> str | None:
        """Why a data file cannot be read here: a dangling link, or a link out of the dataset."""
        rel = self.relative(path)
        if not path.exists():
            return f"{rel}: is a link whose target is missing (for annexed data: fetch the content first)"
        real = Path(os.path.realpath(path))
        if self.allow_outside or real == self.root or self.root in real.parents:
            return None
        return (f"{rel}: resolves outside the dataset (to {real}); inputs outside the dataset are refused "
                "unless allowed (allow_outside_inputs)")


def _self_names(root: Path, problems: list[str]) -> set[str]:
    """Names under which the dataset's DatasetLinks refer to the dataset itself."""
    path = root / "dataset_description.json"
    if not path.is_file():
        problems.append(f"{path}: dataset_description.json is missing (required by BIDS)")
        return set()
    try:
        links = read_json(path).get("DatasetLinks") or {}
    except FieldfixError as err:
        problems.append(str(err))
        return set()
    names = set()
    for name, url in (links.items() if isinstance(links, dict) else ()):
        text = str(url).removeprefix("file://")
        target = (root / text) if not os.path.isabs(text) else Path(text)
        if text in ("", ".", "./") or Path(os.path.realpath(target)) == root:
            names.add(str(name))
    return names


def _data_files(folder: Path) -> list[Path]:
    if not folder.is_dir():
        return []
    return sorted(p for p in folder.iterdir() if p.name.endswith(_NIFTI) and not p.name.startswith(".")
                  and (p.is_file() or p.is_symlink()))


def _subject_dirs(root: Path, labels: Sequence[str] | None, problems: list[str]) -> list[Path]:
    found = []
    for path in sorted(root.glob("sub-*")):
        if not path.is_dir():
            continue
        try:
            check_label(path.name, "subject folder")
        except InputError:
            problems.append(f"{path.name}: not a BIDS subject folder (the label after sub- must be letters and "
                            "digits); skipped")
            continue
        found.append(path)
    if not found:
        raise InputError("no sub-* folders with BIDS labels: not a BIDS dataset", path=root)
    if labels:
        wanted = [check_label(str(label), "participant label") for label in labels]
        present = {p.name[4:] for p in found}
        missing = [label for label in wanted if label not in present]
        if missing:
            raise InputError("participant(s) not in the dataset: " + ", ".join(f"sub-{m}" for m in missing),
                             path=root)
        found = [p for p in found if p.name[4:] in set(wanted)]
    return found


def discover(bids_root: str | os.PathLike, participant_labels: Sequence[str] | None = None, *,
             allow_outside_inputs: bool = False) -> Inventory:
    """Find field maps, EPI runs and what belongs together in a BIDS dataset.

    Parameters
    ----------
    bids_root : path
        Root of a BIDS dataset (the folder with ``dataset_description.json`` and ``sub-*``).
    participant_labels : sequence of str, optional
        Subjects to include, with or without the ``sub-`` prefix. All when None.
    allow_outside_inputs : bool
        Use data files that resolve through links outside the dataset (refused otherwise;
        links into the dataset's own annex object store are always followed).

    Returns
    -------
    Inventory

    Raises
    ------
    InputError
        The root is not a folder, holds no ``sub-*`` folder, or a requested participant is
        missing or not a BIDS label.

    Notes
    -----
    When several field maps claim a run, a usable one wins, then the lowest key; the
    choice is noted on the run.

    Examples
    --------
    >>> inv = discover("/data/study")                            # doctest: +SKIP
    >>> [r.path for r in inv.runs_without_fieldmap]              # doctest: +SKIP
    ['sub-02/func/sub-02_task-motor_bold.nii.gz']
    """
    root = Path(bids_root).expanduser().resolve()
    if not root.is_dir():
        raise InputError("BIDS root is not a folder", path=root)
    problems: list[str] = []
    subject_dirs = _subject_dirs(root, participant_labels, problems)
    context = _Context(root, SidecarIndex(root), allow_outside_inputs, _self_names(root, problems), problems)
    fieldmaps, runs = [], []
    for subject_dir in subject_dirs:
        sub_fmaps, sub_runs = _discover_subject(context, subject_dir)
        fieldmaps.extend(sub_fmaps)
        runs.extend(sub_runs)
    return Inventory(root=str(root), subjects=[p.name[4:] for p in subject_dirs], fieldmaps=fieldmaps, runs=runs,
                     problems=problems)


def _containers(context: _Context, subject_dir: Path) -> list[tuple[Path, str]]:
    sessions = []
    for path in sorted(subject_dir.glob("ses-*")):
        if not path.is_dir():
            continue
        label = path.name[4:]
        if not label.isalnum() or not label.isascii():
            context.problems.append(f"{context.relative(path)}: not a BIDS session folder (the label after ses- "
                                    "must be letters and digits); skipped")
            continue
        sessions.append((path, label))
    return sessions or [(subject_dir, "")]


def _discover_subject(context: _Context, subject_dir: Path) -> tuple[list[FieldMapAcquisition], list[Run]]:
    subject = subject_dir.name[4:]
    fmaps: list[FieldMapAcquisition] = []
    runs: list[Run] = []
    epi_members: list[tuple[Path, str]] = []
    for container, session in _containers(context, subject_dir):
        gre: dict[str, FieldMapAcquisition] = {}
        for path in _data_files(container / "fmap"):
            name = parse_bids_name(path.name)
            if name is not None and name.suffix == "epi":
                epi_members.append((path, session))
                continue
            if name is None or name.suffix not in _GRE_ROLES:
                context.problems.append(f"{context.relative(path)}: not a recognised field-map file")
                continue
            _add_gre_file(context, gre, path, name, subject, session)
        for fm in gre.values():
            classify_gre(fm)
        fmaps.extend(gre[k] for k in sorted(gre))
        runs.extend(_runs_in(context, container, subject, session))
    m0_members = [(Path(context.root / r.path), r.session) for r in runs
                  if r.suffix == "m0scan" and as_list(r.metadata.get("B0FieldIdentifier"))]
    fmaps.extend(epi_groups(context, subject, epi_members + m0_members, {f.key for f in fmaps}))
    for fm in fmaps:
        fm.identifiers = list(dict.fromkeys(str(i) for meta in fm.metadata.values()
                                            for i in as_list(meta.get("B0FieldIdentifier"))))
    _link(context, subject_dir, fmaps, runs)
    return fmaps, runs


def _add_gre_file(context: _Context, groups: dict, path: Path, name, subject: str, session: str) -> None:
    key = name.stem()
    fm = groups.setdefault(key, FieldMapAcquisition(key, subject, session))
    rel = context.relative(path)
    if name.suffix in fm.files:
        fm.add_problem(f"two {name.suffix} images ({fm.files[name.suffix]}, {rel})")
        return
    fm.files[name.suffix] = rel
    meta = context.sidecars.metadata(path)
    fm.metadata[name.suffix] = meta.values
    fm.unreadable.extend(meta.problems)
    for problem in meta.problems + [p for p in [context.input_problem(path)] if p]:
        fm.add_problem(problem)


def _runs_in(context: _Context, container: Path, subject: str, session: str) -> list[Run]:
    runs = []
    for datatype in RUN_DATATYPES:
        for path in _data_files(container / datatype):
            name = parse_bids_name(path.name)
            if name is None:
                context.problems.append(f"{context.relative(path)}: not a BIDS file name (entities key-label "
                                        "with letters and digits); skipped")
                continue
            if name.suffix not in RUN_SUFFIXES:
                continue
            meta = context.sidecars.metadata(path)
            problems = meta.problems + [p for p in [context.input_problem(path)] if p]
            runs.append(Run(path=context.relative(path), subject=subject, session=session, datatype=datatype,
                            suffix=name.suffix, metadata=meta.values, problems=problems))
    return runs


def _claims_through_intended(context: _Context, subject_dir: Path, fmaps, run_index) -> dict:
    claims: dict[str, list[tuple[str, str]]] = {}
    for fm in fmaps:
        entries = {repr(e): e for meta in fm.metadata.values() for e in as_list(meta.get("IntendedFor"))}
        for entry in entries.values():
            target: IntendedTarget = resolve_intended_for(entry, context.root, subject_dir, context.self_names)
            if target.relative in run_index:
                claims.setdefault(target.relative, []).append((fm.key, "IntendedFor"))
                if target.problem:
                    run_index[target.relative].problems.append(f"{fm.primary}: {target.problem}")
            elif target.problem:
                context.problems.append(f"{fm.primary}: {target.problem}")
            elif target.relative not in fm.other_targets:
                fm.other_targets.append(target.relative)
    return claims


def _link(context: _Context, subject_dir: Path, fmaps: list[FieldMapAcquisition], runs: list[Run]) -> None:
    run_index = {r.path: r for r in runs}
    claims = _claims_through_intended(context, subject_dir, fmaps, run_index)
    by_ident: dict[str, list[str]] = {}
    for fm in fmaps:
        for ident in fm.identifiers:
            by_ident.setdefault(ident, []).append(fm.key)
    members = {path for fm in fmaps for path in fm.files.values()}
    for run in runs:
        for source in as_list(run.metadata.get("B0FieldSource")):
            keys = by_ident.get(str(source))
            if not keys:
                if run.path not in members:  # it has a field map in the BIDS sense, which cannot be found
                    run.problems.append(f"{run.path}: B0FieldSource {source!r} matches no B0FieldIdentifier of "
                                        f"sub-{run.subject}")
                continue
            for key in keys:
                if (key, "IntendedFor") not in claims.get(run.path, []):
                    claims.setdefault(run.path, []).append((key, "B0FieldSource"))
    usable = {fm.key for fm in fmaps if not fm.problems}
    unreadable = list(dict.fromkeys(p for fm in fmaps for p in fm.unreadable))
    for run in runs:
        _choose(run, claims.get(run.path, []), usable)
        if run.fieldmap is None and unreadable and not run.problems:
            run.problems.append("whether a field map is meant for this run cannot be told: " + "; ".join(unreadable))
    for fm in fmaps:
        fm.targets = sorted(r.path for r in runs if r.fieldmap == fm.key)


def _choose(run: Run, found: list[tuple[str, str]], usable: set[str]) -> None:
    """Pick the field map of a run among those that claim it (a usable one first)."""
    if not found:
        run.note = "no field map is intended for this run"
        return
    keys = sorted({k for k, _ in found})
    chosen = sorted(keys, key=lambda k: (k not in usable, k))[0]
    run.fieldmap = chosen
    how = sorted({how for k, how in found if k == chosen})
    run.note = f"field map {chosen} (through {' and '.join(how)})"
    if len(keys) > 1:
        run.note += "; also claimed by " + ", ".join(k for k in keys if k != chosen)
