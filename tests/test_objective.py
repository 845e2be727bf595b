"""The pair objective: value by hand, gradients against finite differences, and
the reduced route (JAX autodiff through an exact dense solve) against the full
route (sparse solve + adjoint)."""

import math

import jax.numpy as jnp
import networkx as nx
import numpy as np
import pytest

from _dense_scorer import dense_scorer, tiny_problem
from fitrank.errors import FitrankInputError
from fitrank.graph import Pairs
from fitrank.metrics import pair_accuracy
from fitrank.objective import (AUTO_FRACTION, ObjectiveSpec, batch_arrays, calibrate, full_objective, localize,
                               pair_summary, reduced_objective, x_space_loss)

SPECS = [ObjectiveSpec("logistic", 0.5, 0.01), ObjectiveSpec("sigmoid", 0.3, 0.0),
         ObjectiveSpec("squared_hinge", 0.2, 0.1)]


@pytest.fixture(scope="module")
def problem():
    return tiny_problem(n=40, num_pairs=300, seed=5)


@pytest.fixture(scope="module")
def train(problem):
    return problem.pairs.subset("train")


def _dense_x(problem, theta):
    scorer = dense_scorer(problem.graph, problem.weighting, np.arange(problem.graph.n))
    return np.asarray(scorer.fn(jnp.asarray(theta), scorer.arrays))


def test_dense_stand_in_matches_networkx(problem):
    # Reference: networkx.pagerank on the same weighted graph (weights b * exp(theta_rel),
    # dangling mass to the teleport vector), an implementation outside fitrank.
    theta = np.array([0.4, -0.3, 0.9])
    g = problem.graph
    weights = g.base * np.exp(theta[g.relation])
    digraph = nx.DiGraph()
    digraph.add_nodes_from(range(g.n))
    for s, d, w in zip(g.src, g.dst, weights):
        old = digraph.get_edge_data(int(s), int(d), {"weight": 0.0})["weight"]
        digraph.add_edge(int(s), int(d), weight=old + w)
    reference = nx.pagerank(digraph, alpha=0.85, weight="weight", tol=1e-14, max_iter=10_000)
    expected = np.array([reference[i] for i in range(g.n)])
    assert np.abs(_dense_x(problem, theta) - expected).sum() < 1e-9


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.loss)
def test_value_by_hand(problem, train, spec):
    theta = np.array([0.3, -0.2, 0.1])
    x = _dense_x(problem, theta)
    n = problem.graph.n
    z = n * x[train.other] - n * x[train.preferred]
    param = spec.loss_param
    per_pair = {"logistic": np.log1p(np.exp(z / param)), "sigmoid": 1.0 / (1.0 + np.exp(-z / param)),
                "squared_hinge": np.maximum(0.0, z + param) ** 2}[spec.loss]
    theta0 = np.array([0.1, 0.1, 0.0])
    expected = np.dot(train.weight, per_pair) / train.weight.sum() + spec.regularization * np.sum((theta - theta0) ** 2)
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    objective = reduced_objective(scorer, train, spec, n=n, theta0=theta0)
    value, _ = objective(theta)
    assert value == pytest.approx(expected, rel=1e-12)
    assert float(objective.value(jnp.asarray(theta), objective.arrays)) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.loss)
def test_reduced_gradient_matches_central_differences(problem, train, spec):
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    objective = reduced_objective(scorer, train, spec, n=problem.graph.n, theta0=np.zeros(3))
    theta = np.array([0.5, -0.4, 0.2])
    _, grad = objective(theta)
    h = 1e-5
    numeric = np.array([(objective(theta + h * e)[0] - objective(theta - h * e)[0]) / (2 * h) for e in np.eye(3)])
    # Central differences, truncation O(h^2) (common practice).
    assert grad == pytest.approx(numeric, rel=1e-6, abs=1e-9)


@pytest.mark.parametrize("spec", SPECS, ids=lambda s: s.loss)
def test_full_route_equals_reduced_route_on_an_exact_scorer(problem, train, spec):
    # Two independent derivations of the same J: JAX autodiff through a dense LU solve,
    # and a sparse iterative solve plus the adjoint solve of fitrank.pagerank.
    theta0 = np.array([0.0, 0.2, -0.1])
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    reduced = reduced_objective(scorer, train, spec, n=problem.graph.n, theta0=theta0)
    full, solves = full_objective(problem.graph, problem.weighting, train, spec, theta0=theta0, tol=1e-13)
    for theta in (np.array([0.5, -0.4, 0.2]), np.array([-1.0, 0.7, 0.0])):
        v_red, g_red = reduced(theta)
        v_full, g_full = full.value_and_grad(theta, full.arrays)
        assert v_full == pytest.approx(v_red, rel=1e-9)
        assert g_full == pytest.approx(g_red, rel=1e-6, abs=1e-10)
    assert solves.count == 2
    full.value_and_grad(np.array([-1.0, 0.7, 0.0]), full.arrays)
    assert solves.count == 2  # the same theta is served from the cache


