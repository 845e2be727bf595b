"""Generated datasets shared by several test modules (built once per test session)."""

from __future__ import annotations

import functools
import tempfile
from pathlib import Path

from fitrank.generate import generate_dataset, write_dataset
from fitrank.graph import Dataset
from fitrank.tables import load_dataset

# every generated dataset lives under one folder, removed when the test session's interpreter exits
_SCRATCH = tempfile.TemporaryDirectory(prefix="fitrank-tests-")


@functools.lru_cache(maxsize=None)
def generated(kind: str, nodes: int = 2000, seed: int = 11, **options) -> tuple[Dataset, dict, Path]:
    """(dataset, truth, folder) of a generated dataset, written to and read back from files."""
    edges, pairs, truth = generate_dataset(nodes, seed, kind, **options)
    folder = Path(tempfile.mkdtemp(prefix=f"{kind}-", dir=_SCRATCH.name))
    write_dataset(folder, edges, pairs, truth)
    return load_dataset(folder / "edges.csv", folder / "pairs.csv"), truth, folder
