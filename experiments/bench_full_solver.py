"""Benchmark of the full PageRank solve: fitrank against networkx, measured side by side.

All in one run, on one graph written by ``fitrank generate`` (in a child
process), "scale" weighting at theta0 (the base-weighted walk), uniform teleport:

1. End to end, edge table file in -> PageRank vector out, damping 0.85:
   fitrank: ``fitrank.tables.read_edges`` -> ``make_weighting`` ->
   ``walk_operator`` -> ``solve_operator`` (method "auto");
   networkx: pandas reads the same file -> the weights of parallel edges
   (different relations between the same two nodes) are summed, as a DiGraph
   needs -> ``networkx.from_pandas_edgelist`` -> ``networkx.pagerank`` (its
   scipy back end). Both stop on the same test ||x_k+1 - x_k||_1 <= tol (1 - alpha)
   (networkx compares that change with n * its tol, so it gets tol (1 - alpha) / n).
   fitrank reads every column (relations and features are part of its graph);
   networkx reads the three it uses.
   Every run is a fresh child process in the same state: this script's imports
   done (numpy, scipy, pandas, pyarrow, networkx, JAX, fitrank), nothing run yet.
   So fitrank's time includes everything a user's first call pays (its
   operator is assembled in NumPy, so no JAX compile is on this path); process
   start and imports are in neither total (printed apart).
   Runs alternate fitrank / networkx so that changes in machine load hit both;
   the medians over runs are compared. Two prototypes of a cheaper first
   assembly of the operator run the same way beside them (see ``assemble``).
2. Seconds per fitrank power iteration divided by one bare scipy CSR mat-vec
   with the same matrix, each timed over a whole solve's worth of iterations
   (medians of repeats, interleaved so that machine load hits both alike).
3. Mat-vecs (passes over the edges) and seconds of "power", "gauss-seidel",
   "bicgstab", "anderson" and "auto" at damping 0.85 and 0.99, on the generated
   graph and on a copy whose dangling nodes are paired into closed 2-cycles (rank
   sinks: P then has eigenvalues +1 and -1, the case where power iteration
   converges no faster than alpha^k). A Gauss-Seidel sweep is one pass over the
   edges; the graph's sweep plan is built once beforehand (its seconds printed
   apart), as in any run that solves one graph more than once.
4. The L1 difference between the two vectors.

Where a target is missed, the run profiles the cause and measures a prototype
of the fix beside it (``lean_power``, ``adaptive_auto``, the cost of build_graph's sort).
The machine load (1-minute load average) is printed before and after the
end-to-end runs: on a shared machine, compare only numbers taken at similar load.

Usage:
  python experiments/bench_full_solver.py            # 100k nodes, ~1M edges, about 2 minutes
  python experiments/bench_full_solver.py --quick    # 20k nodes, ~200k edges, under a minute
  python experiments/bench_full_solver.py --format csv --end-to-end-only
  python experiments/bench_full_solver.py --scale 10 --end-to-end-only   # ~10M edges, one run each, ~5 minutes

The last line printed is one JSON object with the measured numbers.
"""

from __future__ import annotations

import argparse
import cProfile
import json
import os
import pstats
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import jax
import networkx as nx
import numpy as np
import pandas as pd

from _timing import median_seconds  # noqa: E402  (also puts the checkout on sys.path)

from fitrank.graph import build_graph  # noqa: E402
from fitrank.pagerank import WalkOperator, check_teleport, solve_operator, walk_operator  # noqa: E402
from fitrank.sweeps import cached_sweep_plan  # noqa: E402
from fitrank.tables import read_edges  # noqa: E402
from fitrank.weightings import make_weighting  # noqa: E402

TARGET_SPEEDUP = 20.0
TARGET_ITER_OVER_SPMV = 1.5
MAXITER = 100_000


def write_edge_table(nodes: int, seed: int, folder: Path, file_format: str) -> Path:
    """Run ``fitrank generate`` in a child process; returns the edge table's path."""
    out = folder / "data"
    command = [sys.executable, "-m", "fitrank.cli", "generate", str(out), "--nodes", str(nodes), "--seed", str(seed),
               "--weighting", "scale", "--pairs", "200", "--format", file_format]
    subprocess.run(command, check=True, stdout=subprocess.DEVNULL)
    return out / f"edges.{file_format}"


