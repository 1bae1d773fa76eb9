"""Timing helper shared by the benchmarks (run them as ``python benchmarks/NAME.py``)."""

import time


def best_of(fn, repeats: int) -> float:
    """Fastest of ``repeats`` calls of ``fn``, in seconds (the least disturbed by other load)."""
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best
