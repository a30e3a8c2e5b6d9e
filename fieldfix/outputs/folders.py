"""The job summaries found in a folder, by the registry's names."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Iterator

from ..errors import InputError

from .jobs import DropoutFiles, DropoutSummary, FieldMapFiles, FieldMapSummary, UnwarpFiles, UnwarpSummary
from .plan import PlanFiles, PlanSummary


@dataclass(frozen=True)
class FolderSummaries:
    """The summaries found in one folder, each with the path it was read from."""

    field_maps: list[tuple[Path, FieldMapSummary]]
    runs: list[tuple[Path, UnwarpSummary]]
    dropout: list[tuple[Path, DropoutSummary]]
    plans: list[tuple[Path, PlanSummary]]

    @property
    def empty(self) -> bool:
        return not (self.field_maps or self.runs or self.dropout or self.plans)


def _matching(folder: Path, suffix: str) -> Iterator[Path]:
    for path in sorted(folder.glob(f"*{suffix}")):
        if path.is_file() and not path.name.startswith("."):
            yield path


def find_summaries(folder: str | os.PathLike) -> FolderSummaries:
    """Read every job summary in `folder` (not its subfolders), by the registry's names.

    Raises
    ------
    InputError
        When `folder` is not a folder; :class:`SummaryError` for a summary that does not
        match its record (naming the file and the key).
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError("not a folder", folder)
    plans = [(p, PlanSummary.read(p)) for p in _matching(folder, PlanFiles.SUMMARY_SUFFIX)]
    return FolderSummaries(
        field_maps=[(p, FieldMapSummary.read(p)) for p in _matching(folder, FieldMapFiles.SUMMARY_SUFFIX)],
        runs=[(p, UnwarpSummary.read(p)) for p in _matching(folder, UnwarpFiles.SUMMARY_SUFFIX)],
        dropout=[(p, DropoutSummary.read(p)) for p in _matching(folder, DropoutFiles.SUMMARY_SUFFIX)],
        plans=plans,
    )