# ----------------------------------------------------------------------------- end to end


def assemble(graph, weighting, damping: float, how: str = "library") -> WalkOperator:
    """M(theta0) for the "scale" weighting: fitrank's own ``walk_operator`` or a prototype.

    Prototypes of a cheaper first assembly (not fitrank's code path; measured beside it):
    "fused_jit" compiles the transition and the leak coefficients as one program
    (``walk_operator`` compiles the transition and runs the coefficients op by op,
    which compiles two more small programs); "numpy" evaluates the scale transition
    p_e = b_e s_rel(e) / sum_t s_t S[src(e), t], s = exp(theta - max theta), in NumPy
    with no JAX at all (JAX stays for gradients).
    """
    if how == "library":
        return walk_operator(graph, weighting, weighting.theta0, damping=damping)
    theta, tables = weighting.theta0, weighting.tables
    if how == "fused_jit":
        both = jax.jit(lambda th, tb: (weighting.transition(th, tb), weighting.leak_coefficients(th)))
        p, coefficients = (np.asarray(a, dtype=np.float64) for a in both(theta, tables))
    else:
        scale = np.exp(theta - theta.max())
        p = tables["base"] * scale[tables["rel"]] / (tables["out_weight"] @ scale)[tables["slot"]]
        coefficients = np.ones(1)
    leak = weighting.leak_basis @ coefficients
    return WalkOperator(graph.matrix(p), leak, check_teleport(graph.teleport, graph.n), damping, "teleport", p)


def run_fitrank(path: Path, damping: float, tol: float, how: str = "library") -> tuple[np.ndarray, dict]:
    """Edge table -> x with fitrank: (x (n,) in the graph's node order, seconds per phase).

    With ``how="library"``, ``assemble`` is fitrank's own first assembly (NumPy);
    ``assemble_again`` (not part of the total) is the same step repeated, with
    warm caches. Other values of ``how`` swap in a prototype assembly.
    """
    phases = {}
    start = time.perf_counter()
    graph = read_edges(path)
    phases["read"] = time.perf_counter() - start
    mark = time.perf_counter()
    weighting = make_weighting("scale", graph)
    op = assemble(graph, weighting, damping, how)
    phases["assemble"] = time.perf_counter() - mark
    mark = time.perf_counter()
    result = solve_operator(op, tol=tol, maxiter=MAXITER)
    phases["solve"] = time.perf_counter() - mark
    phases["total"] = time.perf_counter() - start
    phases["iterations"] = result.report.iterations
    mark = time.perf_counter()
    assemble(graph, make_weighting("scale", graph), damping, how)
    phases["assemble_again"] = time.perf_counter() - mark
    return result.x, phases


def run_networkx(path: Path, damping: float, tol: float) -> tuple[dict, dict]:
    """Edge table -> x with networkx: ({node id: rank}, seconds per phase)."""
    phases = {}
    start = time.perf_counter()
    columns = ["source", "target", "weight"]
    table = pd.read_parquet(path, columns=columns) if path.suffix == ".parquet" else pd.read_csv(path, usecols=columns)
    table = table.groupby(["source", "target"], sort=False, as_index=False)["weight"].sum()
    phases["read"] = time.perf_counter() - start
    mark = time.perf_counter()
    digraph = nx.from_pandas_edgelist(table, "source", "target", edge_attr="weight", create_using=nx.DiGraph)
    phases["build"] = time.perf_counter() - mark
    mark = time.perf_counter()
    n = digraph.number_of_nodes()
    ranks = nx.pagerank(digraph, alpha=damping, tol=tol * (1 - damping) / n, max_iter=MAXITER, weight="weight")
    phases["solve"] = time.perf_counter() - mark
    phases["total"] = time.perf_counter() - start
    return ranks, phases


SIDES = ("fitrank", "networkx")
PROTOTYPES = ("fitrank+fused_jit", "fitrank+numpy")


def child_run(side: str, path: Path, damping: float, tol: float, vector_out: Path | None) -> dict:
    """One timed end-to-end run in this (fresh) process; the vector is saved after the clock stops."""
    if side == "networkx":
        ranks, phases = run_networkx(path, damping, tol)
        if vector_out is not None:
            pd.DataFrame({"node": list(ranks), "rank": list(ranks.values())}).to_parquet(vector_out)
        return phases
    x, phases = run_fitrank(path, damping, tol, how=side.partition("+")[2] or "library")
    if vector_out is not None:
        np.save(vector_out, x)
    return phases


