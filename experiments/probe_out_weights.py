"""Can the non-affine part of a weighting be compressed? Three measured answers, in one run.

Interpolation rows of the feature weighting pay for the out-edges of their
in-neighbours, because p_e = a_e / d_src(e) needs each source's out-weight d_j.
Galerkin needs an affine operator, which the scale weighting lacks only through
1 / d_j. This script measures the three ways around that we considered:

1. feature weighting: a DEIM model of log d_j(theta) over 2,000 random sources,
   computed exactly at q of them (singular-value decay, worst error at fresh points);
2. scale weighting: the same for 1 / d_j(theta) over the distinct relation
   profiles S_j / |S_j| (an empirical-interpolation affine expansion of P(theta));
3. scale weighting in scaled variables y = x / d(theta), where the walk is affine
   in w = softmax(theta): Galerkin on a POD basis of y (plain and d(theta0)-weighted)
   against the best approximation of x in a POD basis of x.

A compressed model is only useful if its error is far below the reduced model's
(top-100 Kendall tau >= 0.999 needs a few 1e-5 of relative accuracy at the top).

    python experiments/probe_out_weights.py           # 200k nodes, under 2 minutes
    python experiments/probe_out_weights.py --quick   # 20k nodes

References:
  Barrault, Maday, Nguyen & Patera, "An 'empirical interpolation' method",
  C. R. Acad. Sci. Paris 339, 2004; Chaturantabut & Sorensen, SIAM J. Sci.
  Comput. 32(5), 2010 (DEIM).
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np
from scipy.special import softmax

from _timing import scratch_folder  # noqa: E402  (also puts the checkout on sys.path)

from fitrank.generate import generate_dataset, write_dataset  # noqa: E402
from fitrank.interpolation import select_rows  # noqa: E402
from fitrank.metrics import kendall_tau_topk  # noqa: E402
from fitrank.pagerank import PageRankProblem  # noqa: E402
from fitrank.snapshots import solve_snapshots  # noqa: E402
from fitrank.tables import load_dataset  # noqa: E402
from fitrank.weightings import make_weighting  # noqa: E402

TERMS = (8, 16, 24, 40)


def load_problem(kind: str, nodes: int, seed: int, folder: Path) -> PageRankProblem:
    edges, pairs, truth = generate_dataset(nodes, seed, kind, relations=4, features=3)
    write_dataset(folder / kind, edges, pairs, truth)
    graph = load_dataset(folder / kind / "edges.csv", folder / kind / "pairs.csv").graph
    return PageRankProblem(graph, make_weighting(kind, graph))


def deim_errors(train: np.ndarray, test: np.ndarray, relative: bool) -> dict:
    """Singular values of ``train`` (N, m) and the worst DEIM error on ``test`` (N, m') per term count."""
    u, s, _ = np.linalg.svd(train, full_matrices=False)
    errors = {}
    for q in TERMS:
        basis = u[:, :q]
        points = select_rows(basis, q).rows
        approx = basis @ np.linalg.solve(basis[points], test[points])
        gap = np.abs(approx - test) / (np.abs(test) if relative else 1.0)
        errors[q] = float(gap.max())
    return {"singular_values": [float(x) for x in s[:41] / s[0]], "max_error": errors}


def feature_log_out_weights(problem: PageRankProblem, rng) -> dict:
    graph, weighting = problem.graph, problem.weighting
    candidates = np.flatnonzero(graph.out_degree() > 0)
    sources = np.sort(rng.choice(candidates, size=min(2000, candidates.size), replace=False))
    ids, _ = graph.out_edges_of(sources)  # grouped by source, in the order of ``sources``
    starts = np.concatenate([[0], np.cumsum(graph.out_degree()[sources])[:-1]])
    log_base = np.log(graph.base[ids])
    feat = ((graph.features[ids] - weighting.feature_center) / weighting.feature_scale).T

    def log_out_weight(theta):
        return np.logaddexp.reduceat(log_base + theta @ feat, starts)

    train = np.stack([log_out_weight(t) for t in weighting.sample(256, seed=1)], axis=1)
    test = np.stack([log_out_weight(t) for t in weighting.sample(50, seed=99)], axis=1)
    return dict(deim_errors(train, test, relative=False), sources=int(sources.size), edges=int(ids.size))


def scale_inverse_out_weights(problem: PageRankProblem) -> dict:
    weights = problem.graph.relation_out_weight()
    weights = weights[weights.sum(axis=1) > 0]
    profiles = np.unique(np.round(weights / weights.sum(axis=1, keepdims=True), 12), axis=0)
    sample = problem.weighting.sample

    def inverse(thetas):
        return np.stack([1.0 / (profiles @ softmax(t)) for t in thetas], axis=1)

    return dict(deim_errors(inverse(sample(512, seed=1)), inverse(sample(100, seed=99)), relative=True),
                profiles=int(profiles.shape[0]))


def scaled_variable_galerkin(problem: PageRankProblem, samples: int, fresh: int, ranks: tuple[int, ...]) -> dict:
    """Worst top-100 tau of Galerkin in y = x / d(theta), against x's own best approximation."""
    graph, alpha, v = problem.graph, problem.damping, problem.teleport
    weights = graph.relation_out_weight()
    dangling = (graph.out_degree() == 0).astype(np.float64)

    def scaling(theta):  # x = scaling * y; a dangling node keeps x_j = y_j
        return weights @ softmax(theta) + dangling

    thetas = problem.weighting.sample(samples, seed=0)
    snapshots = solve_snapshots(problem, thetas, tol=1e-8, progress=False)
    scaled = snapshots / np.stack([scaling(t) for t in thetas], axis=1)
    points = problem.weighting.sample(fresh, seed=10_005)
    exact = [problem.solve(t).x for t in points]
    per_relation = [graph.matrix(np.where(graph.relation == t, graph.base, 0.0)) for t in range(weights.shape[1])]
    reference = scaling(np.zeros(weights.shape[1]))
    bases = {"x": np.linalg.svd(snapshots, full_matrices=False)[0],
             "y": np.linalg.svd(scaled, full_matrices=False)[0],
             "y weighted": np.linalg.svd(reference[:, None] * scaled, full_matrices=False)[0] / reference[:, None]}
    result = {}
    for k in ranks:
        x_basis = bases["x"][:, :k]
        result[f"x best approximation k={k}"] = min(
            kendall_tau_topk(x, x_basis @ (x_basis.T @ x), k=100) for x in exact)
        for name in ("y", "y weighted"):
            basis = bases[name][:, :k]
            # (D(w) - alpha P(w) D(w)) y = (1 - alpha) v is affine in w: P D has entries b_e w_rel(e)
            terms = [basis.T @ (weights[:, t:t + 1] * basis - alpha * (matrix @ basis))
                     for t, matrix in enumerate(per_relation)]
            constant = basis.T @ (dangling[:, None] * basis) - alpha * np.outer(basis.T @ v, dangling @ basis)
            taus = []
            for theta, x in zip(points, exact):
                w = softmax(theta)
                c = np.linalg.solve(constant + np.tensordot(w, terms, axes=1), (1.0 - alpha) * (basis.T @ v))
                approx = scaling(theta) * (basis @ c)
                taus.append(kendall_tau_topk(x, approx / approx.sum(), k=100))
            result[f"{name} Galerkin k={k}"] = min(taus)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20k nodes")
    parser.add_argument("--seed", type=int, default=5)
    args = parser.parse_args()
    nodes = 20_000 if args.quick else 200_000
    folder = scratch_folder("fitrank-probe-")
    rng = np.random.default_rng(args.seed)
    features = feature_log_out_weights(load_problem("features", nodes, args.seed, folder), rng)
    scale_problem = load_problem("scale", nodes, args.seed, folder)
    scale = scale_inverse_out_weights(scale_problem)
    for name, probe in (("features: log d_j", features), ("scale: 1 / d_j", scale)):
        s = probe["singular_values"]
        print(f"{name}: singular values s_8/s_1 {s[8]:.1e}, s_24/s_1 {s[24]:.1e}, s_40/s_1 {s[40]:.1e}; "
              "worst DEIM error at fresh points " + ", ".join(f"{q} terms {e:.1e}" for q, e in probe["max_error"].items()),
              flush=True)
    galerkin = scaled_variable_galerkin(scale_problem, samples=48 if args.quick else 128, fresh=20,
                                        ranks=(20, 40) if args.quick else (50, 100))
    for name, tau in galerkin.items():
        print(f"scale: {name:32s} worst top-100 tau {tau:.5f}", flush=True)
    print(json.dumps({"nodes": nodes, "features_log_out_weight": features, "scale_inverse_out_weight": scale,
                      "scale_scaled_variables": galerkin}))


if __name__ == "__main__":
    main()
