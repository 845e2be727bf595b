"""Checks of the full PageRank solver (fitrank.pagerank) against references outside fitrank.

References used below:
  * two published worked examples (Langville & Meyer 2005; the Wikipedia article "PageRank");
  * networkx.pagerank, a general-purpose implementation;
  * scipy.sparse.linalg.spsolve on a matrix M assembled here from the edge
    arrays, with edge probabilities computed here from the definitions of
    DESIGN.md section 2 (not through fitrank.weightings);
  * central finite differences for the adjoint gradient.
"""

from __future__ import annotations

import warnings
from dataclasses import replace
from fractions import Fraction

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from hypothesis import given
from hypothesis import strategies as st
from test_weightings import examples, random_theta, random_typed_graph, seeds, shapes

from tests._datasets import generated

from fitrank.errors import ConvergenceError, FitrankInputError
from fitrank.graph import build_graph
from fitrank.pagerank import (
    DANGLING_POLICIES,
    adjoint_gradient,
    certified_bound,
    pagerank,
    solve_operator,
    walk_operator,
)
from fitrank.sweeps import sweep_plan
from fitrank.weightings import KINDS, make_weighting

SOLVERS = ("power", "gauss-seidel", "bicgstab", "anderson")
MATRIX_SOLVERS = ("power", "bicgstab", "anderson")  # those that call op.matrix once per counted mat-vec


# ----------------------------------------------------------------------------- independent references