def _run_child(side: str, path: Path, damping: float, tol: float, vector_out: Path | None) -> dict:
    command = [sys.executable, str(Path(__file__).resolve()), "--child", side, "--table", str(path),
               "--damping", repr(damping), "--tol", repr(tol)]
    if vector_out is not None:
        command += ["--vector-out", str(vector_out)]
    start = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(f"the {side} run failed:\n{done.stderr}")
    phases = json.loads(done.stdout.strip().splitlines()[-1])
    phases["outside_total"] = time.perf_counter() - start - phases["total"]  # process start, imports, saving x
    return phases


def end_to_end(path: Path, damping: float, tol: float, runs: int, folder: Path, sides: tuple[str, ...]) -> dict:
    """``runs`` fresh-process runs of each side, alternating.

    Returns:
      per side the medians of every phase (``medians``) and the run totals
      (``totals``); from the first run, x (n,) of each fitrank side (``x``) and
      networkx's ranks (``ranks``, a node/rank frame).
    """
    records = {side: [] for side in sides}
    vectors = {side: folder / f"{side}-x.{'parquet' if side == 'networkx' else 'npy'}" for side in sides}
    for run in range(runs):
        for side in sides:
            records[side].append(_run_child(side, path, damping, tol, vectors[side] if run == 0 else None))
    return {
        "medians": {side: {key: statistics.median(r[key] for r in rs) for key in rs[0]} for side, rs in records.items()},
        "totals": {side: [r["total"] for r in rs] for side, rs in records.items()},
        "x": {side: np.load(file) for side, file in vectors.items() if side != "networkx"},
        "ranks": pd.read_parquet(vectors["networkx"]),
    }


def read_profile(path: Path, graph) -> dict:
    """Where read_edges spends its time, and what build_graph costs on edges that are already in order."""
    profiler = cProfile.Profile()
    profiler.enable()
    read_edges(path)
    profiler.disable()
    stats = pstats.Stats(profiler).stats
    # Cumulative time of fitrank's own reading steps (and of Arrow's Parquet/CSV reader).
    ours = {key: value for key, value in stats.items()
            if key[0].endswith(("tables.py", "graph.py")) or key[2] in ("read_table", "read_csv")}
    top = sorted(((value[3], f"{Path(key[0]).name}:{key[2]}") for key, value in ours.items()), reverse=True)[:10]
    src, dst = graph.src, graph.dst  # already in build_graph's (target, source) order
    return {
        "top_own_seconds": top,
        "build_graph_on_sorted_s": median_seconds(lambda: build_graph(src, dst, graph.n, base=graph.base,
                                                                       relation=graph.relation,
                                                                       features=graph.features), 3),
        "lexsort_s": median_seconds(lambda: np.lexsort((src, dst)), 3),
        "sorted_check_s": median_seconds(lambda: bool(np.all(np.diff(dst * graph.n + src) >= 0)), 3),
    }


# ----------------------------------------------------------------------------- one iteration


def lean_power(op, tol: float, maxiter: int = MAXITER) -> tuple[np.ndarray, int, float]:
    """Prototype of a leaner power iteration ("teleport" policy), same stopping test as fitrank.

    Differences from fitrank.pagerank._power / WalkOperator.walk: the leaked
    mass is summed over the leaking nodes only and without BLAS (``leak @ x``
    is a threaded BLAS dot, which stalls for milliseconds once JAX's thread
    pool has run); alpha is folded into the matrix once; the teleport and
    right-hand-side terms are one scaled add; the residual reuses one buffer.

    Returns:
      (x (n,) summing to 1, iterations, seconds in the loop: set-up excluded, as in SolveReport.seconds).
    """
    alpha, v = op.damping, op.teleport
    leaky = np.flatnonzero(op.leak)
    leak = op.leak[leaky]
    scaled_walk = op.matrix.copy()
    scaled_walk.data *= alpha
    target = tol * (1.0 - alpha)
    z, buffer = v.copy(), np.empty_like(v)
    start = time.perf_counter()
    for iteration in range(1, maxiter + 1):
        z_next = scaled_walk @ z
        routed = np.multiply(leak, z[leaky]).sum()
        np.multiply(v, alpha * routed + (1.0 - alpha), out=buffer)
        z_next += buffer
        np.subtract(z_next, z, out=buffer)
        residual = np.abs(buffer, out=buffer).sum()
        z = z_next
        if residual <= target:
            return z / z.sum(), iteration, time.perf_counter() - start
    raise RuntimeError(f"lean power iteration did not converge in {maxiter} iterations")


