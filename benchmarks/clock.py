"""Timing shared by the benchmark scripts (run as ``python benchmarks/NAME.py``)."""

import time


def best(fn, repeats):
    """Shortest wall time of ``repeats`` calls of ``fn()``, seconds."""
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)
