"""Typed errors survive a trip through pickle, as they must to come back from a worker process."""

from __future__ import annotations

import pickle

import pytest

from fitrank.errors import ConfigError, ConvergenceError, DataError, ModelMismatchError


@pytest.mark.parametrize("error", [
    DataError("edges.csv", "unknown node 'x'", row=7, column="source"),
    DataError("pairs.csv", "no such file"),
    ConfigError("reduction.samples", "must be at least 1", source="run.toml"),
    ConvergenceError("PageRank solve", 10_000, 3.7e-17, 2.1e-16, 1e-30),
    ModelMismatchError("m.npz: built for other data"),
])
def test_an_error_unpickles_whole(error):
    # a ProcessPoolExecutor pickles a worker's exception and rebuilds it here; an error whose constructor
    # takes more than its message broke the pool ("BrokenProcessPool") and lost its own words
    again = pickle.loads(pickle.dumps(error))
    assert type(again) is type(error) and str(again) == str(error)
    assert vars(again) == vars(error)
