"""The pipeline's full check and summary on graphs whose PageRank ties nodes exactly."""

from __future__ import annotations

import warnings
from pathlib import Path

import numpy as np
import pytest

from fitrank.pipeline import fit, summary_lines

FAST = ["reduction.samples=8", "training.steps=10", "check.enrich_rounds=1", "output.plots=false"]


def _star(tmp_path: Path, leaves: int = 150, valid=tuple((leaf, leaf + 1) for leaf in range(20, 25))) -> Path:
    """A hub linked both ways with every leaf: by symmetry PageRank gives all leaves one value.

    The training pairs put the hub above leaves 1-10; ``valid``: (preferred, other) validation pairs.
    """
    rows = [f"{leaf},0,up" for leaf in range(1, leaves + 1)] + [f"0,{leaf},down" for leaf in range(1, leaves + 1)]
    (tmp_path / "edges.csv").write_text("source,target,relation\n" + "\n".join(rows) + "\n")
    pairs = [f"0,{leaf},train" for leaf in range(1, 11)] + [f"{a},{b},valid" for a, b in valid]
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


def test_pairs_of_tied_leaves_count_one_half_in_both_accuracies(tmp_path):
    # At damping 0.5 the solver picks Gauss-Seidel sweeps, which update the hub between leaves: the leaves'
    # values then differ by rounding (7e-14 here) though by symmetry they are equal. The validation pairs
    # join leaves (every pair of leaves 1-40, the lower id preferred), so no order is sure: each is a coin
    # flip (1/2), for the full and the reduced scores alike.
    valid = [(a, b) for a in range(1, 41) for b in range(a + 1, 41)]
    result = fit(_star(tmp_path, valid=valid), overrides=FAST + ["graph.damping=0.5"], write=False,
                 progress=False, log=lambda m: None)
    leaves = result.x[result.problem.graph.node_ids != 0]
    assert 0 < np.ptp(leaves) <= 1e-12, np.ptp(leaves)  # the premise: equal values, apart from rounding
    metrics = result.record["metrics"]
    assert metrics["full"]["valid"]["accuracy"] == 0.5, metrics
    assert metrics["reduced"]["valid"]["accuracy"] == 0.5, metrics


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


def test_a_top_k_beyond_the_graph_is_reported_as_the_nodes_compared(tmp_path):
    # the star has 151 nodes: tau@5000 would name 4,849 nodes that do not exist
    result = fit(_star(tmp_path), overrides=FAST + ["check.top_k=5000"], write=False, progress=False,
                 log=lambda m: None)
    assert result.record["check"]["top_k"] == 151
    line = next(line for line in summary_lines(result) if line.startswith("full check"))
    assert "tau@151 " in line and "5000" not in line, line


def test_the_summary_says_when_training_stopped_on_values_that_were_not_finite(tmp_path):
    # ann has no in-edge, so it ranks last at theta0: both training pairs are misordered there, and at a
    # temperature of 1e-300 their logistic losses' gradients overflow: no step can be taken
    (tmp_path / "edges.csv").write_text("source,target,relation,weight\nann,bo,x,1\nann,bo,y,1\nbo,bo,x,1\n"
                                        "bo,cy,y,2\n")
    (tmp_path / "pairs.csv").write_text("preferred,other,split\nann,cy,train\nann,bo,train\n")
    config = tmp_path / "tiny.toml"
    config.write_text(f'[data]\nedges = "{tmp_path / "edges.csv"}"\npairs = "{tmp_path / "pairs.csv"}"\n'
                      '[weighting]\nkind = "scale"\n[training]\nloss = "logistic"\n')
    result = fit(config, overrides=FAST + ["training.temperature=1e-300"], write=False, progress=False,
                 log=lambda m: None)
    assert result.record["rounds"][0]["stopped_because"] == "non_finite"
    note = [line for line in summary_lines(result) if "not finite" in line]
    assert note and note[0].startswith("note: training round 0 stopped after 0 step(s)"), summary_lines(result)


def test_the_summary_says_when_training_pairs_are_ties_of_the_full_solve(tmp_path):
    # leaves of the star are symmetric, so pairs between them tie exactly at every theta
    config = _star(tmp_path)
    (tmp_path / "pairs.csv").write_text("preferred,other,split\n" + "".join(f"{leaf},{leaf + 1},train\n"
                                                                           for leaf in range(1, 13))
                                        + "0,20,train\n0,21,train\n")
    result = fit(config, overrides=FAST, write=False, progress=False, log=lambda m: None)
    assert result.record["check"]["train_pairs_tied"] == 12
    note = [line for line in summary_lines(result) if "count as ties" in line]
    assert note == ["note: 12 of 14 training pairs differ by less than the full solve's certified error at the "
                    "learned parameters: they count as ties, and no solve can order them there"]


@pytest.mark.parametrize("valid, kept", [("bo,cy", True), ("cy,bo", False)])
def test_the_summary_says_when_validation_kept_theta0(tmp_path, valid, kept):
    # bo over cy reverses a training pair, so every step that fits the training pairs loses it and the
    # best-validation rule keeps theta0; cy over bo agrees with them, and the steps are kept
    (tmp_path / "edges.csv").write_text("source,target,relation,weight\nann,bo,x,1\nann,bo,y,1\nbo,bo,x,1\n"
                                        "bo,cy,y,2\n")
    (tmp_path / "pairs.csv").write_text("preferred,other,split\ncy,ann,train\nbo,ann,train\ncy,bo,train\n"
                                        f"{valid},valid\n")
    config = tmp_path / "tiny.toml"
    config.write_text(f'[data]\nedges = "{tmp_path / "edges.csv"}"\npairs = "{tmp_path / "pairs.csv"}"\n'
                      '[weighting]\nkind = "scale"\n')
    result = fit(config, overrides=FAST, write=False, progress=False, log=lambda m: None)
    assert result.record["rounds"][0]["steps"] > 0
    assert (result.record["params"] == result.record["theta0"]) == kept
    assert any("stay at theta0" in line for line in summary_lines(result)) == kept, summary_lines(result)


def test_the_summary_names_parameters_the_normalisation_cancels(star_fit):
    # every node of the star sends all its edges by one relation (leaves: up, hub: down), so neither
    # relation's scale can change the walk (fitrank.weightings.inert_parameters)
    result, _ = star_fit
    assert result.record["inert_parameters"] == ["scale:down", "scale:up"]
    assert any(line.startswith("note: scale:down, scale:up cannot change the walk") for line in summary_lines(result))
