"""Shared helpers for benchmarks: same-run baselines, timing and peak memory.

A benchmark module ``benchmarks/bench_<topic>.py`` defines ``run(quick: bool) -> list[dict]``;
each dict is one measurement made with :func:`measure` / :func:`compare` (or built by hand
with the same keys). Goals are printed and recorded, never asserted: speed is compared as a
ratio against a baseline computed in the same process, so the numbers hold on any machine.
"""

from __future__ import annotations

import gc
import os
import resource
import threading
import time
import tracemalloc
from typing import Callable


def rss_mib() -> float:
    """Current resident set size of this process in MiB (from /proc, Linux)."""
    try:
        with open("/proc/self/statm") as handle:
            pages = int(handle.read().split()[1])
        return pages * os.sysconf("SC_PAGE_SIZE") / 2**20
    except OSError:
        return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


class PeakRSS:
    """Context manager sampling the process RSS in a thread; ``.peak_mib`` is the rise above the start."""

    def __init__(self, interval_s: float = 0.005):
        self.interval_s = interval_s
        self.peak_mib = 0.0

    def __enter__(self):
        gc.collect()
        self._start = rss_mib()
        self._top = self._start
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, daemon=True)
        self._thread.start()
        return self

    def _sample(self):
        while not self._stop.is_set():
            self._top = max(self._top, rss_mib())
            time.sleep(self.interval_s)

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self._top = max(self._top, rss_mib())
        self.peak_mib = self._top - self._start
        return False


def timed(function: Callable, *, repeat: int = 1, warmup: int = 0):
    """Best wall time in seconds of `repeat` calls (after `warmup` calls), the last result, and peak memory.

    Times are taken with no memory tracing running (tracemalloc slows every Python-level
    allocation and would inflate the faster side most); the peak memory comes from one more
    call made with tracing on.

    Returns
    -------
    seconds : float
    result : object
    peak_mib : float
        Largest rise of the process RSS during the traced call, or tracemalloc's peak when
        larger (numpy/numba allocations included, unlike tracemalloc alone).
    """
    for _ in range(warmup):
        function()
    best = float("inf")
    result = None
    for _ in range(repeat):
        start = time.perf_counter()
        result = function()
        best = min(best, time.perf_counter() - start)
    with PeakRSS() as memory:
        tracemalloc.start()
        function()
        _, traced_peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    return best, result, max(memory.peak_mib, traced_peak / 2**20)


def compare(name: str, ours: Callable, baseline: Callable, *, baseline_name: str, goal: str,
            goal_ratio: float | None = None, repeat: int = 1, warmup: int = 1, extra: dict | None = None) -> dict:
    """Time `ours` and `baseline` in this process and report baseline_time / our_time.

    A ratio above 1 means fieldfix is faster. `goal_ratio`, when given, is the ratio the
    goal asks for; ``met`` says whether it was reached.
    """
    our_s, our_result, our_mib = timed(ours, repeat=repeat, warmup=warmup)
    base_s, base_result, base_mib = timed(baseline, repeat=repeat, warmup=warmup)
    record = {
        "benchmark": name,
        "ours_s": our_s,
        "baseline": baseline_name,
        "baseline_s": base_s,
        "ratio": base_s / our_s if our_s > 0 else float("inf"),
        "ours_peak_mib": our_mib,
        "baseline_peak_mib": base_mib,
        "goal": goal,
    }
    if goal_ratio is not None:
        record["met"] = bool(record["ratio"] >= goal_ratio)
    if extra:
        record.update(extra)
    record["_results"] = (our_result, base_result)
    return record


def main(run: Callable, doc: str | None, quick_help: str) -> None:
    """Command line of one benchmark module: ``--quick`` (`quick_help`), each record printed.

    Records' private entries (keys starting with ``_``, e.g. raw results) are left out.
    """
    import argparse

    parser = argparse.ArgumentParser(description=doc, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--quick", action="store_true", help=quick_help)
    for record in run(parser.parse_args().quick):
        print({key: value for key, value in record.items() if not key.startswith("_")})
