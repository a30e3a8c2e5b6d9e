"""Which summaries a report reads, and which files it may open because of them.

A report reads typed job summaries (:mod:`fieldfix.outputs`): those of one folder, found
by the registry's names (:func:`fieldfix.outputs.find_summaries`), or an explicit list of
summary files, each read by the record its ``kind`` names. Three rules keep it from being
steered by what a summary says:

* A job's outputs are opened by their registry names, relative to the summary's own
  folder, and only when the name is a plain file name (no folder, no leading dot).
* The distorted run named in an unwarping summary (``run``, a path outside the folder) is
  opened only when the summary itself is vouched for by the signed ledger of a fieldfix
  output folder it lies in (:func:`vouched`) and the file is a readable NIfTI image.
* The B0 map a run was corrected with is linked to a field-map summary among those read,
  never opened from the path the run's summary names.

Examples
--------
>>> import tempfile
>>> sorted(summary_paths(tempfile.mkdtemp()))  # an empty folder holds no job summaries
[]
"""

from __future__ import annotations

import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from ..errors import InputError, OutputError
from ..outputs import (
    DemoChecks,
    DemoSummary,
    DropoutSummary,
    FieldMapFiles,
    FieldMapSummary,
    PlanSummary,
    UnwarpSummary,
    find_summaries,
)
from ..records import SummaryError

__all__ = ["Found", "Sources", "read_summary", "summary_paths", "gather", "vouched", "distorted_run",
           "field_map_summary_beside", "DEMO_SUMMARY"]

#: The demo's summary (its checks against the scenario's truth join the headline).
DEMO_SUMMARY = "demo_summary.json"

_KINDS = {FieldMapSummary.KIND: FieldMapSummary, UnwarpSummary.KIND: UnwarpSummary,
          DropoutSummary.KIND: DropoutSummary, PlanSummary.KIND: PlanSummary, DemoSummary.KIND: DemoSummary}
_SUBJECT = re.compile(r"(?:^|_)sub-([A-Za-z0-9]+)")


def _plain_name(name) -> bool:
    return (isinstance(name, str) and name not in ("", ".", "..") and not name.startswith(".")
            and "/" not in name and "\\" not in name and "\x00" not in name)


@dataclass(frozen=True)
class Found:
    """One summary read: its path and its typed record."""

    path: Path
    record: object

    @property
    def folder(self) -> Path:
        return self.path.parent

    @property
    def name(self) -> str:
        return self.path.name

    @property
    def subject(self) -> str | None:
        """The BIDS subject (``sub-<label>``) of the summary's file name or of a folder above it."""
        for part in [self.path.name, *reversed(self.path.parent.parts[-3:])]:
            match = _SUBJECT.search(part)
            if match:
                return f"sub-{match.group(1)}"
        return None

    def output(self, name: str | None) -> Path | None:
        """The file a registry name refers to, inside the summary's folder (None if absent)."""
        if name is None or not _plain_name(name):
            return None
        path = self.folder / name
        return path if path.is_file() else None


@dataclass(frozen=True)
class Sources:
    """The summaries a report reads, by kind, and where they came from."""

    field_maps: tuple
    runs: tuple
    dropout: tuple
    plans: tuple
    truth: DemoChecks | None
    origin: str
    paths: tuple

    @property
    def empty(self) -> bool:
        return not (self.field_maps or self.runs or self.dropout or self.plans)

    def field_map_of(self, run: Found) -> Found | None:
        """The field-map summary whose B0 map `run` was corrected with (None when not read)."""
        target = Path(run.record.b0_map)
        for fm in self.field_maps:
            b0 = fm.output(fm.record.outputs.b0_hz)
            if b0 is None:
                continue
            try:
                if target.exists() and os.path.samefile(target, b0):
                    return fm
            except OSError:
                pass
            if not target.is_absolute() and fm.folder == run.folder and target.name == b0.name:
                return fm
        return None

    def inputs(self) -> list[Path]:
        """Every file the report may read (for the check that it overwrites none of them)."""
        out = list(self.paths)
        for found in [*self.field_maps, *self.runs, *self.dropout, *self.plans]:
            for name in found.record.outputs.to_json().values():
                path = found.output(name)
                if path is not None:
                    out.append(path)
        return out