def normalised_walk(n: int, src: np.ndarray, weights: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Edge probabilities weight / (source's total weight); leak 1 where a node's total is 0."""
    total = np.zeros(n)
    np.add.at(total, src, weights)
    p = np.divide(weights, total[src], out=np.zeros_like(weights), where=total[src] > 0)
    return p, (total == 0).astype(float)


def reference_walk(graph, kind: str, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(p (E,), leak (n,)) of a weighting, written from DESIGN.md section 2 without fitrank.weightings."""
    theta = np.asarray(theta, dtype=float)
    if kind == "mixture":
        w = np.exp(theta - theta.max())
        w /= w.sum()
        per_relation = np.zeros((graph.n, graph.num_relations))
        np.add.at(per_relation, (graph.src, graph.relation), graph.base)
        p = w[graph.relation] * graph.base / per_relation[graph.src, graph.relation]
        return p, (per_relation == 0) @ w  # a node without relation t sends w_t by the leak
    if kind == "scale":
        return normalised_walk(graph.n, graph.src, graph.base * np.exp(theta[graph.relation]))
    raw = graph.features
    std = raw.std(axis=0)
    standard = (raw - raw.mean(axis=0)) / np.where(std > 0, std, 1.0)
    return normalised_walk(graph.n, graph.src, graph.base * np.exp(standard @ theta))


def reference_solve(n, src, dst, p, leak, v, alpha, dangling) -> np.ndarray:
    """x from scipy.sparse.linalg.spsolve(M, (1 - alpha) v), M = I - alpha (P + routing of the leak)."""
    walk = sp.coo_matrix((p, (dst, src)), shape=(n, n)).tocsc()  # COO -> CSC sums parallel edges
    routed = sp.csc_matrix(np.outer(v, leak)) if dangling == "teleport" else sp.diags(leak, format="csc")
    system = sp.identity(n, format="csc") - alpha * (walk + routed)
    return spla.spsolve(system, (1 - alpha) * v)


def networkx_reference(graph, p, leak, v, alpha) -> np.ndarray:
    """networkx.pagerank on the same walk: parallel edges summed, partial leaks as edges to v."""
    weights: dict[tuple[int, int], float] = {}
    for j, i, pe in zip(graph.src.tolist(), graph.dst.tolist(), p.tolist()):
        weights[(j, i)] = weights.get((j, i), 0.0) + pe
    for j in np.flatnonzero((leak > 0) & (leak < 1)).tolist():  # mixture: a node lacking some relation
        for i in range(graph.n):
            weights[(j, i)] = weights.get((j, i), 0.0) + leak[j] * v[i]
    digraph = nx.DiGraph()
    digraph.add_nodes_from(range(graph.n))
    digraph.add_weighted_edges_from((j, i, w) for (j, i), w in weights.items())
    teleport = dict(enumerate(v.tolist()))
    # networkx stops when the L1 change is below n * tol, so tol = 1e-15 leaves ~1e-12 of error.
    ranks = nx.pagerank(digraph, alpha=alpha, personalization=teleport, dangling=teleport, tol=1e-15,
                        max_iter=10_000, weight="weight")
    return np.array([ranks[i] for i in range(graph.n)])


# ----------------------------------------------------------------------------- published examples


def test_langville_meyer_six_node_example():
    # Langville & Meyer, "A survey of eigenvector methods of web information retrieval",
    # SIAM Review 47(1), 2005 (the same example is in their "Deeper inside PageRank", 2004).
    # FROM MEMORY (not checked against the printed page): nodes 1..6 with links
    # 1->2,3; 2 dangling; 3->1,2,5; 4->5,6; 5->4,6; 6->4; alpha = 0.9; uniform teleport;
    # the dangling row is replaced by the uniform row e^T/n (node 2 spreads over all six
    # nodes, itself included) = fitrank's "teleport" policy; the printed vector
    # pi = (.03721, .05396, .04151, .3751, .2060, .2862), ranking 4, 6, 5, 2, 3, 1.
    # Because these numbers are recalled, they are also recomputed below by a dense solve of
    # the Google matrix built independently, so a misremembered digit cannot pass silently.
    links = {1: [2, 3], 2: [], 3: [1, 2, 5], 4: [5, 6], 5: [4, 6], 6: [4]}
    n, alpha = 6, 0.9
    src = np.array([j - 1 for j, out in links.items() for _ in out])
    dst = np.array([i - 1 for out in links.values() for i in out])
    graph = build_graph(src, dst, n)
    x = pagerank(graph, make_weighting("scale", graph), [0.0], damping=alpha, tol=1e-13).x

    google = np.zeros((n, n))  # column-stochastic S of the paper, transposed to our convention
    for j, out in links.items():
        google[:, j - 1] = [1.0 / len(out) if i + 1 in out else 0.0 for i in range(n)] if out else 1.0 / n
    dense = np.linalg.solve(np.eye(n) - alpha * google, (1 - alpha) * np.full(n, 1.0 / n))
    np.testing.assert_allclose(x, dense, atol=1e-6)
    np.testing.assert_allclose(x, dense, atol=1e-12)  # much tighter in fact

    published = np.array([0.03721, 0.05396, 0.04151, 0.3751, 0.2060, 0.2862])
    half_unit = np.array([5e-6, 5e-6, 5e-6, 5e-5, 5e-5, 5e-5])  # half a unit in the last printed digit
    assert np.all(np.abs(x - published) <= half_unit + 1e-12)
    assert list(np.argsort(-x) + 1) == [4, 6, 5, 2, 3, 1]

    # The printed numbers pin the convention: the "self" policy (dangling mass stays put) misses them.
    x_self = pagerank(graph, make_weighting("scale", graph), [0.0], damping=alpha, dangling="self", tol=1e-13).x
    assert np.abs(x_self - published).max() > 0.1


def _exact_solve(matrix: list[list[Fraction]], rhs: list[Fraction]) -> list[Fraction]:
    """Gaussian elimination in exact rational arithmetic (no pivoting needed: M is diagonally dominant)."""
    n = len(rhs)
    a = [row[:] + [b] for row, b in zip(matrix, rhs)]
    for k in range(n):
        for r in range(k + 1, n):
            factor = a[r][k] / a[k][k]
            if factor:
                a[r] = [x - factor * y for x, y in zip(a[r], a[k])]
    x = [Fraction(0)] * n
    for k in reversed(range(n)):
        x[k] = (a[k][n] - sum(a[k][c] * x[c] for c in range(k + 1, n))) / a[k][k]
    return x


def test_wikipedia_eleven_node_example():
    # Wikipedia, article "PageRank", figure "PageRanks-Example" (damping 0.85). The graph is
    # reconstructed FROM MEMORY of the figure: A has no out-link (its mass spreads uniformly
    # over all 11 nodes, itself included); B->C; C->B; D->A,B; E->B,D,F; F->B,E; G,H,I->B,E;
    # J->E; K->E. The exact rational solution is recomputed here with Fractions rather than
    # copied; the percentages printed in the figure (from memory) are A 3.3, B 38.4, C 34.3,
    # D 3.9, E 8.1, F 3.9 and 1.6 for each of G..K.
    names = "ABCDEFGHIJK"
    links = {"A": "", "B": "C", "C": "B", "D": "AB", "E": "BDF", "F": "BE",
             "G": "BE", "H": "BE", "I": "BE", "J": "E", "K": "E"}
    n = len(names)
    src = np.array([names.index(j) for j, out in links.items() for _ in out])
    dst = np.array([names.index(i) for out in links.values() for i in out])
    graph = build_graph(src, dst, n)
    x = pagerank(graph, make_weighting("scale", graph), [0.0], damping=0.85, tol=1e-14).x

    alpha = Fraction(17, 20)
    walk = [[Fraction(0)] * n for _ in range(n)]
    for j, out in links.items():
        for i in range(n):
            walk[i][names.index(j)] = Fraction(out.count(names[i]), len(out)) if out else Fraction(1, n)
    system = [[(1 if r == c else 0) - alpha * walk[r][c] for c in range(n)] for r in range(n)]
    exact = _exact_solve(system, [(1 - alpha) / n] * n)
    assert sum(exact) == 1
    np.testing.assert_allclose(x, [float(q) for q in exact], rtol=0, atol=1e-9)

    printed = np.array([3.3, 38.4, 34.3, 3.9, 8.1, 3.9, 1.6, 1.6, 1.6, 1.6, 1.6])
    assert np.all(np.abs(100 * x - printed) <= 0.05 + 1e-9)

    # The figure pins the convention: keeping A's mass on A ("self") gives other numbers.
    x_self = pagerank(graph, make_weighting("scale", graph), [0.0], damping=0.85, dangling="self", tol=1e-14).x
    assert np.abs(100 * x_self - printed).max() > 1.0


# ----------------------------------------------------------------------------- reference libraries


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("seed", [0, 1])
def test_matches_networkx_with_dangling_nodes_and_personalisation(kind, seed):
    # networkx.pagerank (general-purpose reference) with personalization = dangling = v.
    graph = random_typed_graph(seed, n=20, num_relations=3, num_features=2)
    assert np.any(graph.out_degree() == 0)
    weighting = make_weighting(kind, graph)
    theta = random_theta(weighting, seed)
    v = graph.teleport
    assert np.ptp(v) > 0  # the teleport vector is not uniform
    p, leak = reference_walk(graph, kind, theta)
    expected = networkx_reference(graph, p, leak, v, 0.85)
    x = pagerank(graph, weighting, theta, damping=0.85, tol=1e-12).x
    assert np.abs(x - expected).sum() < 1e-8


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("dangling", DANGLING_POLICIES)
@pytest.mark.parametrize("method", SOLVERS)
def test_matches_a_direct_sparse_solve(kind, dangling, method):
    for seed, alpha in ((3, 0.85), (4, 0.6), (5, 0.97)):
        graph = random_typed_graph(seed, n=16, num_relations=3, num_features=3)
        weighting = make_weighting(kind, graph)
        theta = random_theta(weighting, seed)
        p, leak = reference_walk(graph, kind, theta)
        expected = reference_solve(graph.n, graph.src, graph.dst, p, leak, graph.teleport, alpha, dangling)
        result = pagerank(graph, weighting, theta, damping=alpha, dangling=dangling, method=method, tol=1e-12)
        assert result.report.converged and result.report.method == method
        assert np.abs(result.x - expected).sum() < 1e-10


def test_the_reference_walk_agrees_with_the_weightings():
    # Both sides of the comparisons above rest on the same reading of DESIGN.md; check it edge by edge.
    graph = random_typed_graph(6, n=16, num_relations=3, num_features=3)
    for kind in KINDS:
        weighting = make_weighting(kind, graph)
        theta = random_theta(weighting, 6)
        p, leak = reference_walk(graph, kind, theta)
        op = walk_operator(graph, weighting, theta)
        np.testing.assert_allclose(op.transition, p, rtol=1e-12)
        np.testing.assert_allclose(op.leak, leak, atol=1e-14)


# ----------------------------------------------------------------------------- adjoint gradient


@pytest.mark.parametrize("kind", KINDS)
@pytest.mark.parametrize("dangling", DANGLING_POLICIES)
@pytest.mark.parametrize("method", ["auto", "anderson"])
def test_adjoint_gradient_matches_central_differences(kind, dangling, method):
    # Central differences (step 1e-5: truncation ~1e-10, rounding ~1e-13/1e-5 relative); common practice.
    graph = random_typed_graph(11, n=18, num_relations=3, num_features=3)
    weighting = make_weighting(kind, graph)
    theta = random_theta(weighting, 11)
    g = np.random.default_rng(12).normal(size=graph.n)

    def objective(th):
        x = pagerank(graph, weighting, th, dangling=dangling, tol=1e-14).x
        return g @ x + 0.5 * graph.n * x @ x, x

    _, x = objective(theta)
    grad, report = adjoint_gradient(graph, weighting, theta, x, g + graph.n * x, dangling=dangling, tol=1e-14,
                                    method=method)
    assert report.converged
    step = 1e-5
    numeric = np.array([(objective(theta + step * e)[0] - objective(theta - step * e)[0]) / (2 * step)
                        for e in np.eye(weighting.num_params)])
    assert np.linalg.norm(grad - numeric) < 1e-5 * np.linalg.norm(numeric)


def test_adjoint_gradient_reuses_a_given_operator():
    graph = random_typed_graph(12, n=15, num_relations=2)
    weighting = make_weighting("scale", graph)
    theta = random_theta(weighting, 12)
    op = walk_operator(graph, weighting, theta, damping=0.7, dangling="self")
    x = solve_operator(op, tol=1e-13).x
    g = np.arange(graph.n, dtype=float)
    with_op, _ = adjoint_gradient(graph, weighting, theta, x, g, op=op)
    without, _ = adjoint_gradient(graph, weighting, theta, x, g, damping=0.7, dangling="self")
    np.testing.assert_allclose(with_op, without, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("size", [1e-200, 1e-300, 1e250])
def test_adjoint_gradient_of_a_tiny_or_huge_df_dx_is_the_scaled_gradient(size):
    # A loss far out on its flat tail has df/dx near 1e-200; squares of that underflow inside
    # BiCGSTAB. The adjoint system is linear in df/dx (Giles & Pierce 2000), so the gradient
    # must be the ordinary one times the same factor, here on a graph slow enough to mix that
    # the automatic choice goes on from power iteration to BiCGSTAB.
    graph = random_typed_graph(13, n=40, num_relations=3)
    weighting = make_weighting("scale", graph)
    theta = random_theta(weighting, 13)
    op = walk_operator(graph, weighting, theta, damping=0.99)
    x = solve_operator(op, tol=1e-13).x
    g = np.random.default_rng(14).normal(size=graph.n)
    ordinary, report = adjoint_gradient(graph, weighting, theta, x, g, op=op)
    scaled, scaled_report = adjoint_gradient(graph, weighting, theta, x, g * size, op=op)
    assert report.converged and scaled_report.converged
    np.testing.assert_allclose(scaled, ordinary * size, rtol=1e-12)
    # the report is in df/dx's own units: the default tolerance 1e-12 relative to max |df/dx|
    assert 0 < scaled_report.residual <= 1e-12 * np.abs(g * size).max() <= scaled_report.bound * 1e12


def test_the_certified_bound_never_exceeds_what_a_probability_vector_allows():
    # With damping near 1 the residual bound ||r||_1 / (1 - alpha) grows without limit, but the true
    # solution is a probability vector, so ||x - y||_1 <= 1 + ||y||_1 (triangle inequality). Reference
    # solution: scipy.sparse.linalg.spsolve of M x = (1 - alpha) v.
    graph = random_typed_graph(31, n=30, num_relations=2)
    weighting = make_weighting("scale", graph)
    op = walk_operator(graph, weighting, weighting.theta0, damping=0.999999)
    matrix = sp.identity(graph.n, format="csr") - op.damping * sp.csr_matrix(
        np.column_stack([op.walk(e) for e in np.eye(graph.n)]))
    x = spla.spsolve(matrix.tocsc(), (1 - op.damping) * op.teleport)
    for y, cap in ((np.eye(graph.n)[0], 2.0), (2 * np.eye(graph.n)[0] - np.eye(graph.n)[1], 4.0)):
        bound = certified_bound(op, y)
        assert bound == cap and np.abs(x - y).sum() <= bound
    assert certified_bound(op, x) < 1e-6  # near the solution the residual term is the smaller one


def test_every_solver_converges_on_rank_sinks():
    # Closed 2-cycles give the walk the eigenvalues +1 and -1 (rank sinks): power iteration then
    # converges like alpha^k only. Reference: scipy.sparse.linalg.spsolve of M x = (1 - alpha) v.
    graph = random_typed_graph(21, n=16, num_relations=2)
    dangling = np.flatnonzero(graph.out_degree() == 0)
    pairs = dangling[: dangling.size // 2 * 2].reshape(-1, 2)
    assert pairs.shape[0] >= 1
    src = np.concatenate([graph.src, pairs[:, 0], pairs[:, 1]])
    dst = np.concatenate([graph.dst, pairs[:, 1], pairs[:, 0]])
    sinks = build_graph(src, dst, graph.n, teleport=graph.teleport)
    weighting = make_weighting("scale", sinks)
    p, leak = reference_walk(sinks, "scale", weighting.theta0)
    for alpha in (0.85, 0.99):
        expected = reference_solve(sinks.n, sinks.src, sinks.dst, p, leak, sinks.teleport, alpha, "teleport")
        for method in SOLVERS + ("auto",):
            result = pagerank(sinks, weighting, weighting.theta0, damping=alpha, method=method, tol=1e-12)
            assert result.report.converged
            assert np.abs(result.x - expected).sum() < 1e-10


def test_anderson_reports_the_residual_of_the_vector_it_returns():
    # The residual is measured on the returned vector, so certified_bound (one mat-vec, DESIGN.md
    # section 1) recomputes it: equal up to rounding, and the report's bound is ||r||_1 / (1 - alpha).
    graph = random_typed_graph(22, n=16, num_relations=3)
    weighting = make_weighting("features", graph)
    for alpha, maxiter in ((0.85, 5), (0.99, 9), (0.99, 200)):
        op = walk_operator(graph, weighting, random_theta(weighting, 22), damping=alpha)
        result = solve_operator(op, method="anderson", tol=1e-12, maxiter=maxiter, raise_on_failure=False)
        true_residual = certified_bound(op, result.x) * (1 - alpha)
        assert result.report.residual == pytest.approx(true_residual, rel=1e-6, abs=1e-16)
        assert result.report.bound == pytest.approx(result.report.residual / (1 - alpha), rel=1e-9)


def test_anderson_spends_fewer_mat_vecs_than_power_on_a_generated_graph():
    # Anderson acceleration (Walker & Ni, SIAM J. Numer. Anal. 49(4), 2011) on the suite's shared
    # generated "scale" dataset (fitrank.generate, 2,000 nodes, seed 11), tolerance 1e-8: it may not
    # spend more mat-vecs than plain power iteration at damping 0.85 and must spend fewer at 0.99.
    # Counts, not times.
    graph = generated("scale")[0].graph
    weighting = make_weighting("scale", graph)
    counts = {}
    for alpha in (0.85, 0.99):
        op = walk_operator(graph, weighting, weighting.theta0, damping=alpha)
        for method in ("power", "anderson"):
            result = solve_operator(op, method=method, tol=1e-8)
            assert certified_bound(op, result.x) <= 1e-8
            counts[method, alpha] = result.report.iterations
    assert counts["anderson", 0.85] <= counts["power", 0.85]
    assert counts["anderson", 0.99] < counts["power", 0.99]


def test_gauss_seidel_spends_fewer_passes_than_power_on_a_generated_graph():
    # Gauss-Seidel converges at least as fast as the Jacobi/power splitting for a regular splitting
    # of an M-matrix (Stein-Rosenberg; Saad, "Iterative Methods for Sparse Linear Systems", 2003,
    # section 4.2), and on PageRank in markedly fewer passes (Arasu et al., WWW 2002). On the suite's
    # shared generated "scale" dataset, tolerance 1e-8: fewer passes over the edges than power
    # iteration at both dampings, each result certified by an independent residual.
    graph = generated("scale")[0].graph
    weighting = make_weighting("scale", graph)
    for alpha in (0.85, 0.99):
        op = walk_operator(graph, weighting, weighting.theta0, damping=alpha)
        counts = {}
        for method in ("power", "gauss-seidel"):
            result = solve_operator(op, method=method, tol=1e-8)
            assert certified_bound(op, result.x) <= 1e-8
            assert result.report.bound <= 1e-8
            counts[method] = result.report.iterations
        assert counts["gauss-seidel"] < counts["power"], (alpha, counts)


def test_gauss_seidel_counts_one_pass_per_sweep(small):
    graph, weighting = small
    op = walk_operator(graph, weighting, weighting.theta0, damping=0.99)
    sweeps = []
    result = solve_operator(op, method="gauss-seidel", tol=1e-15, maxiter=5, raise_on_failure=False,
                            callback=lambda it, residual: sweeps.append(residual))
    assert len(sweeps) == result.report.iterations == 5
    # each reported residual bounds the true residual of the vector it describes
    assert result.report.residual >= certified_bound(op, result.x) * (1 - op.damping) * (1 - 1e-9)


def test_sweep_plan_regroups_the_edge_pattern():
    # The plan's regrouped CSR must be P with rows and columns both permuted by its node order,
    # compared with scipy's own fancy indexing; classes are contiguous ranges of positions.
    graph = random_typed_graph(40, n=60, num_relations=3)
    plan = sweep_plan(graph)
    assert np.array_equal(np.sort(plan.order), np.arange(graph.n))
    p = np.random.default_rng(40).random(graph.num_edges)
    expected = graph.matrix(p)[plan.order][:, plan.order].toarray()
    regrouped = sp.csr_matrix((p[plan.edges], plan.columns, plan.indptr), shape=(graph.n, graph.n)).toarray()
    np.testing.assert_allclose(regrouped, expected, rtol=0, atol=1e-15)
    assert plan.bounds[0] == 0 and plan.bounds[-1] == graph.n and np.all(np.diff(plan.bounds) >= 0)


def test_gauss_seidel_needs_the_graph(small):
    graph, weighting = small
    op = walk_operator(graph, weighting, weighting.theta0)
    bare = replace(op, sweep_plan=None)  # e.g. assembled by hand from a matrix
    with pytest.raises(FitrankInputError, match="'gauss-seidel' needs the graph's sweep plan"):
        solve_operator(bare, method="gauss-seidel")
    np.testing.assert_allclose(solve_operator(bare, tol=1e-12).x, solve_operator(op, tol=1e-12).x, atol=1e-11)
    x = solve_operator(op, tol=1e-12).x
    with pytest.raises(FitrankInputError, match="not available for the adjoint solve"):
        adjoint_gradient(graph, weighting, weighting.theta0, x, np.ones(graph.n), op=op, method="gauss-seidel")


# ----------------------------------------------------------------------------- properties


@examples(0.7)
@given(seed=seeds, shape=shapes, kind=st.sampled_from(KINDS), dangling=st.sampled_from(DANGLING_POLICIES),
       method=st.sampled_from(SOLVERS), alpha=st.floats(0.05, 0.98))
def test_solution_is_a_probability_vector(seed, shape, kind, dangling, method, alpha):
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting(kind, graph)
    x = pagerank(graph, weighting, random_theta(weighting, seed), damping=alpha, dangling=dangling,
                 method=method, tol=1e-11).x
    assert x.shape == (graph.n,)
    assert np.all(x >= -1e-15)
    assert abs(x.sum() - 1.0) < 1e-12


@examples(0.5)
@given(seed=seeds, shape=shapes, kind=st.sampled_from(KINDS), dangling=st.sampled_from(DANGLING_POLICIES))
def test_relabelling_the_nodes_permutes_the_answer(seed, shape, kind, dangling):
    graph = random_typed_graph(seed, *shape)
    perm = np.random.default_rng(seed).permutation(graph.n)  # old index i becomes perm[i]
    teleport = np.empty(graph.n)
    teleport[perm] = graph.teleport
    relabelled = build_graph(perm[graph.src], perm[graph.dst], graph.n, base=graph.base, relation=graph.relation,
                             relation_names=graph.relation_names, features=graph.features,
                             feature_names=graph.feature_names, teleport=teleport)
    theta = random_theta(make_weighting(kind, graph), seed)
    x = pagerank(graph, make_weighting(kind, graph), theta, dangling=dangling, tol=1e-13).x
    y = pagerank(relabelled, make_weighting(kind, relabelled), theta, dangling=dangling, tol=1e-13).x
    np.testing.assert_allclose(y[perm], x, atol=1e-12)


@examples(0.4)
@given(seed=seeds, hot=st.integers(0, 2))
def test_one_hot_mixture_is_the_single_relation_walk(seed, hot):
    # w = softmax([.., 0, .., -1000, ..]) is one-hot (exp(-1000) underflows to 0): the walk on
    # relation `hot` alone, where a node without an edge of that relation jumps by v.
    graph = random_typed_graph(seed, n=14, num_relations=3)
    theta = np.full(3, -1000.0)
    theta[hot] = 0.0
    x = pagerank(graph, make_weighting("mixture", graph), theta, tol=1e-13).x
    only = np.where(graph.relation == hot, graph.base, 0.0)
    p, leak = normalised_walk(graph.n, graph.src, only)
    expected = reference_solve(graph.n, graph.src, graph.dst, p, leak, graph.teleport, 0.85, "teleport")
    assert np.abs(x - expected).sum() < 1e-11


@examples(0.4)
@given(seed=seeds, shape=shapes, level=st.floats(-5.0, 5.0))
def test_equal_scales_give_the_base_weighted_pagerank(seed, shape, level):
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting("scale", graph)
    x = pagerank(graph, weighting, np.full(weighting.num_params, level), tol=1e-13).x
    p, leak = normalised_walk(graph.n, graph.src, graph.base)
    expected = reference_solve(graph.n, graph.src, graph.dst, p, leak, graph.teleport, 0.85, "teleport")
    assert np.abs(x - expected).sum() < 1e-11


@examples(0.7)
@given(seed=seeds, shape=shapes, kind=st.sampled_from(KINDS), dangling=st.sampled_from(DANGLING_POLICIES),
       method=st.sampled_from(SOLVERS), maxiter=st.integers(1, 12), alpha=st.sampled_from([0.5, 0.85, 0.99]))
def test_certified_bound_holds(seed, shape, kind, dangling, method, maxiter, alpha):
    graph = random_typed_graph(seed, *shape)
    weighting = make_weighting(kind, graph)
    op = walk_operator(graph, weighting, random_theta(weighting, seed), damping=alpha, dangling=dangling)
    p, leak = np.asarray(op.transition), np.asarray(op.leak)
    truth = reference_solve(graph.n, graph.src, graph.dst, p, leak, op.teleport, alpha, dangling)
    early = solve_operator(op, method=method, maxiter=maxiter, tol=1e-15, raise_on_failure=False)
    error = np.abs(early.x - truth).sum()
    assert error <= early.report.bound * (1 + 1e-9) + 1e-14
    assert error <= certified_bound(op, early.x) * (1 + 1e-9) + 1e-14
    rng = np.random.default_rng(seed)
    for scale in (1e-8, 1e-3, 0.3):
        y = truth + scale * rng.normal(size=graph.n) * truth
        assert np.abs(y - truth).sum() <= certified_bound(op, y) * (1 + 1e-9) + 1e-14


# ----------------------------------------------------------------------------- errors


@pytest.fixture(scope="module")
def small():
    graph = random_typed_graph(30, n=10, num_relations=2)
    return graph, make_weighting("scale", graph)


@pytest.mark.parametrize("damping", [0.0, 1.0, -0.2, 1.5, float("nan")])
def test_bad_damping_is_refused(small, damping):
    graph, weighting = small
    with pytest.raises(FitrankInputError, match="damping must be strictly between 0 and 1"):
        pagerank(graph, weighting, weighting.theta0, damping=damping)


@pytest.mark.parametrize(
    "change, message",
    [
        (lambda v: np.where(np.arange(v.size) == 3, -0.1, v), "teleport vector has a negative entry at node index 3"),
        (lambda v: np.where(np.arange(v.size) == 5, np.nan, v), "teleport vector has a non-finite entry at node index 5"),
        (lambda v: np.zeros_like(v), "teleport vector is all zero"),
        (lambda v: v[:-1], r"teleport vector has shape \(9,\); expected \(10,\)"),
    ],
)
def test_bad_teleport_is_refused(small, change, message):
    graph, weighting = small
    with pytest.raises(FitrankInputError, match=message):
        pagerank(graph, weighting, weighting.theta0, teleport=change(np.full(graph.n, 0.1)))


@pytest.mark.parametrize("theta", [np.zeros(3), np.zeros(1), np.zeros((2, 1)), np.zeros(0)])
def test_wrong_theta_shape_is_refused(small, theta):
    graph, weighting = small
    with pytest.raises(FitrankInputError, match="theta has shape .*the scale weighting has 2 parameters"):
        pagerank(graph, weighting, theta)


def test_unknown_dangling_policy_is_refused(small):
    graph, weighting = small
    with pytest.raises(FitrankInputError, match="dangling policy .* got 'uniform'"):
        pagerank(graph, weighting, weighting.theta0, dangling="uniform")


def test_unknown_method_is_refused(small):
    graph, weighting = small
    with pytest.raises(FitrankInputError, match="solver method .* got 'jacobi'"):
        pagerank(graph, weighting, weighting.theta0, method="jacobi")


@pytest.mark.parametrize("method", SOLVERS)
def test_non_convergence_reports_iterations_residual_and_bound(small, method):
    graph, weighting = small
    with pytest.raises(ConvergenceError, match=r"PageRank solve did not converge: \d+ iterations") as caught:
        pagerank(graph, weighting, weighting.theta0, damping=0.99, tol=1e-12, maxiter=3, method=method)
    err = caught.value
    assert 0 < err.iterations <= 3
    assert f"{err.iterations} iterations" in str(err)
    assert np.isfinite(err.residual) and err.residual > 1e-12 * (1 - 0.99)
    assert err.bound > err.tol == 1e-12
    # The bound is at least the one of pagerank.py's docstring for the last step: alpha ||r||_1 / (1 - alpha).
    assert err.bound >= 0.99 * err.residual / (1 - 0.99) * (1 - 1e-12)


@pytest.mark.parametrize("method", MATRIX_SOLVERS)
@pytest.mark.parametrize("maxiter", [3, 4, 8])
def test_maxiter_bounds_the_mat_vecs(small, method, maxiter):
    # pagerank's docstring: "maxiter: at most this many mat-vecs"; counted here independently.
    graph, weighting = small
    op = walk_operator(graph, weighting, weighting.theta0, damping=0.99)
    counting = _CountingMatrix(op.matrix)
    object.__setattr__(op, "matrix", counting)  # the operator is frozen; this test only watches its mat-vecs
    result = solve_operator(op, method=method, tol=1e-15, maxiter=maxiter, raise_on_failure=False)
    assert counting.calls == result.report.iterations
    assert counting.calls <= maxiter


class _CountingMatrix:
    """A sparse matrix stand-in that counts its mat-vecs."""

    def __init__(self, matrix):
        self.matrix, self.calls = matrix, 0

    def __matmul__(self, x):
        self.calls += 1
        return self.matrix @ x


def test_a_non_finite_theta_is_refused_before_any_solve(small):
    graph, weighting = small
    with pytest.raises(FitrankInputError, match=r"theta has a non-finite entry \(scale:.* = nan\)"):
        pagerank(graph, weighting, np.array([0.0, np.nan]))


def test_a_non_finite_transition_is_refused_before_any_solve():
    # The loader and build_graph refuse non-finite features; a Graph assembled by hand is not
    # checked, and the operator must still stop it rather than let a solver iterate on NaN.
    graph = random_typed_graph(30, n=10, num_relations=2, num_features=1)
    features = graph.features.copy()
    features[0, 0] = np.inf
    unchecked = replace(graph, features=features)
    with np.errstate(invalid="ignore"):  # the NaN the check is for shows up on the way there
        weighting = make_weighting("features", unchecked)
        with pytest.raises(FitrankInputError, match="features weighting gives a non-finite transition probability"):
            pagerank(unchecked, weighting, weighting.theta0 + 0.1)
        with pytest.raises(FitrankInputError, match="check that edge's weight and features"):
            pagerank(unchecked, weighting, weighting.theta0 + 0.1)


def test_parameters_too_far_out_for_float64_are_named_as_the_cause_not_the_data():
    # relation 1 at e^-2000 of relation 0: one shared shift of theta once underflowed the out-weight
    # of node 1 (all its out-edges are of relation 1) to 0; each source's own shift keeps its walk
    # exact: every node has one out-edge, so p = 1 and PageRank is uniform (by symmetry of the cycle)
    graph = build_graph(src=[0, 1, 2], dst=[1, 2, 0], n=3, relation=[0, 1, 0], relation_names=["a", "b"])
    weighting = make_weighting("scale", graph)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        np.testing.assert_allclose(pagerank(graph, weighting, np.array([1000.0, -1000.0])).x, np.full(3, 1 / 3),
                                   rtol=1e-12)
    # a weighting whose weights do leave the float range there (finite at theta0) is named as the cause
    overflowing = replace(weighting, transition=lambda theta, tables, xp=np: (
        weighting.transition(theta, tables, xp) * np.exp(np.abs(theta).max() - 1.0)))
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the one-line error only: no NumPy warning about the overflow first
        with pytest.raises(FitrankInputError, match=r"largest \|theta\| = 1e\+03.*narrow weighting.bound"):
            pagerank(graph, overflowing, np.array([1000.0, -1000.0]))