def per_iteration(op, tol: float, repeats: int) -> dict:
    """Median seconds per power iteration (fitrank and the lean prototype) and per bare mat-vec."""
    x = op.teleport.copy()
    fitrank_runs, lean_runs, spmv_runs = [], [], []
    for _ in range(repeats):
        report = solve_operator(op, method="power", tol=tol, maxiter=MAXITER).report
        fitrank_runs.append(report.seconds / report.iterations)
        _, iterations, seconds = lean_power(op, tol)
        lean_runs.append(seconds / iterations)
        # As many back-to-back mat-vecs as the solve made, timed as one block like the solve.
        start = time.perf_counter()
        for _ in range(report.iterations):
            op.matrix @ x
        spmv_runs.append((time.perf_counter() - start) / report.iterations)
    spmv = statistics.median(spmv_runs)
    lean_x, _, _ = lean_power(op, tol)
    fitrank_x = solve_operator(op, method="power", tol=tol, maxiter=MAXITER).x
    return {
        "spmv_s": spmv,
        "iteration_s": statistics.median(fitrank_runs),
        "lean_iteration_s": statistics.median(lean_runs),
        "iter_over_spmv": statistics.median(fitrank_runs) / spmv,
        "lean_iter_over_spmv": statistics.median(lean_runs) / spmv,
        "lean_l1_to_fitrank": float(np.abs(lean_x - fitrank_x).sum()),
    }


def iteration_breakdown(op, calls: int = 30, repeats: int = 5) -> dict:
    """Seconds of the pieces of one power iteration as fitrank.pagerank writes it.

    Each piece runs ``calls`` times back to back (as in a solve), timed as one
    block; the median over ``repeats`` blocks, divided by ``calls``, is given.
    The dot is timed right after a mat-vec, as in the solver: BLAS's worker
    threads sleep during the single-threaded mat-vec and must be woken.
    """
    z = op.teleport.copy()
    walked = op.walk(z)
    leaky = np.flatnonzero(op.leak)

    def per_call(fn):
        return median_seconds(lambda: [fn() for _ in range(calls)], repeats) / calls

    def spmv_then_dot():
        op.matrix @ z
        return op.leak @ z

    def spmv_then_plain_sum():
        op.matrix @ z
        return np.multiply(op.leak[leaky], z[leaky]).sum()

    spmv = per_call(lambda: op.matrix @ z)
    return {
        "P @ z (scipy CSR mat-vec)": spmv,
        "leak @ z after a mat-vec (BLAS dot)": per_call(spmv_then_dot) - spmv,
        "same sum without BLAS, leaking nodes only": per_call(spmv_then_plain_sum) - spmv,
        "teleport * scalar": per_call(lambda: op.teleport * 0.5),
        "alpha * (A z)": per_call(lambda: op.damping * walked),
        "||z_next - z||_1": per_call(lambda: float(np.abs(walked - z).sum())),
        "op.walk(z), all of A z": per_call(lambda: op.walk(z)),
    }


# ----------------------------------------------------------------------------- solver choice


def adaptive_auto(op, tol: float, probe: int = 8, slow: float = 0.6) -> tuple[int, str]:
    """Prototype of an "auto" that looks at the graph instead of the damping alone.

    Runs ``probe`` power iterations, estimates the contraction rate rho from the
    last residual ratios and continues with power iteration when rho < ``slow``,
    with BiCGSTAB (warm-started) otherwise. Power needs -1 / log10(rho) mat-vecs
    per decade of residual; BiCGSTAB took about 3 per decade on the graphs here
    (25-37 mat-vecs for ten decades) at a higher cost per mat-vec, which puts
    the break-even near rho = 0.6 (measured in this script, not a published rule).

    Returns:
      (total mat-vecs, the method it continued with).
    """
    residuals = []
    first = solve_operator(op, method="power", tol=tol, maxiter=probe, raise_on_failure=False,
                           callback=lambda it, r: residuals.append(r))
    if first.report.converged:
        return first.report.iterations, "power"
    rate = (residuals[-1] / residuals[-4]) ** (1 / 3)
    method = "power" if rate < slow else "bicgstab"
    rest = solve_operator(op, method=method, tol=tol, maxiter=MAXITER, x0=first.x)
    return first.report.iterations + rest.report.iterations, method


