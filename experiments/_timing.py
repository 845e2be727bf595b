"""Timing helpers shared by the benchmark scripts (scripts put their own folder on sys.path)."""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

# the benchmarks run from a checkout, installed or not
sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

_scratch: list[tempfile.TemporaryDirectory] = []


def scratch_folder(prefix: str) -> Path:
    """A new temporary folder for generated data, removed when the script exits (normally or by an error).

    A full-size run writes a few hundred MB of generated graphs; left in the
    temporary directory, every run would add its own copy.
    """
    folder = tempfile.TemporaryDirectory(prefix=prefix)
    _scratch.append(folder)  # kept alive until exit, when its finalizer removes it
    return Path(folder.name)


def median_seconds(fn, repeats: int) -> float:
    """Median wall time of ``fn()`` over ``repeats`` calls."""
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return float(np.median(times))
