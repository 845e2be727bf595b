"""fitrank: learn edge-weight parameters so that PageRank agrees with preference pairs.

Public names are imported on first use, so ``import fitrank`` stays cheap (no JAX).
"""

from __future__ import annotations

import importlib

__version__ = "0.1.0"

_PUBLIC = {
    "Graph": "fitrank.graph",
    "Pairs": "fitrank.graph",
    "Dataset": "fitrank.graph",
    "build_graph": "fitrank.graph",
    "load_dataset": "fitrank.tables",
    "read_edges": "fitrank.tables",
    "read_pairs": "fitrank.tables",
    "FitrankInputError": "fitrank.errors",
    "DataError": "fitrank.errors",
    "ConfigError": "fitrank.errors",
    "fit": "fitrank.pipeline",
    "summary_lines": "fitrank.pipeline",
    "FitResult": "fitrank.pipeline",
    "load_config": "fitrank.config",
    "make_weighting": "fitrank.weightings",
    "pagerank": "fitrank.pagerank",
    "PageRankProblem": "fitrank.pagerank",
    "ReductionSettings": "fitrank.reduced",
    "build_reduced_model": "fitrank.reduced",
    "load_reduced_model": "fitrank.reduced",
}

__all__ = ["__version__", *_PUBLIC]


def __getattr__(name: str):
    module = _PUBLIC.get(name)
    if module is None:
        raise AttributeError(f"module 'fitrank' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(__all__)
