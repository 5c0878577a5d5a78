"""Timing helper shared by the benchmarks (medians of repeats, one process)."""
from __future__ import annotations

import statistics
import time


def median_time(fn, repeats: int):
    """Median wall time [s] of ``repeats`` calls of ``fn`` and the last call's result."""
    times, out = [], None
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times), out
