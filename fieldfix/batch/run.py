"""The whole batch: discover, plan, hold the output folder, execute, and report.

:func:`run_batch` is the public entry point (also ``fieldfix.run_batch``).
"""

from __future__ import annotations

import datetime
import logging
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from .._progress import progress_bar
from ..errors import InputError
from ..jsonfile import write_json
from ..outdir import output_folder, output_paths_guard
from ..outputs import BatchFiles, BatchPlan, BatchSummary, ConfigRecord, RunPlanEntry, TaskFailure
from ..records import Record
from .derivatives import write_bidsignore, write_dataset_description
from .discovery import discover
from .execution import BatchExecution, execute_plan
from .group import group_rows, write_group_summary
from .inventory import Inventory
from .lock import BatchLock, clean_leftovers
from .options import BatchOptions, merge_options
from .plan import Task, TaskResult, plan_tasks, run_entries
from .tasks import WORK_FOLDER, now_iso

__all__ = ["run_batch", "BatchLog"]

_log = logging.getLogger(__name__)


def _check_folders(root: Path, deriv: Path) -> None:
    if deriv == root or (deriv.is_relative_to(root) and deriv.relative_to(root).parts[0].startswith("sub-")):
        raise InputError("the output folder must not be the dataset or one of its subject folders (use e.g. "
                         "<dataset>/derivatives/fieldfix)", path=deriv)


@dataclass(frozen=True)
class BatchLog(Record):
    """The batch log (``logs/batch_<UTC time>.json``): the command, when it ran, the batch's
    summary, the dataset's inventory and every task's result."""

    command: str | None
    started: str
    finished: str
    summary: BatchSummary
    inventory: dict[str, object]
    tasks: list[TaskResult]


@dataclass(frozen=True)
class _Batch:
    """What one batch works on: the dataset, its derivatives folder, what was found and planned."""

    root: Path
    deriv: Path
    inventory: Inventory
    tasks: list[Task]
    options: BatchOptions
    config: ConfigRecord | None


def run_batch(bids_root: str | os.PathLike, out_dir: str | os.PathLike, *,
              participant_labels: Sequence[str] | None = None, jobs: int = 1, scheduler: str | None = None,
              scheduler_file: str | os.PathLike | None = None, command: str | None = None, progress: bool = False,
              redo: bool = False, reports: bool = True, options: BatchOptions | None = None,
              config: str | os.PathLike | None = None, allow_outside_inputs: bool = False,
              dry_run: bool = False) -> BatchSummary | BatchPlan:
    """Correct a whole BIDS dataset into a fieldfix derivatives dataset.

    Parameters
    ----------
    bids_root : path
        The raw BIDS dataset.
    out_dir : path
        The derivatives folder (e.g. ``<bids_root>/derivatives/fieldfix``); created if
        missing. Finished, up-to-date outputs in it are kept, not redone.
    participant_labels : sequence of str, optional
        Subjects to process (``"01"`` or ``"sub-01"``); all when None.
    jobs : int
        Worker processes on this machine (1 runs the tasks in this process).
    scheduler, scheduler_file : optional
        A dask.distributed scheduler address (``tcp://host:8786``) or scheduler file; the
        tasks then run on its workers, which must see the same file system.
    command : str, optional
        Command line recorded in the provenance sidecars.
    progress : bool
        Show a progress bar over tasks on standard error.
    redo : bool
        Redo every task, even those whose finished outputs are up to date.
    reports : bool
        Build a report per subject (the slowest task; off for quick reruns).
    options : BatchOptions, optional
        Processing options for every task; fields that differ from the defaults win over
        the config file's.
    config : path, optional
        A JSON or TOML file of processing options (see :mod:`fieldfix.batch.options`).
    allow_outside_inputs : bool
        Use data files that resolve outside the dataset through links.
    dry_run : bool
        Only discover and plan (no image data read, nothing written): returns a
        :class:`~fieldfix.outputs.BatchPlan`.

    Returns
    -------
    BatchSummary or BatchPlan
        ``exit_status`` is 0 when every task finished (every run with a field map
        corrected), 1 otherwise.

    Raises
    ------
    InputError, OutputError
        Bad dataset, participants or options; an output folder held by another batch or
        holding another tool's files (nothing is run).

    Examples
    --------
    >>> summary = run_batch("/data/study", "/data/study/derivatives/fieldfix", jobs=2)  # doctest: +SKIP
    >>> summary.exit_status, summary.failures                                         # doctest: +SKIP
    (0, [])
    """
    root, deriv = Path(bids_root).expanduser().resolve(), Path(out_dir).expanduser().resolve()
    execution = BatchExecution(jobs=jobs, scheduler=scheduler, command=command, progress=progress, redo=redo,
                               scheduler_file=str(scheduler_file) if scheduler_file is not None else None)
    execution.check()
    _check_folders(root, deriv)
    options, config_record = merge_options(options, config)
    inventory = discover(root, participant_labels, allow_outside_inputs=allow_outside_inputs)
    tasks = plan_tasks(inventory, deriv, reports=reports, options=options)
    if dry_run:
        return BatchPlan(dataset=str(root), derivatives=str(deriv), runs=run_entries(inventory, tasks),
                         tasks=[t.task_id for t in tasks], dataset_remarks=list(inventory.problems),
                         options=options.changed(), config=config_record)
    with output_folder(deriv), BatchLock(deriv, execution.command) as lock:
        return _run_held(_Batch(root, deriv, inventory, tasks, options, config_record), lock, execution)