def read_summary(path: str | os.PathLike):
    """Read one job summary as the record its ``kind`` key names.

    Raises
    ------
    SummaryError
        When the file is not a fieldfix job summary, or does not match its record.
    """
    from ..jsonfile import read_json

    path = Path(path)
    data = read_json(path, what="fieldfix job summary")
    record = _KINDS.get(data.get("kind")) if isinstance(data.get("kind"), str) else None
    if record is None:
        raise SummaryError(f"not a fieldfix job summary (kind {data.get('kind')!r}; expected one of "
                           f"{', '.join(sorted(_KINDS))})", path)
    return record.from_json(data, path)


def summary_paths(folder: str | os.PathLike) -> list[Path]:
    """The job summaries of a folder (not its subfolders), by the registry's names."""
    found = find_summaries(folder)
    paths = [p for p, _ in [*found.field_maps, *found.runs, *found.dropout, *found.plans]]
    demo = Path(folder) / DEMO_SUMMARY
    return paths + ([demo] if demo.is_file() else [])


def field_map_summary_beside(b0_path: str | os.PathLike) -> Path | None:
    """The field-map summary written beside a ``<tag>b0_hz.nii.gz`` (None when there is none).

    Examples
    --------
    >>> field_map_summary_beside("/nowhere/sub-01_b0_hz.nii.gz") is None
    True
    """
    b0_path = Path(b0_path)
    suffix = FieldMapFiles.named().b0_hz
    if not b0_path.name.endswith(suffix):
        return None
    tag = b0_path.name[: -len(suffix)]
    summary = b0_path.with_name(FieldMapFiles.named(tag).summary)
    if not summary.is_file():
        return None
    try:
        record = FieldMapSummary.read(summary)
    except InputError:
        return None
    return summary if record.outputs.b0_hz == b0_path.name else None


def _origin(paths: Sequence[Path]) -> str:
    if not paths:
        return ""
    folders = {str(p.parent) for p in paths}
    return folders.pop() if len(folders) == 1 else os.path.commonpath(sorted(folders))


def gather(source) -> Sources:
    """The summaries of a folder, or of an explicit sequence of summary files.

    Raises
    ------
    InputError
        For a missing folder or file, a file that is not a job summary, or no summaries.
    """
    if isinstance(source, (str, os.PathLike)):
        if Path(source).is_dir():
            paths = summary_paths(source)
            origin = str(Path(source).resolve())
        elif Path(source).is_file():
            paths, origin = [Path(source)], None
        else:
            raise InputError("report source not found (give a folder or job summary files)", source)
    else:
        paths, origin = [Path(p) for p in source], None
    unique: dict[str, Path] = {}
    for path in paths:
        if not path.is_file():
            raise InputError("job summary not found", path)
        unique.setdefault(os.path.realpath(path), Path(os.path.abspath(path)))
    records = [(p, read_summary(p)) for p in unique.values()]
    by_kind = {kind: tuple(Found(p, r) for p, r in records if r.KIND == kind) for kind in _KINDS}
    demos = by_kind[DemoSummary.KIND]
    sources = Sources(field_maps=by_kind["fieldmap"], runs=by_kind["unwarp"], dropout=by_kind["dropout"],
                      plans=by_kind["plan"], truth=demos[0].record.checks_against_truth if demos else None,
                      origin=origin or _origin(list(unique.values())), paths=tuple(unique.values()))
    if sources.empty:
        raise InputError("no fieldfix job summaries found (expected b0_summary.json, <run>_unwarp.json, "
                         "dropout.json or plan.json)", source if isinstance(source, (str, os.PathLike)) else None)
    return sources


def vouched(path: str | os.PathLike) -> bool:
    """Whether a file is one fieldfix wrote, unchanged since, by the ledger of an output
    folder it lies in (the active one, or the nearest folder above it that has a ledger)."""
    from ..outdir import STATE_DIR, OutputFolder, written_by_fieldfix

    path = Path(os.path.abspath(path))
    if path.is_symlink() or not path.is_file():
        return False
    try:
        if written_by_fieldfix(path):
            return True
    except OutputError:
        pass
    for folder in path.parents:
        if (folder / STATE_DIR).is_dir():
            try:
                if OutputFolder(folder).owns(path):
                    return True
            except OutputError:
                continue
    return False


def distorted_run(run: Found):
    """The distorted input of an unwarped run, when it may be read: (Image or None, note or None)."""
    from ..io import load_image

    if not vouched(run.path):
        return None, ("the input before correction is not shown: this summary is not vouched for by a fieldfix "
                      "output ledger (copied, linked or edited), so the path it names is not opened")
    try:
        return load_image(run.record.run, ndim=(3, 4), sidecar=False), None
    except InputError:
        return None, ("the input before correction is not shown: the file the summary names is not a readable "
                      "NIfTI image")
