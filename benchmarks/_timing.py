"""Timing helper shared by the benchmark scripts (run from the project root)."""

from __future__ import annotations

import statistics
import time


def median_time(fn, repeats: int) -> float:
    """Median wall-clock seconds of ``fn()`` over ``repeats`` calls."""
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t)
    return statistics.median(times)
