"""Timing helpers shared by the benchmarks (run as scripts, so this folder is on sys.path)."""
from __future__ import annotations

import statistics
import time


def min_time(fn, repeats: int = 1, *, warmup: bool = False) -> float:
    """Smallest wall time of ``repeats`` calls (after one untimed call when ``warmup``)."""
    if warmup:
        fn()
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def interleaved_medians(fns: dict, repeats: int, clock=time.perf_counter) -> dict:
    """Median time of each function, calling them in turn so that load spikes hit all alike (one warm-up each)."""
    for fn in fns.values():
        fn()
    times: dict = {name: [] for name in fns}
    for _ in range(repeats):
        for name, fn in fns.items():
            t0 = clock()
            fn()
            times[name].append(clock() - t0)
    return {name: statistics.median(ts) for name, ts in times.items()}
