"""Executing a plan: in this process, in a local process pool, or on a dask.distributed cluster.

:func:`execute_plan` submits tasks to any :class:`concurrent.futures.Executor` as their
dependencies finish. Local workers (:class:`LocalPool`) run one thread each and end when
the batch process that started them dies, even by ``kill -9``: on Linux the kernel sends
them SIGKILL (``prctl(PR_SET_PDEATHSIG)``), and everywhere a watch thread ends a worker
whose parent process changed. Their unfinished files are temporaries and staging folders
that the next batch removes (:func:`fieldfix.batch.lock.clean_leftovers`).
"""

from __future__ import annotations

import ctypes
import dataclasses
import multiprocessing
import os
import signal
import sys
import threading
import time
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

from ..errors import InputError
from .plan import Task, TaskResult
from .tasks import execute_task

__all__ = ["BatchExecution", "InProcessExecutor", "LocalPool", "DaskExecutor", "execute_plan", "WORKER_THREAD_ENV"]

#: Environment for local worker processes: one thread each, the tasks are the parallelism.
WORKER_THREAD_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1",
                     "NUMBA_NUM_THREADS": "1", "VECLIB_MAXIMUM_THREADS": "1"}
_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>
#: How often a worker's watch thread checks that its parent still runs (s).
PARENT_CHECK_S = 0.25


def _watch_parent(parent_pid: int) -> None:
    while True:
        time.sleep(PARENT_CHECK_S)
        if os.getppid() != parent_pid:
            os._exit(1)


def worker_start(parent_pid: int) -> None:
    """Pool initializer: end this worker when the process `parent_pid` (its parent) dies."""
    if sys.platform.startswith("linux"):
        try:
            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):
            pass  # the watch thread below still ends the worker
    if os.getppid() != parent_pid:  # the parent died before the request took effect
        os._exit(1)
    threading.Thread(target=_watch_parent, args=(parent_pid,), daemon=True, name="fieldfix-parent-watch").start()


class InProcessExecutor:
    """Runs each submitted call at once in this process (``jobs=1``); futures API only."""

    def submit(self, fn, *args, **kwargs) -> Future:
        future: Future = Future()
        try:
            future.set_result(fn(*args, **kwargs))
        except Exception as exc:  # execute_task never raises; this is a last resort
            future.set_exception(exc)  # (an interruption propagates to the caller)
        return future

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False


class LocalPool:
    """A spawn-context process pool whose workers run one thread each and die with the batch.

    If a worker process dies hard (which breaks a :class:`ProcessPoolExecutor`), the tasks
    it was running fail with that reason and a fresh pool takes the next ones.
    """

    def __init__(self, jobs: int):
        self.jobs = jobs
        self.pool = None
        self._saved_env: dict[str, str | None] = {}

    def __enter__(self):
        for key, value in WORKER_THREAD_ENV.items():  # spawned children copy the environment at start
            self._saved_env[key] = os.environ.get(key)
            os.environ[key] = value
        return self

    def _new(self) -> ProcessPoolExecutor:
        return ProcessPoolExecutor(max_workers=self.jobs, mp_context=multiprocessing.get_context("spawn"),
                                   initializer=worker_start, initargs=(os.getpid(),))

    def submit(self, fn, *args, **kwargs):
        if self.pool is None:
            self.pool = self._new()
        try:
            return self.pool.submit(fn, *args, **kwargs)
        except BrokenProcessPool:
            self.pool.shutdown(wait=False, cancel_futures=True)
            self.pool = self._new()
            return self.pool.submit(fn, *args, **kwargs)

    def __exit__(self, *exc_info):
        if self.pool is not None:
            # after a clean finish every task is done: let the workers exit in the background
            # (the interpreter joins them at exit) while the group summary is written
            self.pool.shutdown(wait=exc_info[0] is not None, cancel_futures=True)
        for key, value in self._saved_env.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
        return False


class DaskExecutor:
    """Connects to a dask.distributed scheduler and exposes its futures executor."""

    def __init__(self, scheduler: str | None = None, scheduler_file: str | None = None):
        self.scheduler = scheduler
        self.scheduler_file = scheduler_file
        self.client = None

    def __enter__(self):
        from distributed import Client  # heavy: imported only when a cluster is used

        try:
            if self.scheduler_file is not None:
                if not Path(self.scheduler_file).is_file():
                    raise InputError("scheduler file not found", path=self.scheduler_file)
                self.client = Client(scheduler_file=str(self.scheduler_file), timeout="30s")
            else:
                self.client = Client(self.scheduler, timeout="30s")
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot reach the dask scheduler ({exc})",
                             path=self.scheduler or self.scheduler_file) from None
        self.executor = self.client.get_executor(pure=False)  # every submission runs (resume is in the tasks)
        return self

    def submit(self, fn, *args, **kwargs):
        return self.executor.submit(fn, *args, **kwargs)

    def __exit__(self, *exc):
        if self.client is not None:
            self.client.close()
        return False


