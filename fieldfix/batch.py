"""Whole-dataset batch runs over a BIDS dataset, locally or on dask.distributed.

This module is the file-level edge that ties the workflows together for a whole study:

1. **Discovery** (:func:`discover`) reads a BIDS dataset (an open standard; its terms are
   used throughout): per subject and session it finds the field-map acquisitions of the
   three gradient-echo kinds BIDS describes -- a phase difference with magnitudes
   (``phasediff``, ``magnitude1``/``magnitude2``), two phases with magnitudes
   (``phase1``/``phase2``, ``magnitude1``/``magnitude2``), and a ready field map with a
   magnitude (``fieldmap``, ``magnitude``) -- and the EPI runs each one is meant for,
   through ``IntendedFor`` (paths relative to the subject folder and BIDS URIs such as
   ``bids::sub-01/func/sub-01_task-rest_bold.nii.gz``) and through
   ``B0FieldIdentifier`` / ``B0FieldSource``. Runs with no field map and field maps with
   no target are kept in the inventory and listed in the summary, never dropped.
2. **Planning** (:func:`plan_tasks`) turns the inventory into tasks: one B0 map per
   field-map acquisition, an unwarping and a dropout map per target run, a report per
   subject; each task names the tasks it waits for.
3. **Execution** (:func:`run_batch`) runs the plan in worker processes
   (:class:`concurrent.futures.ProcessPoolExecutor`, ``jobs``) or on a dask.distributed
   cluster (``scheduler`` address or ``scheduler_file``). Each task hashes its inputs and
   parameters and stores the hash beside its finished outputs, so a finished task with
   unchanged inputs is not redone and an interrupted batch resumes. A failing task is
   isolated: its reason is logged, tasks that need its outputs are skipped, everything
   else goes on, and the summary lists all failures.
4. **Outputs** form a BIDS derivatives dataset (``dataset_description.json`` with
   ``GeneratedBy``, file names with BIDS entities, JSON sidecars with provenance), plus a
   group summary (CSV, JSON and plots across subjects).

Research software, not a medical device: corrected images must be inspected before they
are used for any decision about a person.

Example
-------
>>> from fieldfix.batch import discover, plan_tasks                    # doctest: +SKIP
>>> inventory = discover("/data/study", participant_labels=["01"])    # doctest: +SKIP
>>> [t.task_id for t in plan_tasks(inventory, "/data/study/derivatives/fieldfix")]  # doctest: +SKIP
"""

from __future__ import annotations

import dataclasses
import json
import os
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Iterable, Mapping, Sequence

from fieldfix.errors import InputError

__all__ = [
    "BidsName",
    "parse_bids_name",
    "FieldMapAcquisition",
    "Run",
    "Inventory",
    "discover",
]

# --------------------------------------------------------------------------------------
# BIDS file names
# --------------------------------------------------------------------------------------

#: Suffixes of the runs that can be unwarped (EPI acquisitions).
RUN_SUFFIXES = ("bold", "cbv", "sbref", "dwi", "asl", "m0scan")
#: Data-type folders searched for runs.
RUN_DATATYPES = ("func", "dwi", "perf")
#: Order of entities in the names this module writes (BIDS entity table order).
ENTITY_ORDER = (
    "sub", "ses", "task", "acq", "ce", "rec", "dir", "run", "mod", "echo", "flip",
    "inv", "mt", "part", "recording", "space", "res", "den", "label", "desc",
)
_NIFTI_EXTENSIONS = (".nii.gz", ".nii")
_ENTITY_RE = re.compile(r"^([a-zA-Z0-9]+)-([a-zA-Z0-9+]+)$")


