"""Reduced models against full solves: online time, speed-up and accuracy, in one run.

On a generated graph (about 2M edges, 4 relations, 3 features by default) this
builds, for k = 50 and 100, a Galerkin model (relation mixture) and
interpolation models (relation scale and feature log-linear, r = 2k rows), and
prints for each: full solve time, online time for the scores of 2,000 nodes,
their ratio, and the worst Kendall tau / normalised L1 on the top-100 over 20
fresh parameter points. For both interpolated weightings it also prints the
trade-off between edges touched by the interpolation rows and accuracy, over
cost weights gamma. Last, regional models (``reduction.regions``: one basis per
k-means region of the parameter domain, chosen online by the nearest centre)
of both interpolated weightings: 12 regions from 512 samples, k = 50 per region
(r = 100), the feature weighting's rows chosen with gamma = 16 (half the edges
of the default 4, at the same accuracy on these graphs).

    python experiments/bench_reduced.py            # about 2M edges
    python experiments/bench_reduced.py --quick    # small, under a minute

The last line is one JSON object.
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np

from _timing import median_seconds  # noqa: E402  (also puts the checkout on sys.path)

from fitrank.generate import generate_dataset, write_dataset  # noqa: E402
from fitrank.metrics import kendall_tau_topk, l1_topk  # noqa: E402
from fitrank.pagerank import PageRankProblem  # noqa: E402
from fitrank.reduced import ReductionSettings, build_reduced_model  # noqa: E402
from fitrank.regions import build_model  # noqa: E402
from fitrank.tables import load_dataset  # noqa: E402
from fitrank.weightings import make_weighting  # noqa: E402


def online_seconds(model, nodes, thetas, repeats=200, burst=10) -> tuple[float, float]:
    """(cycling, repeated): seconds per evaluation, going round the points, and ``burst`` calls at each.

    Going round is the worst case for a regional model (each call may run
    another region than the last, with its arrays out of cache); repeated calls
    at one point are what training and interactive use do (consecutive steps
    stay in one region). For one global model the two agree up to noise.
    """
    scorer = model.scorer(nodes)
    fn = jax.jit(scorer.fn)
    points = [jnp.asarray(t) for t in thetas]
    fn(points[0], scorer.arrays).block_until_ready()

    def cycling():
        for point in points:
            fn(point, scorer.arrays).block_until_ready()

    def repeated():
        for point in points:
            for _ in range(burst):
                fn(point, scorer.arrays).block_until_ready()

    rounds = max(3, repeats // len(points))
    return (median_seconds(cycling, rounds) / len(points),
            median_seconds(repeated, max(3, rounds // burst)) / (len(points) * burst))


def accuracy(model, thetas, exact):
    taus, l1s = [], []
    for theta, x in zip(thetas, exact):
        y = model.vector(theta)
        taus.append(kendall_tau_topk(x, y, k=100))
        l1s.append(l1_topk(x, y, k=100))
    return float(min(taus)), float(max(l1s))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small graph, under a minute")
    parser.add_argument("--nodes", type=int, default=None)
    parser.add_argument("--samples", type=int, default=128)
    parser.add_argument("--fresh", type=int, default=20)
    parser.add_argument("--seed", type=int, default=5)
    parser.add_argument("--regions", type=int, default=None, help="regions of the regional models (default 12)")
    parser.add_argument("--regional-samples", type=int, default=None, help="their samples (default 512)")
    args = parser.parse_args()
    nodes = args.nodes or (8_000 if args.quick else 200_000)
    ranks = (20, 40) if args.quick else (50, 100)
    samples = 48 if args.quick else args.samples
    fresh_count = 6 if args.quick else args.fresh
    regions = args.regions or (4 if args.quick else 12)
    regional_samples = args.regional_samples or (96 if args.quick else 512)
    rng = np.random.default_rng(args.seed)

    results = {}
    lines = []
    edges_count = None
    folder = Path(tempfile.mkdtemp(prefix="fitrank-bench-"))
    for kind, method in (("mixture", "galerkin"), ("scale", "interpolation"), ("features", "interpolation")):
        edges, pairs, truth = generate_dataset(nodes, args.seed, kind, relations=4, features=3)
        write_dataset(folder / kind, edges, pairs, truth)
        dataset = load_dataset(folder / kind / "edges.csv", folder / kind / "pairs.csv")
        graph = dataset.graph
        edges_count = graph.num_edges
        problem = PageRankProblem(graph, make_weighting(kind, graph))
        fresh = problem.weighting.sample(fresh_count, seed=10_000 + args.seed)
        start = time.perf_counter()
        exact = [problem.solve(theta).x for theta in fresh]
        full_s = (time.perf_counter() - start) / len(fresh)
        score_nodes = np.sort(rng.choice(graph.n, size=min(2000, graph.n), replace=False))
        per_rank = {}
        for k in ranks:
            settings = ReductionSettings(method=method, samples=samples, rank=k, rows=2 * k)
            model = build_reduced_model(problem, settings, progress=False)
            online, online_repeated = online_seconds(model, score_nodes, fresh)
            tau, l1 = accuracy(model, fresh, exact)
            per_rank[k] = {"online_s": online, "online_repeated_s": online_repeated, "speedup": full_s / online,
                           "tau_top100_min": tau, "l1_top100_max": l1, "edges_touched": model.info["edges_touched"],
                           "offline_s": model.info["offline_s"],
                           "row_choice_and_assembly_s": model.info["timings"]["assemble_s"]}
            lines.append(f"{kind:9s} {method:13s} k={k:3d} full {full_s * 1e3:8.1f} ms  online {online * 1e3:7.3f} ms"
                         f" (repeated {online_repeated * 1e3:.3f})  x{full_s / online:8.0f}"
                         f"  tau>={tau:.5f}  L1<={l1:.1e}"
                         f"  edges touched {model.info['edges_touched']:>8d}  offline {model.info['offline_s']:.1f} s"
                         f" (rows and assembly {model.info['timings']['assemble_s']:.1f} s)")
            print(lines[-1], flush=True)
        results[kind] = {"method": method, "full_solve_s": full_s, "by_rank": per_rank}
        if method == "interpolation":
            k = ranks[-1]
            curve = []
            for gamma in (0.0, 0.05, 0.25, 1.0, 4.0, 16.0):
                settings = ReductionSettings(method=method, samples=samples, rank=k, rows=2 * k, gamma=gamma)
                model = build_reduced_model(problem, settings, progress=False)
                tau, l1 = accuracy(model, fresh, exact)
                online, _ = online_seconds(model, score_nodes, fresh)
                curve.append({"gamma": gamma, "edges_touched": model.info["edges_touched"], "tau_top100_min": tau,
                              "l1_top100_max": l1, "online_s": online})
                print(f"  {kind} trade-off gamma={gamma:<5} edges touched {model.info['edges_touched']:>8d}"
                      f" ({model.info['edges_touched'] / graph.num_edges:6.1%})  tau>={tau:.5f}  L1<={l1:.1e}"
                      f"  online {online * 1e3:.3f} ms", flush=True)
            results[kind]["tradeoff"] = curve
            small = ranks[0]
            settings = ReductionSettings(method=method, samples=regional_samples, rank=small, rows=2 * small,
                                         regions=regions, gamma=16.0 if kind == "features" else None)
            model = build_model(problem, settings, progress=False)
            online, online_repeated = online_seconds(model, score_nodes, fresh)
            tau, l1 = accuracy(model, fresh, exact)
            used = len({model.region_of(theta) for theta in fresh})
            results[kind]["regional"] = {"regions": regions, "samples": regional_samples, "k": small,
                                         "online_s": online, "online_repeated_s": online_repeated,
                                         "speedup": full_s / online, "speedup_repeated": full_s / online_repeated,
                                         "tau_top100_min": tau,
                                         "l1_top100_max": l1, "edges_touched": model.info["edges_touched"],
                                         "offline_s": model.info["offline_s"], "regions_used": used}
            lines.append(f"{kind:9s} {'regional':13s} k={small:3d} full {full_s * 1e3:8.1f} ms"
                         f"  online {online * 1e3:7.3f} ms (repeated {online_repeated * 1e3:.3f}, "
                         f"x{full_s / online_repeated:.0f})  x{full_s / online:8.0f}  tau>={tau:.5f}  L1<={l1:.1e}"
                         f"  edges touched {model.info['edges_touched']:>8d}  offline {model.info['offline_s']:.1f} s"
                         f" ({regions} regions, {regional_samples} samples; {used} used by the fresh points)")
            print(lines[-1], flush=True)

    k = ranks[-1]
    summary = {
        "edges": edges_count,
        "full_solve_s": results["scale"]["full_solve_s"],
        "galerkin_s": results["mixture"]["by_rank"][k]["online_s"],
        "interp_s": {kind: results[kind]["by_rank"][k]["online_s"] for kind in ("scale", "features")},
        "tau_top100_min": {kind: results[kind]["by_rank"][k]["tau_top100_min"] for kind in results},
        "l1_top100_max": {kind: results[kind]["by_rank"][k]["l1_top100_max"] for kind in results},
        "k": k,
        "regional": {kind: {name: results[kind]["regional"][name]
                            for name in ("regions", "k", "online_s", "speedup", "online_repeated_s",
                                         "speedup_repeated", "tau_top100_min", "l1_top100_max")}
                     for kind in ("scale", "features")},
        "details": results,
    }
    print(json.dumps(summary))


if __name__ == "__main__":
    main()
