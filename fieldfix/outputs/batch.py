"""Output names and typed records of a batch over a BIDS dataset."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

from ..records import Record
from .base import CAUTION, JobFiles


class ByName:
    """Read access by field name (``summary["tasks"]``), as callers of the dict ``run_batch``
    returned before this record read it; new code reads the attributes."""

    def __getitem__(self, name: str):
        if name in {f.name for f in dataclasses.fields(self)}:
            return getattr(self, name)
        raise KeyError(name)


@dataclass(frozen=True)
class ConfigRecord(Record):
    """A batch config file as used: where it was, the SHA-256 of its bytes, the options it set."""

    path: str
    sha256: str
    values: dict[str, object] = field(default_factory=dict)


@dataclass(frozen=True)
class BatchFiles(JobFiles):
    """The batch's own files, relative to the derivatives folder (the job outputs have their own)."""

    description: str
    ignore: str
    group_csv: str
    group_json: str
    log: str
    group_figure: str | None = None

    @classmethod
    def named(cls, stamp: str, *, figure: bool = True) -> "BatchFiles":
        return cls(description="dataset_description.json", ignore=".bidsignore", group_csv="group/group_runs.csv",
                   group_json="group/group_runs.json", log=f"logs/batch_{stamp}.json",
                   group_figure="group/group_runs.png" if figure else None)


@dataclass(frozen=True)
class TaskFailure(ByName, Record):
    """A task that failed or was skipped because a task it needs did not finish."""

    task: str
    subject: str
    status: str
    reason: str


@dataclass(frozen=True)
class RunPlanEntry(ByName, Record):
    """What a batch does with one EPI run: ``correct`` it with a field map, or ``skip`` it (why)."""

    run: str
    fieldmap: list[str]
    action: str
    reason: str


@dataclass(frozen=True)
class GroupRow(Record):
    """One EPI run in the group table; numbers from the runs' typed summaries (None: not made)."""

    subject: str
    session: str
    run: str
    fieldmap: str
    status: str
    reason: str
    max_abs_shift_vox: float | None = None
    max_abs_shift_mm: float | None = None
    retention_percent_below_threshold: float | None = None
    edge_agreement_gain: float | None = None


@dataclass(frozen=True)
class BatchPlan(ByName, Record):
    """What a batch would do (``dry_run``): one entry per EPI run and the planned task ids."""

    KIND = "batch-plan"

    dataset: str
    derivatives: str
    runs: list[RunPlanEntry]
    tasks: list[str]
    dataset_remarks: list[str]
    options: dict[str, object]
    config: ConfigRecord | None = None


@dataclass(frozen=True)
class BatchSummary(ByName, Record):
    """What a batch reports (also in its log, ``logs/batch_<UTC time>.json``).

    ``exit_status`` is 0 when every run with a field map was corrected and every task
    finished, 1 otherwise; ``runs`` says for each EPI run what was done and why.
    """

    KIND = "batch"

    dataset: str
    derivatives: str
    execution: str
    subjects: list[str]
    tasks: dict[str, int]
    failures: list[TaskFailure]
    runs: list[RunPlanEntry]
    fieldmaps_without_target: list[str]
    dataset_remarks: list[str]
    warnings: list[str]
    notices: list[str]
    options: dict[str, object]
    outputs: BatchFiles
    log: str
    exit_status: int
    config: ConfigRecord | None = None
    caution: str = CAUTION
