"""Shared timing helper of the benchmark scripts (run as `python benchmarks/NAME.py`)."""

import time


def best_of(fn, repeat: int) -> float:
    """The shortest of ``repeat`` wall-clock timings of ``fn()``, s (best of N on a shared machine)."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)
