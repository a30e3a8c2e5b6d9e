"""Batch runs: speed-up of two local worker processes over one, and dask overhead per task.

* ``batch_jobs2_vs_jobs1``: the whole invented dataset (tests/_batch_dataset.py, without
  the broken subject, plus extra subjects) corrected from scratch with ``jobs=2``
  against ``jobs=1`` (ratio = time with 1 / time with 2; goal >= 1.7 on 2 cores).
  Process start-up, imports in the workers and loading numba caches are part of the
  ``jobs=2`` time, as they are for a user.
* ``batch_dask_overhead``: the same batch re-run when every task is already finished
  (each task only hashes its inputs and checks its marker) on a dask LocalCluster with
  two worker processes against in-process; the difference divided by the number of
  tasks is the scheduling overhead per task.

Peak memory is that of this (driving) process; the workers' memory is not included.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
sys.path.insert(0, str(HERE.parent / "tests"))

from _harness import PeakRSS, compare  # noqa: E402


def run(quick: bool) -> list[dict]:
    from _batch_dataset import build_dataset

    from fieldfix.batch import run_batch

    work = Path(tempfile.mkdtemp(prefix="fieldfix-bench-batch-"))
    shape = (24, 24, 12) if quick else (48, 48, 24)
    volumes = 4 if quick else 12
    extra = 1 if quick else 5
    root = build_dataset(work / "raw", shape=shape, n_volumes=volumes, broken=False,
                         extra_subjects=extra)
    counter = iter(range(1000))

    def batch(jobs):
        def call():
            summary = run_batch(root, work / f"out{next(counter)}", jobs=jobs)
            if summary["exit_status"] != 0:
                raise RuntimeError(f"batch failed: {summary['failures']}")
            return summary
        return call

    records = []
    rec = compare("batch_jobs2_vs_jobs1", batch(2), batch(1), baseline_name="jobs=1 (in-process)",
                  goal=">= 1.7x faster with --jobs 2 on 2 cores", goal_ratio=1.7, repeat=1,
                  warmup=1, extra={"grid": "x".join(map(str, shape)), "volumes": volumes})
    summary = rec["_results"][0]
    rec["tasks"] = sum(summary["tasks"].values())
    records.append(rec)

    # dask: per-task overhead on a fully finished batch (tasks only hash and check markers)
    from distributed import LocalCluster

    finished = work / "finished"
    run_batch(root, finished, jobs=1)
    start = time.perf_counter()
    local = run_batch(root, finished, jobs=1)
    local_s = time.perf_counter() - start
    n_tasks = local["tasks"]["reused"]
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
    assert on_dask["tasks"]["reused"] == n_tasks and fresh["exit_status"] == 0
    records.append({
        "benchmark": "batch_dask_overhead",
        "tasks": n_tasks,
        "in_process_s": local_s,
        "dask_s": dask_s,
        "overhead_per_task_ms": 1000.0 * (dask_s - local_s) / max(n_tasks, 1),
        "dask_fresh_batch_s": dask_fresh_s,
        "dask_fresh_vs_jobs1_ratio": rec["baseline_s"] / dask_fresh_s,
        "driver_peak_mib": memory.peak_mib,
        "goal": "scheduling overhead per task small against a task's run time",
    })
    return records
