"""The held-out check of a reduced model, against an independent comparison with full solves."""

from __future__ import annotations

import functools
from dataclasses import replace

import numpy as np
import pytest
from scipy.stats import kendalltau

from fitrank.heldout import fresh_points, held_out_check
from fitrank.metrics import top_k
from fitrank.pagerank import PageRankProblem
from fitrank.reduced import ReductionSettings
from fitrank.regions import build_model
from fitrank.weightings import make_weighting

from tests._datasets import generated


@functools.lru_cache(maxsize=None)
def _problem(kind: str) -> PageRankProblem:
    dataset, _, _ = generated(kind)
    return PageRankProblem(dataset.graph, make_weighting(kind, dataset.graph))


@functools.lru_cache(maxsize=None)
def _model(kind: str, rank: int | None = None, regions: int = 1):
    settings = ReductionSettings(samples=48, rank=rank, regions=regions)
    return build_model(_problem(kind), settings, progress=False)


def test_fresh_points_continue_the_build_sequence_and_avoid_its_samples():
    model = _model("scale")
    points = fresh_points(model, 5)
    assert points.shape == (5, model.thetas.shape[1])
    distance = np.abs(points[:, None, :] - model.thetas[None, :, :]).max(axis=2)
    assert distance.min() > 1e-6  # none is a snapshot
    np.testing.assert_array_equal(points, fresh_points(model, 5))  # the same build checks the same points
    # they are the next terms of the sequence the build sampled, so they stay inside its domain
    sequence = model.problem.weighting.sample(model.settings.samples + 5, seed=model.settings.seed)
    np.testing.assert_array_equal(sequence[:model.settings.samples], model.thetas)
    np.testing.assert_array_equal(sequence[model.settings.samples:], points)


@pytest.mark.parametrize("kind, regions", [("scale", 1), ("features", 1), ("mixture", 2)])
def test_held_out_check_agrees_with_an_independent_comparison(kind, regions):
    model = _model(kind, regions=regions)
    check = held_out_check(model, 3, top_k=50, tol=1e-12, progress=False)
    assert check.thetas.shape[0] == 3
    for i, theta in enumerate(check.thetas):
        # the reference: a full solve through the problem's own entry point, tau-b from
        # scipy.stats.kendalltau (its default variant) and L1 by hand on the full solution's top 50
        x = model.problem.solve(theta, tol=1e-12).x
        y = model.vector(theta)
        top = top_k(x, 50)
        assert check.tau[i] == pytest.approx(kendalltau(x[top], y[top]).statistic, abs=1e-12)
        assert check.l1[i] == pytest.approx(np.abs(x[top] - y[top]).sum() / x[top].sum(), rel=1e-6)
        assert check.error[i] == pytest.approx(np.abs(x - y).sum(), rel=1e-6)
        assert check.error[i] <= check.bound[i]  # the certified bound holds
    summary = check.summary()
    assert summary["tau_topk_min"] == check.tau.min() and summary["l1_topk_max"] == check.l1.max()
    assert summary["passed"] == bool((check.tau >= 0.999).all() and (check.l1 <= 1e-3).all())


def test_held_out_check_fails_a_basis_too_small_and_passes_a_good_one():
    small = held_out_check(_model("scale", rank=2), 4, progress=False)
    assert not small.passed and small.tau.min() < 0.999
    good = held_out_check(_model("scale"), 4, progress=False)
    # 48 samples give k near 30 on this 2,000-node graph: the test sets of the reduced-model
    # module ask the same accuracy (tau >= 0.999, L1 <= 1e-3) of such models
    assert good.passed, good.summary()


def test_held_out_check_reports_the_nodes_it_compared():
    model = _model("scale", rank=8)
    assert held_out_check(model, 1, top_k=10 ** 6, progress=False).top_k == model.problem.graph.n


def test_held_out_check_needs_a_point():
    with pytest.raises(ValueError, match="at least one point"):
        held_out_check(_model("scale"), 0, progress=False)



def test_a_loose_tolerance_cannot_loosen_the_check_and_nan_is_never_the_worst():
    # the reference solve is never looser than REFERENCE_TOL: else close pairs would go unchecked
    model = _model("scale", rank=2)
    loose = held_out_check(model, 2, tol=1e-2, progress=False)
    tight = held_out_check(model, 2, tol=1e-10, progress=False)
    np.testing.assert_array_equal(loose.tau, tight.tau)
    assert not loose.passed
    summary = replace(tight, tau=np.array([np.nan, 0.5])).summary()
    assert summary["tau_topk_min"] == 0.5