@dataclass(frozen=True)
class BidsName:
    """The parts of a BIDS file name.

    Attributes
    ----------
    entities : tuple of (str, str)
        Key-value pairs in the order they appear, e.g. ``(("sub", "01"), ("task", "rest"))``.
    suffix : str
        The last underscore-separated part before the extension, e.g. ``"bold"``.
    extension : str
        ``".nii.gz"``, ``".nii"``, ``".json"`` ...
    """

    entities: tuple[tuple[str, str], ...]
    suffix: str
    extension: str

    @property
    def entity_dict(self) -> dict[str, str]:
        return dict(self.entities)

    def stem(self, *, drop: Iterable[str] = ()) -> str:
        """Entities joined by underscores, without suffix (``sub-01_ses-02_task-rest``)."""
        dropped = set(drop)
        return "_".join(f"{k}-{v}" for k, v in self.entities if k not in dropped)


def parse_bids_name(name: str | os.PathLike) -> BidsName | None:
    """Split a BIDS file name into entities, suffix and extension.

    Returns None when the name does not follow the ``key-value_..._suffix.ext`` pattern.

    Example
    -------
    >>> parse_bids_name("sub-01_ses-2_task-rest_run-1_bold.nii.gz").suffix
    'bold'
    >>> parse_bids_name("sub-01_ses-2_task-rest_run-1_bold.nii.gz").entity_dict["ses"]
    '2'
    """
    base = Path(name).name
    extension = ""
    for ext in (".nii.gz", ".nii", ".json", ".tsv.gz", ".tsv"):
        if base.endswith(ext):
            extension = ext
            base = base[: -len(ext)]
            break
    else:
        if "." in base:
            base, dot, rest = base.partition(".")
            extension = dot + rest
    parts = base.split("_")
    if len(parts) < 2 and not parts[0]:
        return None
    suffix = parts[-1]
    if not suffix.isalnum():
        return None
    entities = []
    for part in parts[:-1]:
        match = _ENTITY_RE.match(part)
        if match is None:
            return None
        entities.append((match.group(1), match.group(2)))
    return BidsName(tuple(entities), suffix, extension)


def derivative_name(source: BidsName, *, desc: str, suffix: str | None = None,
                    extension: str = ".nii.gz") -> str:
    """BIDS derivative file name: the source's entities plus ``desc-<label>``.

    Example
    -------
    >>> src = parse_bids_name("sub-01_ses-1_task-rest_bold.nii.gz")
    >>> derivative_name(src, desc="unwarped")
    'sub-01_ses-1_task-rest_desc-unwarped_bold.nii.gz'
    """
    label = re.sub(r"[^a-zA-Z0-9]", "", desc)
    if not label:
        raise ValueError(f"description {desc!r} has no letters or digits")
    ents = {k: v for k, v in source.entities if k != "desc"}
    ents["desc"] = label
    order = {k: i for i, k in enumerate(ENTITY_ORDER)}
    keys = sorted(ents, key=lambda k: (order.get(k, len(order)), k))
    return "_".join(f"{k}-{ents[k]}" for k in keys) + f"_{suffix or source.suffix}{extension}"


# --------------------------------------------------------------------------------------
# Inventory data classes
# --------------------------------------------------------------------------------------


@dataclass
class FieldMapAcquisition:
    """One gradient-echo field-map acquisition of a subject/session.

    Attributes
    ----------
    key : str
        Entity stem shared by the acquisition's files, e.g. ``"sub-01_ses-1_acq-gre"``.
    subject, session : str
        Labels without ``sub-``/``ses-`` (session ``""`` when the dataset has none).
    kind : str
        ``"phasediff"``, ``"phase-pair"`` or ``"fieldmap"``; ``"unsupported"`` for other
        field-map files (e.g. reversed phase-encode ``epi`` images).
    files : dict of str to str
        Role (BIDS suffix: ``phasediff``, ``magnitude1`` ...) to path relative to the root.
    metadata : dict of str to dict
        Role to its (inherited) JSON sidecar.
    identifiers : list of str
        Its ``B0FieldIdentifier`` values.
    targets : list of str
        Paths (relative to the root) of the runs it is meant for, sorted.
    other_targets : list of str
        Targets that are not EPI runs (e.g. anatomical images); kept for the summary.
    problems : list of str
        What makes the acquisition unusable (missing partner file, missing echo times ...).
    """

    key: str
    subject: str
    session: str
    kind: str
    files: dict[str, str] = field(default_factory=dict)
    metadata: dict[str, dict] = field(default_factory=dict)
    identifiers: list[str] = field(default_factory=list)
    targets: list[str] = field(default_factory=list)
    other_targets: list[str] = field(default_factory=list)
    problems: list[str] = field(default_factory=list)

    @property
    def primary(self) -> str:
        """Path of the file that carries the acquisition's metadata."""
        for role in ("phasediff", "phase1", "fieldmap", "epi"):
            if role in self.files:
                return self.files[role]
        return next(iter(self.files.values()))


