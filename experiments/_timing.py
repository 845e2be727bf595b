"""Timing helpers shared by the benchmark scripts (scripts put their own folder on sys.path)."""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

# the benchmarks run from a checkout, installed or not
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def median_seconds(fn, repeats: int) -> float:
    """Median wall time of ``fn()`` over ``repeats`` calls."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return float(np.median(times))
