"""Batch runs: speed-up of two local worker processes over one, and dask overhead per task.

* ``batch_jobs2_vs_jobs1``: the whole invented dataset (tests/_batch_dataset.py, without
  the broken subject, plus extra subjects) corrected from scratch by the command
  ``fieldfix batch --jobs 2`` against ``--jobs 1``, each a fresh process (ratio = time
  with 1 / time with 2; goal >= 1.7 on 2 cores), as the medians of three alternating
  pairs of runs after one warm-up run. Start-up, imports and numba cache loads are paid
  by both, as they are for a user.
* ``batch_dask_overhead``: on a dask LocalCluster with two worker processes, the wall
  time per task of (a) 200 no-op tasks (pure scheduling round trip through the same
  executor API the batch uses) and (b) the batch re-run when every task is already
  finished (each task only hashes its inputs and checks its marker), beside the same
  re-run in-process; and a fresh batch on dask against jobs=1.

Peak memory: ``peak_process_mib`` is the largest resident set of any single process the
``fieldfix batch`` runs started (the batch process or one of its workers; from
``getrusage(RUSAGE_CHILDREN)``, which covers descendants that were waited for);
``driver_peak_mib`` of the dask record is that of this (driving) process.
"""

from __future__ import annotations

import os
import resource
import statistics
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent / "tests"))

from _harness import PeakRSS  # noqa: E402


def _noop(i):
    return i


def run(quick: bool) -> list[dict]:
    from _batch_dataset import build_dataset

    from fieldfix.batch import run_batch

    work = Path(tempfile.mkdtemp(prefix="fieldfix-bench-batch-"))
    # full size: a typical EPI matrix (64 x 64 x 32) with a short run of 40 volumes
    shape = (24, 24, 12) if quick else (64, 64, 32)
    volumes = 4 if quick else 40
    extra = 1 if quick else 5
    root = build_dataset(work / "raw", shape=shape, n_volumes=volumes, broken=False,
                         extra_subjects=extra)
    counter = iter(range(1000))

    def batch(jobs):
        def call():
            summary = run_batch(root, work / f"out{next(counter)}", jobs=jobs)
            if summary.exit_status != 0:
                raise RuntimeError(f"batch failed: {summary.failures}")
            return summary
        return call

    def timed_cli(jobs):
        # each run is a fresh `fieldfix batch` process, as a user runs it: imports, numba
        # cache loads and matplotlib start-up are paid by jobs=1 and by each worker alike
        import subprocess

        exe = Path(sys.executable).with_name("fieldfix")
        out = work / f"cli{next(counter)}"
        start = time.perf_counter()
        done = subprocess.run([str(exe), "batch", str(root), "--out", str(out), "--jobs",
                               str(jobs), "--quiet"], capture_output=True, text=True)
        seconds = time.perf_counter() - start
        if done.returncode != 0:
            raise RuntimeError(f"batch failed: {done.stderr[-2000:]}")
        return seconds

    load_before = os.getloadavg()[0]
    timed_cli(1)  # warm-up: numba caches on disk, file cache
    ones, twos = [], []
    for _ in range(1 if quick else 3):  # alternating pairs; the medians are compared
        ones.append(timed_cli(1))
        twos.append(timed_cli(2))
    one_s, two_s = statistics.median(ones), statistics.median(twos)
    summary = run_batch(root, work / "count", jobs=1)
    rec = {
        "benchmark": "batch_jobs2_vs_jobs1",
        "ours_s": two_s, "baseline": "fieldfix batch --jobs 1", "baseline_s": one_s,
        "ratio": one_s / two_s,
        "goal": ">= 1.7x faster with --jobs 2 on 2 cores", "met": one_s / two_s >= 1.7,
        "runs_jobs1_s": [round(x, 2) for x in ones], "runs_jobs2_s": [round(x, 2) for x in twos],
        "grid": "x".join(map(str, shape)), "volumes": volumes,
        "tasks": sum(summary.tasks.values()),
        "peak_process_mib": resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0,
        # other work on the machine makes the ratio meaningless: record the load
        "load_avg_1min_before": load_before, "load_avg_1min_after": os.getloadavg()[0],
    }
    records = [rec]

    # dask: per-task overhead on a fully finished batch (tasks only hash and check markers)
    from distributed import LocalCluster

    finished = work / "finished"
    run_batch(root, finished, jobs=1)
    start = time.perf_counter()
    local = run_batch(root, finished, jobs=1)
    local_s = time.perf_counter() - start
    n_tasks = local.tasks["reused"]
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                      dashboard_address=None) as cluster:
        run_batch(root, finished, scheduler=cluster.scheduler_address)  # workers import
        with PeakRSS() as memory:
            start = time.perf_counter()
            on_dask = run_batch(root, finished, scheduler=cluster.scheduler_address)
            dask_s = time.perf_counter() - start
        start = time.perf_counter()
        fresh = run_batch(root, work / "dask_fresh", scheduler=cluster.scheduler_address)
        dask_fresh_s = time.perf_counter() - start
        # pure scheduling cost: round trips of no-op tasks through the same executor API
        from distributed import Client

        with Client(cluster.scheduler_address) as client:
            executor = client.get_executor(pure=False)
            list(executor.map(_noop, range(20)))
            n_noop = 200
            start = time.perf_counter()
            futures = [executor.submit(_noop, i) for i in range(n_noop)]
            assert [f.result() for f in futures] == list(range(n_noop))
            noop_s = time.perf_counter() - start
    assert on_dask.tasks["reused"] == n_tasks and fresh.exit_status == 0
    records.append({
        "benchmark": "batch_dask_overhead",
        "tasks": n_tasks,
        "in_process_s": local_s,
        "dask_s": dask_s,
        "finished_batch_per_task_ms": 1000.0 * dask_s / max(n_tasks, 1),
        "noop_round_trip_per_task_ms": 1000.0 * noop_s / n_noop,
        "dask_fresh_batch_s": dask_fresh_s,
        "dask_fresh_vs_cli_jobs1_ratio": rec["baseline_s"] / dask_fresh_s,
        "driver_peak_mib": memory.peak_mib,
        "goal": "scheduling overhead per task small against a task's run time",
    })
    return records