@dataclass
class Run:
    """An EPI run that may be unwarped.

    Attributes
    ----------
    path : str
        Path relative to the dataset root.
    subject, session, datatype, suffix : str
    metadata : dict
        Its (inherited) JSON sidecar.
    fieldmap : str or None
        Key of the field-map acquisition chosen for it, None when it has none.
    note : str
        Why it has no field map or how the field map was chosen.
    """

    path: str
    subject: str
    session: str
    datatype: str
    suffix: str
    metadata: dict = field(default_factory=dict)
    fieldmap: str | None = None
    note: str = ""


@dataclass
class Inventory:
    """What :func:`discover` found in a BIDS dataset.

    Attributes
    ----------
    root : str
        Absolute path of the dataset.
    subjects : list of str
        Labels of the subjects included (without ``sub-``).
    fieldmaps : list of FieldMapAcquisition
    runs : list of Run
    problems : list of str
        Dataset-level remarks (unreadable sidecars, IntendedFor entries pointing nowhere ...).
    """

    root: str
    subjects: list[str]
    fieldmaps: list[FieldMapAcquisition]
    runs: list[Run]
    problems: list[str] = field(default_factory=list)

    def fieldmap(self, key: str) -> FieldMapAcquisition:
        for fm in self.fieldmaps:
            if fm.key == key:
                return fm
        raise KeyError(key)

    @property
    def runs_without_fieldmap(self) -> list[Run]:
        return [r for r in self.runs if r.fieldmap is None]

    @property
    def fieldmaps_without_target(self) -> list[FieldMapAcquisition]:
        return [f for f in self.fieldmaps if not f.targets]

    def as_dict(self) -> dict:
        """JSON-serialisable listing (used in the batch summary)."""
        return {
            "root": self.root,
            "subjects": list(self.subjects),
            "fieldmaps": [dataclasses.asdict(f) | {"primary": f.primary} for f in self.fieldmaps],
            "runs": [dataclasses.asdict(r) for r in self.runs],
            "runs_without_fieldmap": [
                {"path": r.path, "reason": r.note} for r in self.runs_without_fieldmap
            ],
            "fieldmaps_without_target": [
                {"key": f.key, "files": sorted(f.files.values())}
                for f in self.fieldmaps_without_target
            ],
            "problems": list(self.problems),
        }


# --------------------------------------------------------------------------------------
# Discovery
# --------------------------------------------------------------------------------------


def _read_json(path: Path, problems: list[str]) -> dict:
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError) as exc:
        problems.append(f"{path}: unreadable JSON sidecar ({exc})")
        return {}
    if not isinstance(data, dict):
        problems.append(f"{path}: JSON sidecar is not an object")
        return {}
    return data


