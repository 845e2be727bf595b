"""The pipeline's full check and summary on graphs whose PageRank ties nodes exactly."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest

from fitrank.pipeline import fit, summary_lines

FAST = ["reduction.samples=8", "training.steps=10", "check.enrich_rounds=1", "output.plots=false"]


def _star(tmp_path: Path, leaves: int = 150) -> Path:
    """A hub linked both ways with every leaf: by symmetry PageRank gives all leaves one value."""
    rows = [f"{leaf},0,up" for leaf in range(1, leaves + 1)] + [f"0,{leaf},down" for leaf in range(1, leaves + 1)]
    (tmp_path / "edges.csv").write_text("source,target,relation\n" + "\n".join(rows) + "\n")
    pairs = [f"0,{leaf},train" for leaf in range(1, 11)] + [f"{leaf},{leaf + 1},valid" for leaf in range(20, 25)]
    (tmp_path / "pairs.csv").write_text("preferred,other,split\n" + "\n".join(pairs) + "\n")
    config = tmp_path / "star.toml"
    config.write_text(f'[data]\nedges = "{tmp_path / "edges.csv"}"\npairs = "{tmp_path / "pairs.csv"}"\n'
                      f'[output]\nfolder = "{tmp_path / "out"}"\n')
    return config


@pytest.fixture(scope="module")
def star_fit(tmp_path_factory):
    config = _star(tmp_path_factory.mktemp("star"))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = fit(config, overrides=FAST, write=False, progress=False, log=lambda m: None)
    return result, [w for w in caught if issubclass(w.category, RuntimeWarning)]


def test_check_passes_when_the_reduced_model_only_reorders_exact_ties(star_fit):
    result, _ = star_fit
    leaves = result.x[result.problem.graph.node_ids != 0]
    assert np.ptp(leaves) <= 1e-12 * leaves.max()  # the premise: the full solve ties the leaves
    check = result.record["check"]
    assert check["l1_error"] < 1e-8, check  # the reduced vector is as exact as the full one
    # Kendall tau must not judge the order that rounding gives nodes the full solve ties
    assert check["tau_topk"] == pytest.approx(1.0), check
    assert check["passed"] and check["rounds"] == 1, check


def test_a_fit_that_takes_no_step_prints_no_warning(star_fit):
    result, runtime_warnings = star_fit
    # every leaf scores alike under every theta, so the hub-over-leaf pairs give no gradient
    assert result.record["rounds"][0]["steps"] == 0
    assert runtime_warnings == [], [str(w.message) for w in runtime_warnings]
    assert result.record["timings"]["online_step_s"] is None


def test_check_with_an_undefined_tau_uses_l1_and_the_summary_says_n_a(tmp_path):
    # top_k = 1: Kendall tau of one node is undefined (NaN); the order check has nothing to judge
    result = fit(_star(tmp_path), overrides=FAST + ["check.top_k=1"], write=False, progress=False,
                 log=lambda m: None)
    check = result.record["check"]
    assert check["tau_topk"] is None and check["passed"], check
    line = next(line for line in summary_lines(result) if line.startswith("full check"))
    assert "Kendall tau@1 n/a" in line and "passed after 1 round(s)" in line, line
