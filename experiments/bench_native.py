"""The native kernels (fitrank.native: the constrained least squares, the feature transition) against XLA's operations, side by side.

Builds reduced models on a generated graph (about 2M edges by default; both
interpolated weightings, global k = 50 and 100 with r = 2k rows, and a
12-region k = 50 model of each), saves them, and starts two worker processes
that load the same files: one with the native kernels, one with
``FITRANK_NATIVE=0``. The workers take turns, a round each, so a slow spell of
this shared machine hits both alike; a round is a warm pass and three timed
passes over 20 fresh points of every model's scorer (2,000 nodes). It prints
each model's median time per evaluation on both sides and the median of the
per-round ratios (native / XLA, below 1 is faster), with their quartiles, and
checks that both sides computed the same values.

    python experiments/bench_native.py            # about 2M edges, about 15 minutes
    python experiments/bench_native.py --quick    # small, about a minute

The last line is one JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from _timing import scratch_folder  # noqa: E402  (also puts the checkout on sys.path)

WORKER = "worker"


def build(folder: Path, nodes: int, seed: int, quick: bool) -> list[dict]:
    """Generate the graphs, build and save the models; the specs the workers load."""
    from fitrank.generate import generate_dataset, write_dataset
    from fitrank.reduced import ReductionSettings
    from fitrank.regions import build_model

    ranks = (20, 40) if quick else (50, 100)
    samples, regional_samples, regions = (48, 96, 4) if quick else (128, 512, 12)
    specs = []
    for kind in ("scale", "features"):
        edges, pairs, truth = generate_dataset(nodes, seed, kind, relations=4, features=3)
        write_dataset(folder / kind, edges, pairs, truth)
        problem = _problem(folder, kind)
        settings = [(f"global k={k}", ReductionSettings(method="interpolation", samples=samples, rank=k, rows=2 * k))
                    for k in ranks]
        settings.append((f"{regions} regions k={ranks[0]}",
                         ReductionSettings(method="interpolation", samples=regional_samples, rank=ranks[0],
                                           rows=2 * ranks[0], regions=regions,
                                           gamma=16.0 if kind == "features" else None)))
        for label, setting in settings:
            path = folder / f"{kind}-{len(specs)}.npz"
            build_model(problem, setting, progress=False).save(path)
            specs.append({"kind": kind, "label": label, "path": str(path)})
            print(f"built {kind:9s} {label}", flush=True)
    return specs


def _problem(folder: Path, kind: str):
    from fitrank.pagerank import PageRankProblem
    from fitrank.tables import load_dataset
    from fitrank.weightings import make_weighting

    graph = load_dataset(folder / kind / "edges.csv", folder / kind / "pairs.csv").graph
    return PageRankProblem(graph, make_weighting(kind, graph))


def worker(folder: Path, specs: list[dict], seed: int) -> None:
    """Load every model; on each line from stdin run one round and print its seconds per evaluation."""
    import jax
    import jax.numpy as jnp

    from fitrank import native
    from fitrank.regions import load_model

    problems, runs = {}, []
    for spec in specs:
        problem = problems.get(spec["kind"]) or problems.setdefault(spec["kind"], _problem(folder, spec["kind"]))
        points = [jnp.asarray(theta) for theta in problem.weighting.sample(20, seed=10_000 + seed)]
        nodes = np.sort(np.random.default_rng(seed).choice(problem.graph.n, min(2000, problem.graph.n),
                                                           replace=False))
        scorer = load_model(spec["path"], problem).scorer(nodes)
        fn = jax.jit(scorer.fn)
        values = [np.asarray(fn(point, scorer.arrays)).tolist() for point in points]
        runs.append((fn, scorer.arrays, points, values))
    print(json.dumps({"native": native.available(), "values": [run[3] for run in runs]}), flush=True)
    for _ in sys.stdin:
        seconds = []
        for fn, arrays, points, _ in runs:
            for point in points:  # warm: the other worker ran in between
                fn(point, arrays).block_until_ready()
            start = time.perf_counter()
            for _ in range(3):
                for point in points:
                    fn(point, arrays).block_until_ready()
            seconds.append((time.perf_counter() - start) / (3 * len(points)))
        print(json.dumps(seconds), flush=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small graph, about a minute")
    parser.add_argument("--nodes", type=int, default=None)
    parser.add_argument("--rounds", type=int, default=None)
    parser.add_argument("--seed", type=int, default=5)
    parser.add_argument(f"--{WORKER}", nargs=2, help=argparse.SUPPRESS)  # folder, specs file: run as a worker
    args = parser.parse_args()
    if args.worker:
        folder, specs = Path(args.worker[0]), json.loads(Path(args.worker[1]).read_text())
        worker(folder, specs, args.seed)
        return
    from fitrank import native

    if not native.available():
        sys.exit("the native kernel is not built here: run `python -m fitrank.native` (make does) first")
    nodes = args.nodes or (8_000 if args.quick else 200_000)
    rounds = args.rounds or (6 if args.quick else 30)
    folder = scratch_folder("fitrank-native-")
    specs = build(folder, nodes, args.seed, args.quick)
    (folder / "specs.json").write_text(json.dumps(specs))
    sides = {"xla": {native.SWITCH: "0"}, "native": {native.SWITCH: "1"}}
    workers = {side: subprocess.Popen([sys.executable, __file__, f"--{WORKER}", str(folder),
                                       str(folder / "specs.json"), "--seed", str(args.seed)],
                                      stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                                      env={**os.environ, **env})
               for side, env in sides.items()}
    ready = {side: json.loads(process.stdout.readline()) for side, process in workers.items()}
    if ready["xla"]["native"] or not ready["native"]["native"]:
        sys.exit("the workers did not get the sides asked for")
    agreement = max(float(np.max(np.abs(np.subtract(a, b))) / np.max(np.abs(b)))
                    for model_a, model_b in zip(ready["native"]["values"], ready["xla"]["values"])
                    for a, b in zip(model_a, model_b))
    times = {side: [] for side in workers}
    for round_ in range(rounds):
        for side in (list(workers) if round_ % 2 == 0 else list(workers)[::-1]):
            workers[side].stdin.write("go\n")
            workers[side].stdin.flush()
            times[side].append(json.loads(workers[side].stdout.readline()))
    for process in workers.values():
        process.stdin.close()
        process.wait()
    xla, fast = np.array(times["xla"]), np.array(times["native"])
    ratios = fast / xla
    print(f"\nseconds per evaluation (scores of 2,000 nodes), medians of {rounds} alternating rounds; "
          f"ratio = native / XLA per round (quartiles); values agree to {agreement:.1e} (relative)")
    results = []
    for i, spec in enumerate(specs):
        record = {"kind": spec["kind"], "model": spec["label"], "xla_s": float(np.median(xla[:, i])),
                  "native_s": float(np.median(fast[:, i])), "ratio": float(np.median(ratios[:, i])),
                  "ratio_q25": float(np.percentile(ratios[:, i], 25)),
                  "ratio_q75": float(np.percentile(ratios[:, i], 75))}
        results.append(record)
        print(f"{spec['kind']:9s} {spec['label']:18s} XLA {record['xla_s'] * 1e3:6.3f} ms  native "
              f"{record['native_s'] * 1e3:6.3f} ms  ratio {record['ratio']:.3f} "
              f"({record['ratio_q25']:.3f}-{record['ratio_q75']:.3f})", flush=True)
    print(json.dumps({"nodes": nodes, "rounds": rounds, "max_relative_difference": agreement, "models": results}))


if __name__ == "__main__":
    main()
