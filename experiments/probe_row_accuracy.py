"""Where does a global interpolation model lose accuracy: in its basis, or in its rows? Measured in one run.

For each interpolated weighting this builds one POD basis (k = 50 by default,
128 samples, the benchmark's graph and fresh points) and measures, against full
solves at 20 fresh points, the worst top-100 Kendall tau and normalised L1 of
four ways to pick x in span(U):

1. the best approximation in the 2-norm: the orthogonal projection U U^T x
   of the true x (not always the best in tau);
2. the least-squares Petrov-Galerkin solution over all n rows,
   argmin ||M(theta) U c - b|| with sum(U c) = 1, and the Galerkin solution
   U^T M(theta) U c = U^T b (both need the whole graph: the ceilings of any row choice);
3. interpolation with r = 2k rows chosen at several cost weights gamma (0: pure
   pivoted QR, which picks hubs), with the edges each choice touches;
4. the default rows with the residual reconstructed in a POD basis of the
   probes M(theta_j) U before the least squares (the GNAT weighting).

If (1) is already short of the target, only a larger basis or a local one helps;
if (2) reaches it and (3) does not, the rows cost the accuracy.

    python experiments/probe_row_accuracy.py           # 200k nodes, about 10 minutes
    python experiments/probe_row_accuracy.py --quick   # 20k nodes

References:
  Carlberg, Bou-Mosleh & Farhat, "Efficient non-linear model reduction via a
  least-squares Petrov-Galerkin projection and compressive tensor
  approximations", Int. J. Numer. Meth. Engng 86(2), 2011 (LSPG, GNAT).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
from pathlib import Path

import numpy as np

from _timing import scratch_folder  # noqa: E402  (also puts the checkout on sys.path)
from bench_reduced import worst_accuracy
from probe_out_weights import load_problem

from fitrank.interpolation import constrained_least_squares, probe_matrix  # noqa: E402
from fitrank.reduced import ReductionSettings, build_reduced_model  # noqa: E402

GAMMAS = (0.0, 0.25, 1.0, 4.0, 16.0)


def worst(exact: list, approximations: list) -> dict:
    """:func:`bench_reduced.worst_accuracy` as the report's ``{"tau_min", "l1_max"}``."""
    tau, l1 = worst_accuracy(exact, approximations)
    return {"tau_min": tau, "l1_max": l1}


def split(problem, rank: int, samples: int, fresh: int, seed: int) -> dict:
    """Each way of picking x in span(U) (see the module docstring): its worst tau and L1, and edges touched."""
    settings = ReductionSettings(method="interpolation", samples=samples, rank=rank, rows=2 * rank)
    model = build_reduced_model(problem, settings, progress=False)
    vectors, sums = model.basis.vectors, model.basis.vectors.sum(axis=0)
    points = problem.weighting.sample(fresh, seed=10_000 + seed)
    operators = [problem.operator(theta) for theta in points]
    exact = [problem.solve(theta, tol=1e-12).x for theta in points]
    products = [op.apply(vectors) for op in operators]  # M(theta) U, (n, k)
    rhs = [op.rhs() for op in operators]

    def rows_solution(rows=slice(None), weight=None):
        """U c from the constrained least squares on ``rows`` of M(theta) U c = b, optionally ``weight``-ed."""
        solutions = []
        for mu, b in zip(products, rhs):
            mu, b = mu[rows], b[rows]
            if weight is not None:
                mu, b = weight @ mu, weight @ b
            solutions.append(vectors @ np.asarray(constrained_least_squares(mu, b, sums)))
        return solutions

    def galerkin(mu, b):
        c = np.linalg.solve(vectors.T @ mu, vectors.T @ b)
        return vectors @ (c / (sums @ c))

    result = {
        "projection": worst(exact, [vectors @ (vectors.T @ x) for x in exact]),
        "lspg_all_rows": worst(exact, rows_solution()),
        "galerkin_all_rows": worst(exact, [galerkin(mu, b) for mu, b in zip(products, rhs)]),
    }
    default_gamma = settings.resolved_gamma(problem.weighting)
    for gamma in GAMMAS:
        rows_model = model if gamma == default_gamma else build_reduced_model(
            problem, dataclasses.replace(settings, gamma=gamma), progress=False)  # same samples and seed: same basis
        result[f"rows_gamma_{gamma:g}"] = {**worst(exact, [rows_model.vector(theta) for theta in points]),
                                           "edges_touched": int(rows_model.info["edges_touched"])}
    probes = probe_matrix(problem, vectors, model.thetas[:4])
    residual_basis = np.linalg.svd(np.hstack([probes, rhs[0][:, None]]), full_matrices=False)[0][:, :rank]
    weight = np.linalg.pinv(residual_basis[model.rows])
    # the default rows re-solved from the full products (agrees with its gamma's line), then GNAT-weighted
    result["rows_default"] = worst(exact, rows_solution(model.rows))
    result["rows_default_gnat"] = worst(exact, rows_solution(model.rows, weight))
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20k nodes")
    parser.add_argument("--rank", type=int, default=50)
    parser.add_argument("--samples", type=int, default=128)
    parser.add_argument("--fresh", type=int, default=20)
    parser.add_argument("--seed", type=int, default=5)
    args = parser.parse_args()
    nodes = 20_000 if args.quick else 200_000
    folder = scratch_folder("fitrank-probe-")
    report = {"nodes": nodes, "rank": args.rank}
    for kind in ("features", "scale"):
        problem = load_problem(kind, nodes, args.seed, folder)
        result = split(problem, args.rank, args.samples, args.fresh, args.seed)
        for name, numbers in result.items():
            edges = f"  edges touched {numbers['edges_touched']:,}" if "edges_touched" in numbers else ""
            print(f"{kind:8s} {name:20s} worst top-100 tau {numbers['tau_min']:.5f}  L1 {numbers['l1_max']:.1e}{edges}",
                  flush=True)
        report[kind] = result
    print(json.dumps(report))


if __name__ == "__main__":
    main()
