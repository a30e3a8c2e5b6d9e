"""The whole batch: discover, plan, hold the output folder, execute, and report.

:func:`run_batch` is the public entry point (also ``fieldfix.run_batch``).
"""

from __future__ import annotations

import datetime
import logging
import os
from pathlib import Path
from typing import Sequence

from .._progress import progress_bar
from ..errors import InputError
from ..jsonfile import write_json
from ..outdir import output_folder, output_paths_guard
from ..outputs import BatchFiles, BatchPlan, BatchSummary, RunPlanEntry, TaskFailure
from .derivatives import write_bidsignore, write_dataset_description
from .discovery import discover
from .execution import DaskExecutor, InProcessExecutor, LocalPool, execute_plan
from .group import group_rows, write_group_summary
from .inventory import Inventory
from .lock import BatchLock, clean_leftovers
from .options import BatchOptions, merge_options
from .plan import Task, TaskResult, plan_tasks, run_entries
from .tasks import WORK_FOLDER, now_iso

__all__ = ["run_batch"]

_log = logging.getLogger(__name__)


def _check_call(root: Path, deriv: Path, jobs, scheduler, scheduler_file) -> None:
    if isinstance(jobs, bool) or not isinstance(jobs, int) or jobs < 1:
        raise InputError(f"jobs must be a whole number of at least 1, got {jobs!r}", parameter="jobs")
    if scheduler and scheduler_file:
        raise InputError("give a scheduler address or a scheduler file, not both")
    if scheduler_file is not None and not Path(scheduler_file).is_file():
        raise InputError("scheduler file not found", path=scheduler_file)
    if deriv == root or (deriv.is_relative_to(root) and deriv.relative_to(root).parts[0].startswith("sub-")):
        raise InputError("the output folder must not be the dataset or one of its subject folders (use e.g. "
                         "<dataset>/derivatives/fieldfix)", path=deriv)


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
    _check_call(root, deriv, jobs, scheduler, scheduler_file)
    options, config_record = merge_options(options, config)
    inventory = discover(root, participant_labels, allow_outside_inputs=allow_outside_inputs)
    tasks = plan_tasks(inventory, deriv, reports=reports, options=options)
    if dry_run:
        return BatchPlan(dataset=str(root), derivatives=str(deriv), runs=run_entries(inventory, tasks),
                         tasks=[t.task_id for t in tasks], dataset_remarks=list(inventory.problems),
                         options=options.changed(), config=config_record)
    with output_folder(deriv), BatchLock(deriv, command) as lock:
        return _run_held(root, deriv, inventory, tasks, lock, dict(
            jobs=jobs, scheduler=scheduler, scheduler_file=scheduler_file, command=command, progress=progress,
            redo=redo), options=options, config=config_record)


def _run_held(root: Path, deriv: Path, inventory: Inventory, tasks: list[Task], lock: BatchLock, how: dict, *,
              options: BatchOptions, config) -> BatchSummary:
    """The batch once it holds its output folder: checks, cleanup, execution, summaries."""
    started = datetime.datetime.now(datetime.timezone.utc)
    files = BatchFiles.named(started.strftime("%Y%m%dT%H%M%SZ"))
    # files of the whole batch: refused up front when someone else's file has their name
    output_paths_guard([deriv / p for p in (files.group_csv, files.group_json, files.group_figure)], overwrite=True)
    notices = [lock.notice] if lock.notice else []
    removed = clean_leftovers(deriv, WORK_FOLDER)
    if removed:
        notices.append(f"removed {len(removed)} leftovers of killed runs: " + ", ".join(removed[:5])
                       + (" ..." if len(removed) > 5 else ""))
    for notice in notices:
        _log.warning("%s", notice)
    write_dataset_description(deriv, root)
    write_bidsignore(deriv)
    results, mode = _execute(tasks, deriv, **how)
    return _finish(root, deriv, inventory, tasks, results, files, mode=mode, started=started, command=how["command"],
                   options=options, config=config, notices=notices)


def _execute(tasks: list[Task], deriv: Path, *, jobs, scheduler, scheduler_file, command, progress, redo):
    bar = progress_bar(total=len(tasks), desc="batch tasks", enabled=progress, unit="task")

    def on_result(result: TaskResult) -> None:
        if result.status == "failed":
            _log.warning("%s failed: %s", result.task_id, result.reason)
        bar.update(1)

    if scheduler or scheduler_file:
        backend, mode = DaskExecutor(scheduler, str(scheduler_file) if scheduler_file else None), \
            f"dask ({scheduler or scheduler_file})"
    elif jobs > 1:
        backend, mode = LocalPool(jobs), f"{jobs} local processes"
    else:
        backend, mode = InProcessExecutor(), "in this process"
    try:
        with backend as executor:
            results = execute_plan(tasks, executor, str(deriv), command=command, on_result=on_result, redo=redo)
    finally:
        bar.close()
        work = deriv / WORK_FOLDER
        if work.is_dir() and not work.is_symlink() and not any(work.iterdir()):
            work.rmdir()
    return results, mode


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


def _finish(root: Path, deriv: Path, inventory: Inventory, tasks, results: dict[str, TaskResult],
            files: BatchFiles, *, mode, started, command, options, config, notices) -> BatchSummary:
    """Write the group summary and the batch log; return the batch's summary."""
    counts = {s: 0 for s in ("done", "reused", "failed", "skipped")}
    for result in results.values():
        counts[result.status] = counts.get(result.status, 0) + 1
    failures = [TaskFailure(task=r.task_id, subject=f"sub-{r.subject}", status=r.status, reason=r.reason)
                for r in results.values() if not r.ok]
    files = write_group_summary(deriv, group_rows(inventory, results, deriv), files)
    warnings = list(dict.fromkeys(w for fm in inventory.fieldmaps for w in fm.warnings))
    summary = BatchSummary(
        dataset=str(root), derivatives=str(deriv), execution=mode, subjects=[f"sub-{s}" for s in inventory.subjects],
        tasks=counts, failures=failures, runs=_run_outcomes(inventory, tasks, results),
        fieldmaps_without_target=[f.key for f in inventory.fieldmaps_without_target],
        dataset_remarks=list(inventory.problems), warnings=warnings, notices=notices, options=options.changed(),
        outputs=files, log=files.log, exit_status=1 if failures else 0, config=config)
    write_json(deriv / files.log, {"command": command, "started": started.isoformat(timespec="seconds"),
                                   "finished": now_iso("seconds"), "summary": summary.to_json(),
                                   "inventory": inventory.as_dict(), "tasks": [r.to_json() for r in results.values()]},
               overwrite=True)
    return summary