def _run_held(batch: _Batch, lock: BatchLock, execution: BatchExecution) -> BatchSummary:
    """The batch once it holds its output folder: checks, cleanup, execution, summaries."""
    started = datetime.datetime.now(datetime.timezone.utc)
    files = BatchFiles.named(started.strftime("%Y%m%dT%H%M%SZ"))
    # files of the whole batch: refused up front when someone else's file has their name
    output_paths_guard([batch.deriv / p for p in (files.group_csv, files.group_json, files.group_figure)],
                       overwrite=True)
    notices = [lock.notice] if lock.notice else []
    removed = clean_leftovers(batch.deriv, WORK_FOLDER)
    if removed:
        notices.append(f"removed {len(removed)} leftovers of killed runs: " + ", ".join(removed[:5])
                       + (" ..." if len(removed) > 5 else ""))
    for notice in notices:
        _log.warning("%s", notice)
    write_dataset_description(batch.deriv, batch.root)
    write_bidsignore(batch.deriv)
    results = _execute(batch.tasks, batch.deriv, execution)
    summary = _write_group_summary(batch, results, files, execution.mode, notices)
    log = BatchLog(command=execution.command, started=started.isoformat(timespec="seconds"),
                   finished=now_iso("seconds"), summary=summary, inventory=batch.inventory.as_dict(),
                   tasks=list(results.values()))
    write_json(batch.deriv / files.log, log.to_json(), overwrite=True)
    return summary


def _execute(tasks: list[Task], deriv: Path, execution: BatchExecution) -> dict[str, TaskResult]:
    bar = progress_bar(total=len(tasks), desc="batch tasks", enabled=execution.progress, unit="task")

    def on_result(result: TaskResult) -> None:
        if result.status == "failed":
            _log.warning("%s failed: %s", result.task_id, result.reason)
        bar.update(1)

    try:
        with execution.executor() as executor:
            return execute_plan(tasks, executor, str(deriv), command=execution.command, on_result=on_result,
                                redo=execution.redo)
    finally:
        bar.close()
        work = deriv / WORK_FOLDER
        if work.is_dir() and not work.is_symlink() and not any(work.iterdir()):
            work.rmdir()


def _run_outcomes(inventory: Inventory, tasks: list[Task], results: dict[str, TaskResult]) -> list[RunPlanEntry]:
    outcomes = []
    for entry, run in zip(run_entries(inventory, tasks), inventory.runs):
        result = results.get(f"unwarp:{run.stem}")
        if result is None:
            outcomes.append(entry)
        elif result.ok:
            outcomes.append(RunPlanEntry(run=entry.run, fieldmap=entry.fieldmap, action="corrected", reason=run.note))
        else:
            outcomes.append(RunPlanEntry(run=entry.run, fieldmap=entry.fieldmap, action="failed",
                                         reason=result.reason))
    return outcomes


def _write_group_summary(batch: _Batch, results: dict[str, TaskResult], files: BatchFiles, mode: str,
                         notices: list[str]) -> BatchSummary:
    """Write the group table and figure; return the batch's summary."""
    counts = {s: 0 for s in ("done", "reused", "failed", "skipped")}
    for result in results.values():
        counts[result.status] = counts.get(result.status, 0) + 1
    failures = [TaskFailure(task=r.task_id, subject=f"sub-{r.subject}", status=r.status, reason=r.reason)
                for r in results.values() if not r.ok]
    inventory = batch.inventory
    files = write_group_summary(batch.deriv, group_rows(inventory, results, batch.deriv), files)
    warnings = list(dict.fromkeys(w for fm in inventory.fieldmaps for w in fm.warnings))
    return BatchSummary(
        dataset=str(batch.root), derivatives=str(batch.deriv), execution=mode,
        subjects=[f"sub-{s}" for s in inventory.subjects], tasks=counts, failures=failures,
        runs=_run_outcomes(inventory, batch.tasks, results),
        fieldmaps_without_target=[f.key for f in inventory.fieldmaps_without_target],
        dataset_remarks=list(inventory.problems), warnings=warnings, notices=notices,
        options=batch.options.changed(), outputs=files, log=files.log, exit_status=1 if failures else 0,
        config=batch.config)
