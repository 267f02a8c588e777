"""Small timing helpers shared by benchmarks (median of repeats, perf_counter)."""

from __future__ import annotations

import statistics
import time
from typing import Callable

__all__ = ["median_time", "print_row"]


def median_time(fn: Callable[[], object], repeat: int = 5) -> float:
    """Median wall time (s) of ``repeat`` calls of ``fn``."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return statistics.median(times)


def print_row(label: str, value: str) -> None:
    print(f"  {label:<58} {value}")
