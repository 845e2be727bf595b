"""Training in the reduced space against training in the full space, in one run.

On a generated graph (about 2M edges by default) for the relation mixture
(Galerkin) and the relation scale (interpolation), this measures:

* the time of one objective + gradient evaluation: reduced (the jit-compiled
  JAX function on the training nodes) and full (full solve + adjoint solve,
  warm-started as the full-space trainer does), and their ratio;
* the held-out (test) pair accuracy at the end of a reduced fit (offline stage,
  training, full check, enrichment) and of a full-space fit with the same loss,
  optimiser and settings;
* the wall time of the whole reduced fit against 20 full-space steps.

    python experiments/bench_training.py            # about 2M edges
    python experiments/bench_training.py --quick    # small, under a minute

The last line is one JSON object.
"""

from __future__ import annotations

import argparse
import json
import time
from pathlib import Path

import jax
import numpy as np

from _timing import median_seconds, scratch_folder  # noqa: E402  (also puts the checkout on sys.path)

from fitrank.pipeline import fit  # noqa: E402
from fitrank.generate import generate_dataset, write_dataset  # noqa: E402
from fitrank.objective import full_objective, reduced_objective  # noqa: E402


def step_times(result, repeats: int) -> dict:
    """Seconds of one objective + gradient evaluation, reduced and full, at nearby points."""
    problem, model = result.problem, result.model
    train = result.dataset.pairs.subset("train")
    spec_record = result.record["loss"]
    from fitrank.objective import ObjectiveSpec

    spec = ObjectiveSpec(spec_record["name"], spec_record["param"], spec_record["regularization"])
    theta = np.asarray(result.theta)
    rng = np.random.default_rng(0)
    points = [theta + 0.01 * rng.normal(size=theta.size) for _ in range(max(repeats, 2))]
    # An optimiser keeps theta on the device; converting a NumPy array at every call
    # (20-40 us here) would be timed as part of the objective otherwise.
    device_points = [jax.device_put(point) for point in points]

    reduced = reduced_objective(model.scorer(train.nodes()), train, spec, n=problem.graph.n,
                                theta0=problem.weighting.theta0)
    reduced(points[0])  # compile once

    def reduced_calls():
        for point in device_points:
            value, grad = reduced.value_and_grad(point, reduced.arrays)
            jax.block_until_ready(grad)

    reduced_s = median_seconds(reduced_calls, 50) / len(points)  # 1,000 calls: this machine drifts by tens of %
    full, _ = full_objective(problem.graph, problem.weighting, train, spec, theta0=problem.weighting.theta0,
                             damping=problem.damping, teleport=problem.teleport, dangling=problem.dangling)
    full(points[0])  # warm start and compile, as after the first step of a run
    start = time.perf_counter()
    for point in points[1:]:
        full(point)
    full_s = (time.perf_counter() - start) / (len(points) - 1)
    return {"reduced_step_s": reduced_s, "full_step_s": full_s, "ratio": full_s / reduced_s}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small graph, under a minute")
    parser.add_argument("--nodes", type=int, default=None)
    parser.add_argument("--seed", type=int, default=3)
    parser.add_argument("--full-steps", type=int, default=40, help="most steps of the full-space fit")
    parser.add_argument("--workers", type=int, default=1,
                        help="processes for the snapshot solves (default 1, fitrank's default: on 2 cores at 2M "
                             "edges two processes took 22.2 s against 19.2 s in-process, process start included)")
    args = parser.parse_args()
    nodes = args.nodes or (5_000 if args.quick else 200_000)
    samples = 32 if args.quick else 64
    folder = scratch_folder("fitrank-bench-training-")
    out, rows = {}, []
    edges_count = None
    for kind in ("mixture", "scale"):
        edges, pairs, truth = generate_dataset(nodes, args.seed, kind, relations=4, noise=0.05)
        write_dataset(folder / kind, edges, pairs, truth)
        edges_count = len(edges)
        config = folder / f"{kind}.toml"
        config.write_text(
            f'[data]\nedges = "{folder / kind / "edges.csv"}"\npairs = "{folder / kind / "pairs.csv"}"\n'
            f'[weighting]\nkind = "{kind}"\n[reduction]\nsamples = {samples}\nworkers = {args.workers}\n'
            f'[output]\nfolder = "{folder / kind / "run"}"\nplots = false\n')
        quiet = {"progress": False, "log": lambda message: None, "write": False}
        start = time.perf_counter()
        reduced = fit(config, **quiet)
        reduced_total = time.perf_counter() - start
        times = step_times(reduced, repeats=20)
        start = time.perf_counter()
        full = fit(config, overrides=["training.space=full", f"training.steps={args.full_steps}"], **quiet)
        full_total = time.perf_counter() - start
        full_history = full.history
        full_steps = int(full_history["step"].max()) if len(full_history) else 0
        twenty_full_steps = 20 * times["full_step_s"]
        out[kind] = {
            "method": reduced.record["model"]["method"],
            "k": reduced.record["model"]["k"],
            **times,
            "reduced_test_acc": reduced.record["metrics"]["full"]["test"]["accuracy"],
            "full_test_acc": full.record["metrics"]["full"]["test"]["accuracy"],
            "fit_total_s": reduced_total,
            "offline_s": reduced.record["timings"].get("offline_s"),
            "full_fit_total_s": full_total,
            "full_fit_steps": full_steps,
            "twenty_full_steps_s": twenty_full_steps,
            "check_passed": reduced.record["check"]["passed"],
            "rounds": reduced.record["check"]["rounds"],
        }
        r = out[kind]
        rows.append(f"{kind:8s} {r['method']:13s} k={r['k']:3d}  step reduced {r['reduced_step_s'] * 1e3:8.3f} ms"
                    f"  full {r['full_step_s'] * 1e3:9.1f} ms  x{r['ratio']:8.0f}  test acc reduced "
                    f"{r['reduced_test_acc']:.4f} full {r['full_test_acc']:.4f}  reduced fit {reduced_total:6.1f} s"
                    f" (20 full steps {twenty_full_steps:6.1f} s; full fit {full_total:6.1f} s, {full_steps} steps)")
        print(rows[-1], flush=True)
    summary = {
        "edges": edges_count,
        "reduced_step_s": {kind: out[kind]["reduced_step_s"] for kind in out},
        "full_step_s": {kind: out[kind]["full_step_s"] for kind in out},
        "reduced_test_acc": {kind: out[kind]["reduced_test_acc"] for kind in out},
        "full_test_acc": {kind: out[kind]["full_test_acc"] for kind in out},
        "fit_total_s": {kind: out[kind]["fit_total_s"] for kind in out},
        "twenty_full_steps_s": {kind: out[kind]["twenty_full_steps_s"] for kind in out},
        "details": out,
    }
    print(json.dumps(summary))


if __name__ == "__main__":
    main()