def with_rank_sinks(graph):
    """The graph with its dangling nodes paired into closed 2-cycles (one left over stays dangling)."""
    dangling = np.flatnonzero(graph.out_degree() == 0)
    pairs = dangling[: dangling.size // 2 * 2].reshape(-1, 2)
    src = np.concatenate([graph.src, pairs[:, 0], pairs[:, 1]])
    dst = np.concatenate([graph.dst, pairs[:, 1], pairs[:, 0]])
    return build_graph(src, dst, graph.n)


def matvec_counts(graph, tol: float, adaptive: bool) -> dict:
    """Mat-vecs and seconds of each method at damping 0.85 and 0.99 on ``graph`` (theta0 of "scale")."""
    weighting = make_weighting("scale", graph)
    start = time.perf_counter()
    cached_sweep_plan(graph)
    counts = {"sweep plan (once per graph)": {"matvecs": 0, "seconds": time.perf_counter() - start, "used": "-"}}
    for damping in (0.85, 0.99):
        op = walk_operator(graph, weighting, weighting.theta0, damping=damping)
        for method in ("power", "gauss-seidel", "bicgstab", "anderson", "auto"):
            report = solve_operator(op, method=method, tol=tol, maxiter=MAXITER).report
            counts[f"{method}@{damping}"] = {"matvecs": report.iterations, "seconds": report.seconds,
                                             "used": report.method}
        if adaptive:
            start = time.perf_counter()
            matvecs, used = adaptive_auto(op, tol)
            counts[f"adaptive@{damping}"] = {"matvecs": matvecs, "seconds": time.perf_counter() - start,
                                             "used": used}
    return counts


# ----------------------------------------------------------------------------- report


def _print_counts(title: str, counts: dict) -> None:
    print(title)
    print(f"    {'method@damping':<28}{'mat-vecs':>10}{'seconds':>10}  used")
    for name, entry in counts.items():
        print(f"    {name:<28}{entry['matvecs']:>10}{entry['seconds']:>10.3f}  {entry['used']}")


def _auto_targets(counts: dict, method: str = "auto") -> dict:
    """No more mat-vecs than power at 0.85, fewer at 0.99, for ``method``."""
    return {
        f"{method}_at_0.85": counts[f"{method}@0.85"]["matvecs"] <= counts["power@0.85"]["matvecs"],
        f"{method}_at_0.99": counts[f"{method}@0.99"]["matvecs"] < counts["power@0.99"]["matvecs"],
    }


def _load() -> float:
    return round(os.getloadavg()[0], 2)


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="20k nodes (~200k edges), under a minute")
    parser.add_argument("--scale", type=float, default=1.0,
                        help="nodes = 100000 x scale (~10 edges per node); 10 gives ~10M edges")
    parser.add_argument("--nodes", type=int, default=None, help="nodes of the generated graph (overrides --scale)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--format", choices=("parquet", "csv"), default="parquet")
    parser.add_argument("--tol", type=float, default=1e-8, help="certified L1 error of both solvers")
    parser.add_argument("--runs", type=int, default=None,
                        help="end-to-end runs of each side (default 3, 1 above 200k nodes)")
    parser.add_argument("--repeats", type=int, default=7, help="repeats of the per-iteration timings")
    parser.add_argument("--end-to-end-only", action="store_true",
                        help="skip parts 2 and 3 (per-iteration cost, mat-vec counts); their JSON fields are null")
    parser.add_argument("--no-prototypes", action="store_true",
                        help="skip the end-to-end runs of the prototype assemblies")
    parser.add_argument("--child", choices=SIDES + PROTOTYPES, help=argparse.SUPPRESS)
    parser.add_argument("--table", type=Path, help=argparse.SUPPRESS)
    parser.add_argument("--damping", type=float, default=0.85, help=argparse.SUPPRESS)
    parser.add_argument("--vector-out", type=Path, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        phases = child_run(args.child, args.table, args.damping, args.tol, args.vector_out)
        print(json.dumps(phases))
        return phases
    nodes = args.nodes or (20_000 if args.quick else round(100_000 * args.scale))
    runs = args.runs or (3 if nodes <= 200_000 else 1)
    damping = args.damping
    print(f"machine: {os.cpu_count()} cores, OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS', 'unset')}")

    with tempfile.TemporaryDirectory(prefix="fitrank-bench-") as tmp:
        path = write_edge_table(nodes, args.seed, Path(tmp), args.format)
        load_start = _load()
        sides = SIDES + (() if args.no_prototypes else PROTOTYPES)
        e2e = end_to_end(path, damping, args.tol, runs, Path(tmp), sides)
        load_end = _load()
        fr, nxp = e2e["medians"]["fitrank"], e2e["medians"]["networkx"]
        speedup = nxp["total"] / fr["total"]
        graph = read_edges(path)
        profile = read_profile(path, graph) if speedup < TARGET_SPEEDUP else None

    x = e2e["x"]["fitrank"]
    x_nx = e2e["ranks"].set_index("node")["rank"].reindex(pd.Index(graph.node_ids)).to_numpy()
    l1_diff = float(np.abs(x - x_nx).sum())
    timing, counts, sink_counts = None, None, None
    if not args.end_to_end_only:
        weighting = make_weighting("scale", graph)
        op = walk_operator(graph, weighting, weighting.theta0, damping=damping)
        timing = per_iteration(op, args.tol, args.repeats)
        counts = matvec_counts(graph, args.tol, adaptive=True)
        sink_counts = matvec_counts(with_rank_sinks(graph), args.tol, adaptive=True)

    print(f"graph: {graph.n} nodes, {graph.num_edges} edges ({args.format}), {graph.num_relations} relations, "
          f"{int(np.sum(graph.out_degree() == 0))} dangling; damping {damping}, tol {args.tol:g} (certified L1)")
    print()
    print(f"end to end, median of {runs} fresh-process run(s) per side; load average {load_start} before, "
          f"{load_end} after")
    print(f"{'  seconds':<28}{'fitrank':>10}{'networkx':>10}")
    print(f"{'  read table':<28}{fr['read']:>10.3f}{nxp['read']:>10.3f}")
    print(f"{'  build graph / operator':<28}{fr['assemble']:>10.3f}{nxp['build']:>10.3f}")
    print(f"{'  solve':<28}{fr['solve']:>10.3f}{nxp['solve']:>10.3f}")
    print(f"{'  total':<28}{fr['total']:>10.3f}{nxp['total']:>10.3f}")
    print(f"  runs: fitrank {', '.join(f'{t:.3f}' for t in e2e['totals']['fitrank'])}; "
          f"networkx {', '.join(f'{t:.3f}' for t in e2e['totals']['networkx'])}")
    print(f"  fitrank's total includes its first operator build: building it again takes "
          f"{fr['assemble_again']:.3f} s instead of {fr['assemble']:.3f} s")
    print(f"  not in the totals: process start and imports (and saving the vector), "
          f"{fr['outside_total']:.2f} s fitrank, {nxp['outside_total']:.2f} s networkx")
    print(f"speedup {speedup:.1f}x (target >= {TARGET_SPEEDUP:.0f}x); L1 difference {l1_diff:.2e}; "
          f"{fr['iterations']:.0f} fitrank mat-vecs, {fr['solve'] / fr['iterations'] * 1e3:.2f} ms each in this solve")
    prototypes = {side: e2e["medians"][side] for side in sides if side in PROTOTYPES}
    for side, med in prototypes.items():
        print(f"  prototype {side} (not fitrank's code path; see assemble()): build operator {med['assemble']:.3f} s, "
              f"total {med['total']:.3f} s, speedup {nxp['total'] / med['total']:.1f}x; "
              f"L1 to fitrank's x {np.abs(e2e['x'][side] - x).sum():.1e}")
    if profile is not None:
        print("speedup target missed; read_edges, cumulative seconds of its steps (nested steps count twice):")
        for seconds, name in profile["top_own_seconds"]:
            print(f"    {name:<44}{seconds:8.3f}")
        print(f"    build_graph on edges already in order: {profile['build_graph_on_sorted_s']:.3f} s "
              f"(sorting them again with np.lexsort: {profile['lexsort_s']:.3f} s; checking the order: "
              f"{profile['sorted_check_s']:.3f} s)")
    end_to_end_ratio = None
    if timing is not None:
        print()
        print(f"one bare CSR mat-vec            {timing['spmv_s'] * 1e3:8.3f} ms")
        print(f"one fitrank power iteration     {timing['iteration_s'] * 1e3:8.3f} ms = "
              f"{timing['iter_over_spmv']:.2f} mat-vecs (target <= {TARGET_ITER_OVER_SPMV})")
        end_to_end_ratio = fr["solve"] / fr["iterations"] / timing["spmv_s"]
        print(f"one iteration of the end-to-end solve above = {end_to_end_ratio:.2f} mat-vecs "
              f"(first solve in a fresh process)")
        print(f"one lean prototype iteration    {timing['lean_iteration_s'] * 1e3:8.3f} ms = "
              f"{timing['lean_iter_over_spmv']:.2f} mat-vecs (L1 to fitrank's x {timing['lean_l1_to_fitrank']:.1e})")
        if max(timing["iter_over_spmv"], end_to_end_ratio) > TARGET_ITER_OVER_SPMV:
            print("per-iteration target missed (in the median or in the first solve); one fitrank power iteration "
                  "piece by piece (ms):")
            for name, seconds in iteration_breakdown(op).items():
                print(f"    {name:<44}{seconds * 1e3:8.3f}")
        print()
        _print_counts("mat-vecs, generated graph:", counts)
        _print_counts("mat-vecs, same graph with its dangling nodes paired into 2-cycles (rank sinks):", sink_counts)

    def rounded(value, digits=3):
        return None if value is None else round(value, digits)

    summary = {
        "edges": graph.num_edges,
        "nodes": graph.n,
        "format": args.format,
        "tol": args.tol,
        "runs": runs,
        "cpu_count": os.cpu_count(),
        "load_avg_1min": load_end,
        "load_avg_before_end_to_end": load_start,
        "fitrank_s": round(fr["total"], 4),
        "networkx_s": round(nxp["total"], 4),
        "speedup": round(speedup, 2),
        "fitrank_runs_s": [round(t, 4) for t in e2e["totals"]["fitrank"]],
        "networkx_runs_s": [round(t, 4) for t in e2e["totals"]["networkx"]],
        "fitrank_phases_s": {k: round(fr[k], 4) for k in ("read", "assemble", "solve", "assemble_again")},
        "networkx_phases_s": {k: round(nxp[k], 4) for k in ("read", "build", "solve")},
        "jax_compile_included": False,  # walk_operator assembles in NumPy
        "prototypes": {side: {"assemble_s": round(med["assemble"], 4), "total_s": round(med["total"], 4),
                              "speedup": round(nxp["total"] / med["total"], 2),
                              "l1_to_fitrank": float(np.abs(e2e["x"][side] - x).sum())}
                       for side, med in prototypes.items()},
        "imports_included": False,
        "l1_diff": l1_diff,
        "iter_over_spmv": rounded(timing and timing["iter_over_spmv"]),
        "end_to_end_iter_over_spmv": rounded(end_to_end_ratio),
        "lean_iter_over_spmv": rounded(timing and timing["lean_iter_over_spmv"]),
        "matvecs": counts and {name: entry["matvecs"] for name, entry in counts.items() if "@" in name},
        "solve_s": counts and {name: round(entry["seconds"], 4) for name, entry in counts.items() if "@" in name},
        "sweep_plan_s": counts and round(counts["sweep plan (once per graph)"]["seconds"], 4),
        "auto_uses": counts and {name: entry["used"] for name, entry in counts.items() if name.startswith("auto")},
        "matvecs_rank_sinks": sink_counts and {name: entry["matvecs"] for name, entry in sink_counts.items()
                                               if "@" in name},
        "targets_met": {
            "speedup": speedup >= TARGET_SPEEDUP,
            **({} if timing is None else {
                "iter_over_spmv": timing["iter_over_spmv"] <= TARGET_ITER_OVER_SPMV,
                **_auto_targets(counts),
                **_auto_targets(counts, "anderson"),
                **_auto_targets(counts, "gauss-seidel"),
                **{f"rank_sinks_{k}": v for k, v in _auto_targets(sink_counts).items()},
            }),
        },
    }
    print(json.dumps(summary))
    return summary


if __name__ == "__main__":
    main()