class _SidecarIndex:
    """Finds the JSON sidecars of a file by the BIDS inheritance principle.

    A sidecar applies to a data file when it sits in the same folder or a parent folder
    (up to the dataset root), has the same suffix, and its entities are a subset of the
    file's. Values from sidecars closer to the file win.
    """

    def __init__(self, root: Path, problems: list[str]):
        self.root = root
        self.problems = problems
        self._cache: dict[Path, list[tuple[BidsName, Path]]] = {}
        self._json: dict[Path, dict] = {}

    def _jsons_in(self, folder: Path) -> list[tuple[BidsName, Path]]:
        if folder not in self._cache:
            found = []
            try:
                entries = sorted(folder.iterdir())
            except OSError:
                entries = []
            for p in entries:
                if p.is_file() and p.name.endswith(".json"):
                    name = parse_bids_name(p.name)
                    if name is not None:
                        found.append((name, p))
            self._cache[folder] = found
        return self._cache[folder]

    def metadata(self, path: Path) -> dict:
        name = parse_bids_name(path.name)
        if name is None:
            return {}
        ents = set(name.entities)
        folders = []
        folder = path.parent
        while True:
            folders.append(folder)
            if folder == self.root or self.root not in folder.parents:
                break
            folder = folder.parent
        merged: dict = {}
        for folder in reversed(folders):  # root first, the file's own folder last
            candidates = [
                (len(jn.entities), jp)
                for jn, jp in self._jsons_in(folder)
                if jn.suffix == name.suffix and set(jn.entities) <= ents
            ]
            for _, jp in sorted(candidates):
                if jp not in self._json:
                    self._json[jp] = _read_json(jp, self.problems)
                merged.update(self._json[jp])
        return merged


def _nifti_files(folder: Path) -> list[Path]:
    if not folder.is_dir():
        return []
    return sorted(
        p for p in folder.iterdir()
        if p.is_file() and p.name.endswith(_NIFTI_EXTENSIONS) and not p.name.startswith(".")
    )


def _as_list(value: Any) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str):
        return [value]
    if isinstance(value, (list, tuple)):
        return [str(v) for v in value]
    return [str(value)]


def _resolve_intended(entry: str, root: Path, subject_dir: Path) -> tuple[str | None, str]:
    """Resolve one IntendedFor entry to a path relative to the root.

    Returns (relative path or None, remark).
    """
    text = entry.strip()
    if text.startswith("bids:"):
        # BIDS URI: bids:<dataset name>:<path relative to that dataset's root>
        _, _, rest = text.partition(":")
        name, sep, rel = rest.partition(":")
        if not sep:
            return None, f"malformed BIDS URI {entry!r}"
        if name:
            return None, f"BIDS URI {entry!r} points into another dataset ({name!r}), not followed"
        candidate = (root / rel.lstrip("/")).resolve()
    else:
        rel = text.lstrip("/")
        candidate = (subject_dir / rel).resolve()
        if not candidate.exists() and (root / rel).exists():
            candidate = (root / rel).resolve()  # tolerated: path given from the dataset root
    try:
        relpath = candidate.relative_to(root.resolve()).as_posix()
    except ValueError:
        return None, f"IntendedFor entry {entry!r} leaves the dataset"
    if not candidate.exists():
        return None, f"IntendedFor entry {entry!r} names a file that does not exist"
    return relpath, ""


def _classify(fm: FieldMapAcquisition) -> None:
    roles = set(fm.files)
    if "phasediff" in roles:
        fm.kind = "phasediff"
        if "magnitude1" not in roles:
            fm.problems.append("phase-difference field map has no magnitude1 image")
        meta = fm.metadata.get("phasediff", {})
        for key in ("EchoTime1", "EchoTime2"):
            if not isinstance(meta.get(key), (int, float)):
                fm.problems.append(f"phasediff sidecar has no numeric {key}")
    elif "phase1" in roles or "phase2" in roles:
        fm.kind = "phase-pair"
        for role in ("phase1", "phase2", "magnitude1", "magnitude2"):
            if role not in roles:
                fm.problems.append(f"two-phase field map has no {role} image")
        for role in ("phase1", "phase2"):
            if role in roles and not isinstance(fm.metadata.get(role, {}).get("EchoTime"),
                                                (int, float)):
                fm.problems.append(f"{role} sidecar has no numeric EchoTime")
    elif "fieldmap" in roles:
        fm.kind = "fieldmap"
        if "magnitude" not in roles:
            fm.problems.append("field map has no magnitude image")
        if not fm.metadata.get("fieldmap", {}).get("Units"):
            fm.problems.append("fieldmap sidecar has no Units")
    elif "epi" in roles:
        fm.kind = "unsupported"
        fm.problems.append("reversed phase-encode (epi) field maps are not supported by fieldfix")
    else:
        fm.kind = "unsupported"
        fm.problems.append(
            "magnitude image(s) without a phase or field-map image: " + ", ".join(sorted(roles))
        )