def test_x_space_gradient_matches_central_differences(problem, train):
    spec = ObjectiveSpec("logistic", 0.5, 0.0)
    data = x_space_loss(train, spec, n=problem.graph.n)
    x = _dense_x(problem, np.array([0.2, 0.1, -0.3]))
    value, grad = data.value_and_grad(x)
    untouched = np.setdiff1d(np.arange(x.size), train.nodes())
    assert np.all(grad[untouched] == 0.0)
    h = 1e-9
    for i in train.nodes()[:6]:
        e = np.zeros_like(x)
        e[i] = h
        # Central differences (common practice); scores are n * x, so steps in x are small.
        assert grad[i] == pytest.approx((data.value(x + e) - data.value(x - e)) / (2 * h), rel=1e-5, abs=1e-6)
    assert value == pytest.approx(pair_summary(x, train, spec)["loss"], rel=1e-14)


def test_pair_summary_reports_accuracy_and_loss(problem):
    test = problem.pairs.subset("test")
    summary = pair_summary(problem.x_true, test, ObjectiveSpec("sigmoid", 0.2))
    assert summary["pairs"] == len(test)
    assert summary["accuracy"] == pair_accuracy(problem.x_true, test)
    empty = pair_summary(problem.x_true, test.subset("train"), ObjectiveSpec("sigmoid", 0.2))
    assert empty["pairs"] == 0 and math.isnan(empty["loss"])


def test_calibration_uses_the_median_score_gap_at_theta0(problem, train):
    x = np.array([0.1, 0.4, 0.2, 0.3]) / 4.0
    pairs = Pairs(np.array([1, 3, 0]), np.array([0, 2, 2]), np.ones(3), np.zeros(3, np.int8))
    # gaps n |x_other - x_preferred| with n = 4: 0.3, 0.1, 0.1 -> median 0.1, times AUTO_FRACTION
    assert calibrate(ObjectiveSpec("logistic"), x, pairs, n=4).loss_param == pytest.approx(0.1 * AUTO_FRACTION,
                                                                                           abs=1e-15)
    assert calibrate(ObjectiveSpec("logistic", 2.0), x, pairs, n=4).loss_param == 2.0
    with pytest.raises(FitrankInputError, match="every training pair is tied.*set training.temperature"):
        calibrate(ObjectiveSpec("sigmoid"), np.ones(4), pairs, n=4)
    # Built objectives calibrate at theta0 and report the value they use.
    theta0 = np.array([0.2, 0.0, -0.2])
    x0 = _dense_x(problem, theta0)
    expected = AUTO_FRACTION * np.median(problem.graph.n * np.abs(x0[train.other] - x0[train.preferred]))
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    reduced = reduced_objective(scorer, train, ObjectiveSpec("sigmoid"), n=problem.graph.n, theta0=theta0)
    full, _ = full_objective(problem.graph, problem.weighting, train, ObjectiveSpec("sigmoid"), theta0=theta0)
    assert reduced.spec.loss_param == pytest.approx(expected, rel=1e-10)
    assert full.spec.loss_param == pytest.approx(expected, rel=1e-8)


def test_localize_maps_nodes_to_positions_and_refuses_missing_ones(train):
    nodes = train.nodes()
    local = localize(train, nodes)
    assert np.array_equal(nodes[local.preferred], train.preferred)
    assert np.array_equal(nodes[local.other], train.other)
    shuffled = np.random.default_rng(0).permutation(nodes)  # a scorer's nodes need not be sorted
    local = localize(train, shuffled)
    assert np.array_equal(shuffled[local.preferred], train.preferred)
    assert np.array_equal(shuffled[local.other], train.other)
    with pytest.raises(ValueError, match=f"pair node {nodes[0]} is not among"):
        localize(train, nodes[1:])


def test_batches_keep_relative_weights_and_follow_the_seed(problem, train):
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    objective = reduced_objective(scorer, train, ObjectiveSpec(), n=problem.graph.n, theta0=np.zeros(3))
    first = np.asarray(batch_arrays(objective, np.random.default_rng(4), 25)["weight"])
    again = np.asarray(batch_arrays(objective, np.random.default_rng(4), 25)["weight"])
    other = np.asarray(batch_arrays(objective, np.random.default_rng(5), 25)["weight"])
    assert np.count_nonzero(first) == 25 and first.sum() == pytest.approx(1.0, abs=1e-15)
    assert np.array_equal(first, again) and not np.array_equal(first, other)
    chosen = first > 0
    full = np.asarray(objective.arrays["weight"])
    assert first[chosen] / first[chosen].sum() == pytest.approx(full[chosen] / full[chosen].sum(), rel=1e-14)
    assert batch_arrays(objective, np.random.default_rng(4), 0) is objective.arrays


def test_bad_specs_and_empty_splits_are_refused(problem, train):
    scorer = dense_scorer(problem.graph, problem.weighting, train.nodes())
    for spec, message in [(ObjectiveSpec("hinge"), "unknown loss"), (ObjectiveSpec("sigmoid", 0.0), "temperature"),
                          (ObjectiveSpec("logistic", 1.0, -1.0), "regularization")]:
        with pytest.raises(FitrankInputError, match=message):
            reduced_objective(scorer, train, spec, n=problem.graph.n, theta0=np.zeros(3))
    empty = Pairs(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0), np.zeros(0, np.int8))
    with pytest.raises(FitrankInputError, match="at least one training pair"):
        reduced_objective(scorer, empty, ObjectiveSpec(), n=problem.graph.n, theta0=np.zeros(3))