@dataclass(frozen=True)
class BatchExecution:
    """Where and how a batch's tasks run.

    Attributes
    ----------
    jobs : int, worker processes on this machine (1: the tasks run in this process)
    scheduler, scheduler_file : str or None, a dask.distributed scheduler address
        (``tcp://host:8786``) or scheduler file; its workers then run the tasks
    command : str or None, the command line recorded in the provenance sidecars
    progress : bool, a progress bar over tasks on standard error
    redo : bool, redo every task, even those whose finished outputs are up to date

    Examples
    --------
    >>> BatchExecution(jobs=2).mode
    '2 local processes'
    """

    jobs: int = 1
    scheduler: str | None = None
    scheduler_file: str | None = None
    command: str | None = None
    progress: bool = False
    redo: bool = False

    def check(self) -> None:
        """Refuse a jobs count that is not a whole number >= 1, both scheduler forms, or a missing file."""
        if isinstance(self.jobs, bool) or not isinstance(self.jobs, int) or self.jobs < 1:
            raise InputError(f"jobs must be a whole number of at least 1, got {self.jobs!r}", parameter="jobs")
        if self.scheduler and self.scheduler_file:
            raise InputError("give a scheduler address or a scheduler file, not both")
        if self.scheduler_file is not None and not Path(self.scheduler_file).is_file():
            raise InputError("scheduler file not found", path=self.scheduler_file)

    @property
    def mode(self) -> str:
        """Where the tasks run, in words (the batch summary's ``execution``)."""
        if self.scheduler or self.scheduler_file:
            return f"dask ({self.scheduler or self.scheduler_file})"
        return f"{self.jobs} local processes" if self.jobs > 1 else "in this process"

    def executor(self):
        """A new executor (a context manager) for this execution."""
        if self.scheduler or self.scheduler_file:
            return DaskExecutor(self.scheduler, self.scheduler_file)
        return LocalPool(self.jobs) if self.jobs > 1 else InProcessExecutor()


def _not_run(task: Task, status: str, reason: str) -> TaskResult:
    return TaskResult(task_id=task.task_id, kind=task.kind, subject=task.subject, session=task.session,
                      status=status, reason=reason)


def _blocked(task: Task, results: dict[str, TaskResult]) -> TaskResult | None:
    """A skipped result when a needed task did not finish (a report needs only one of its tasks)."""
    bad = [d for d in task.deps if not results[d].ok]
    if not bad or (task.kind == "report" and len(bad) < len(task.deps)):
        return None
    why = "; ".join(f"{d} {results[d].status}" + (f": {results[d].reason}" if results[d].reason else "")
                    for d in bad)
    return _not_run(task, "skipped", f"needs {', '.join(bad)}, which did not finish ({why})")


def _slim(result: TaskResult) -> TaskResult:
    return dataclasses.replace(result, traceback=None, remarks=[])


def execute_plan(tasks: Sequence[Task], executor, deriv_root: str, *, command: str | None = None,
                 on_result=None, redo: bool = False) -> dict[str, TaskResult]:
    """Submit tasks to a :class:`concurrent.futures.Executor` as their dependencies finish.

    Works with a :class:`~concurrent.futures.ProcessPoolExecutor` and with a dask
    ``Client.get_executor()`` alike. A task whose dependency did not finish is skipped with
    that task's reason.

    Returns
    -------
    dict
        Task id to :class:`TaskResult`, in plan order.
    """
    pending = {t.task_id: t for t in tasks}
    results: dict[str, TaskResult] = {}
    running: dict = {}

    def record(result: TaskResult) -> None:
        results[result.task_id] = result
        if on_result is not None:
            on_result(result)

    while pending or running:
        changed = True
        while changed:  # settle skips and submit everything ready
            changed = False
            for tid in [t for t, task in pending.items() if all(d in results for d in task.deps)]:
                task = pending.pop(tid)
                changed = True
                blocked = _blocked(task, results)
                if blocked is not None:
                    record(blocked)
                    continue
                upstream = {d: _slim(results[d]) for d in task.deps if results[d].ok}
                running[executor.submit(execute_task, task, upstream, deriv_root, command, redo)] = task
        if not running:
            break
        done, _ = wait(list(running), return_when=FIRST_COMPLETED)
        for future in done:
            task = running.pop(future)
            try:
                result = future.result()
            except Exception as exc:  # the worker died (killed, out of memory ...)
                result = _not_run(task, "failed", f"worker lost while running the task ({type(exc).__name__}: "
                                                  f"{exc})")
            record(result)
    return {t.task_id: results[t.task_id] for t in tasks if t.task_id in results}