_FMAP_ROLES = ("phasediff", "phase1", "phase2", "magnitude1", "magnitude2", "magnitude",
               "fieldmap", "epi")


def discover(bids_root: str | os.PathLike, participant_labels: Sequence[str] | None = None
             ) -> Inventory:
    """Find field-map acquisitions, EPI runs and what belongs together in a BIDS dataset.

    Parameters
    ----------
    bids_root : path
        Root of a BIDS dataset (the folder with ``dataset_description.json`` and ``sub-*``).
    participant_labels : sequence of str, optional
        Subjects to include, with or without the ``sub-`` prefix. All when None.

    Returns
    -------
    Inventory
        Field maps with their targets, runs with their chosen field map, and remarks.

    Raises
    ------
    InputError
        The root is not a folder, holds no ``sub-*`` folder, or a requested participant
        is missing.

    Notes
    -----
    Targets come from ``IntendedFor`` in the field map's sidecars (paths relative to the
    subject folder, or BIDS URIs ``bids::<path from the root>``) and from
    ``B0FieldSource`` of a run matching a ``B0FieldIdentifier`` of a field map in the
    same subject. When several field maps claim a run, the one with the lowest key is
    used and the choice is noted.

    Example
    -------
    >>> inv = discover("/data/study")                            # doctest: +SKIP
    >>> [r.path for r in inv.runs_without_fieldmap]              # doctest: +SKIP
    ['sub-02/func/sub-02_task-motor_bold.nii.gz']
    """
    root = Path(bids_root).expanduser().resolve()
    if not root.is_dir():
        raise InputError("BIDS root is not a folder", path=root)
    subject_dirs = sorted(p for p in root.glob("sub-*") if p.is_dir())
    if not subject_dirs:
        raise InputError("no sub-* folders: not a BIDS dataset", path=root)
    problems: list[str] = []
    if not (root / "dataset_description.json").is_file():
        problems.append(f"{root}: dataset_description.json is missing (required by BIDS)")
    if participant_labels:
        wanted = [lab[4:] if lab.startswith("sub-") else lab for lab in participant_labels]
        present = {p.name[4:] for p in subject_dirs}
        missing = [lab for lab in wanted if lab not in present]
        if missing:
            raise InputError(
                "participant(s) not in the dataset: " + ", ".join(f"sub-{m}" for m in missing),
                path=root,
            )
        subject_dirs = [p for p in subject_dirs if p.name[4:] in set(wanted)]

    sidecars = _SidecarIndex(root, problems)
    fieldmaps: list[FieldMapAcquisition] = []
    runs: list[Run] = []

    for subject_dir in subject_dirs:
        subject = subject_dir.name[4:]
        session_dirs = sorted(p for p in subject_dir.glob("ses-*") if p.is_dir())
        containers = [(s, s.name[4:]) for s in session_dirs] or [(subject_dir, "")]
        sub_fmaps: list[FieldMapAcquisition] = []
        sub_runs: list[Run] = []
        for container, session in containers:
            # field maps
            groups: dict[str, FieldMapAcquisition] = {}
            for path in _nifti_files(container / "fmap"):
                name = parse_bids_name(path.name)
                if name is None or name.suffix not in _FMAP_ROLES:
                    problems.append(f"{path.relative_to(root)}: not a recognised field-map file")
                    continue
                key = name.stem()
                fm = groups.setdefault(key, FieldMapAcquisition(key, subject, session, ""))
                rel = path.relative_to(root).as_posix()
                if name.suffix in fm.files:
                    fm.problems.append(f"two {name.suffix} images ({fm.files[name.suffix]}, {rel})")
                    continue
                fm.files[name.suffix] = rel
                fm.metadata[name.suffix] = sidecars.metadata(path)
            for fm in groups.values():
                _classify(fm)
                idents: list[str] = []
                for meta in fm.metadata.values():
                    for ident in _as_list(meta.get("B0FieldIdentifier")):
                        if ident not in idents:
                            idents.append(ident)
                fm.identifiers = idents
            sub_fmaps.extend(groups[k] for k in sorted(groups))
            # runs
            for datatype in RUN_DATATYPES:
                for path in _nifti_files(container / datatype):
                    name = parse_bids_name(path.name)
                    if name is None or name.suffix not in RUN_SUFFIXES:
                        continue
                    sub_runs.append(Run(
                        path=path.relative_to(root).as_posix(), subject=subject,
                        session=session, datatype=datatype, suffix=name.suffix,
                        metadata=sidecars.metadata(path),
                    ))

        # targets through IntendedFor
        run_index = {r.path: r for r in sub_runs}
        claims: dict[str, list[tuple[str, str]]] = {}
        for fm in sub_fmaps:
            entries: list[str] = []
            for role in _FMAP_ROLES:
                for entry in _as_list(fm.metadata.get(role, {}).get("IntendedFor")):
                    if entry not in entries:
                        entries.append(entry)
            for entry in entries:
                rel, remark = _resolve_intended(entry, root, subject_dir)
                if rel is None:
                    problems.append(f"{fm.primary}: {remark}")
                    continue
                if rel in run_index:
                    claims.setdefault(rel, []).append((fm.key, "IntendedFor"))
                elif rel not in fm.other_targets:
                    fm.other_targets.append(rel)
        # targets through B0FieldSource / B0FieldIdentifier
        by_ident: dict[str, list[str]] = {}
        for fm in sub_fmaps:
            for ident in fm.identifiers:
                by_ident.setdefault(ident, []).append(fm.key)
        for run in sub_runs:
            for source in _as_list(run.metadata.get("B0FieldSource")):
                keys = by_ident.get(source)
                if not keys:
                    problems.append(
                        f"{run.path}: B0FieldSource {source!r} matches no B0FieldIdentifier"
                    )
                    continue
                for key in keys:
                    if (key, "IntendedFor") not in claims.get(run.path, []):
                        claims.setdefault(run.path, []).append((key, "B0FieldSource"))

        usable = {fm.key for fm in sub_fmaps if not fm.problems}
        for run in sub_runs:
            found = claims.get(run.path, [])
            if not found:
                run.note = "no field map is intended for this run"
                continue
            keys = sorted({k for k, _ in found})
            # prefer a usable acquisition; a broken one still gets the run so the
            # failure is reported against it rather than the run going uncorrected silently
            chosen = sorted(keys, key=lambda k: (k not in usable, k))[0]
            run.fieldmap = chosen
            how = sorted({how for k, how in found if k == chosen})
            run.note = f"field map {chosen} (through {' and '.join(how)})"
            if len(keys) > 1:
                run.note += "; also claimed by " + ", ".join(k for k in keys if k != chosen)
        for fm in sub_fmaps:
            fm.targets = sorted(r.path for r in sub_runs if r.fieldmap == fm.key)
        fieldmaps.extend(sub_fmaps)
        runs.extend(sub_runs)

    return Inventory(
        root=str(root),
        subjects=[p.name[4:] for p in subject_dirs],
        fieldmaps=fieldmaps,
        runs=runs,
        problems=problems,
    )
