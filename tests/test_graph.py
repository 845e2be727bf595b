"""build_graph is public: arrays from Python code get the loader's standard of clear, early errors."""

from __future__ import annotations

import numpy as np
import pytest

from fitrank.errors import FitrankInputError
from fitrank.graph import build_graph, check_teleport

GOOD = {"src": np.array([0, 1, 2]), "dst": np.array([1, 2, 0]), "n": 3}


@pytest.mark.parametrize("change, message", [
    ({"n": 0}, r"n = 0; expected a whole number >= 1"),
    ({"n": "three"}, r"n = 'three'; expected a whole number"),
    ({"dst": np.array([1, 2, 5])}, r"dst\[2\] is 5; node indices must be whole numbers in \[0, 3\)"),
    ({"src": np.array([0, -1, 2])}, r"src\[1\] is -1; node indices"),
    ({"src": np.array([0, 0.5, 2])}, r"src\[1\] is 0.5; node indices"),
    ({"src": np.array(["a", "b", "c"])}, r"src must be a 1-D array of node indices, got dtype <U1"),
    ({"dst": np.array([1, 2])}, r"src has 3 entries and dst 2"),
    ({"base": np.array([1.0, -2.0, 1.0])}, r"base\[1\] is -2.0; base weights must be finite numbers > 0"),
    ({"base": np.array([1.0, 1.0, np.nan])}, r"base has a non-finite value on edge 2"),
    ({"base": np.ones(4)}, r"base has shape \(4,\); expected 3 rows, one per edge"),
    ({"relation": np.array([0, 3, 1]), "relation_names": ("a", "b")}, r"relation\[1\] is 3; relation codes"),
    ({"features": np.ones((2, 1)), "feature_names": ("f",)}, r"features has shape \(2, 1\); expected 3 rows"),
    ({"features": np.ones((3, 2)), "feature_names": ("f",)}, r"features has 2 columns but 1 feature_names"),
    ({"features": np.array([1.0, np.inf, 0.0]), "feature_names": ("f",)}, r"features has a non-finite value on edge 1"),
    ({"node_ids": np.array(["a", "b"])}, r"node_ids has 2 entries; expected n = 3"),
    ({"teleport": np.array([0.0, 0.0, 0.0])}, r"teleport vector is all zero"),
])
def test_bad_arrays_are_refused_with_what_to_fix(change, message):
    with pytest.raises(FitrankInputError, match="build_graph: " + message if "teleport" not in change else message):
        build_graph(**{**GOOD, **change})


def test_whole_floats_are_node_indices_and_teleport_is_normalised():
    graph = build_graph(np.array([0.0, 1.0, 2.0]), np.array([1.0, 2.0, 0.0]), 3.0, teleport=np.array([1.0, 1.0, 2.0]))
    assert graph.n == 3 and graph.src.dtype == np.int64
    np.testing.assert_array_equal(graph.teleport, [0.25, 0.25, 0.5])
    assert sorted(zip(graph.src, graph.dst)) == [(0, 1), (1, 2), (2, 0)]


def test_teleport_weights_keep_their_ratios_even_when_their_sum_would_overflow():
    np.testing.assert_allclose(check_teleport([1e308, 1e308, 5e307], 3), [0.4, 0.4, 0.2], rtol=1e-15)
    np.testing.assert_allclose(check_teleport([1e-320, 0.0, 3e-320], 3), [0.25, 0.0, 0.75], rtol=1e-3)  # subnormal
    with pytest.raises(FitrankInputError, match="all zero"):
        check_teleport([0.0, 0.0], 2)
