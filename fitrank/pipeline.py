"""One fit, end to end: data -> reduced model -> training -> full check -> run folder.

:func:`fit` is what ``fitrank fit`` runs and what a notebook calls:

1. load the tables and build the weighting and the PageRank problem;
2. load the saved reduced model when its fingerprint matches, else build it;
3. train in the reduced space (or in the full space, the reference);
4. check theta* with a full solve: pair accuracy and loss per split, full
   against reduced, Kendall tau and normalised L1 on the top-k, and the
   certified bound; when the check misses its tolerance, add the full solution
   at theta* (and points of the optimisation path) to the snapshots, warm-start
   and train again, up to ``check.enrich_rounds`` times;
5. write the run folder atomically (a temporary folder renamed into place).
"""

from __future__ import annotations

import json
import time
import zipfile
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from fitrank.atomic import link_or_copy, refuse_replacing_foreign, refuse_unwritable, staged_folder
from fitrank.config import Config, effective_config, load_config, with_overrides
from fitrank.errors import ConfigError, FitrankInputError, ModelMismatchError
from fitrank.graph import SPLITS, Dataset
from fitrank.metrics import REFERENCE_TOL, agreement_with_solve, misordered_pairs, tied_pairs, within_tolerance
from fitrank.objective import ObjectiveSpec, calibrate, pair_summary
from fitrank.pagerank import PageRankProblem, certified_bound, solve_operator
from fitrank.reduced import ReducedModel, ReductionSettings
from fitrank.regions import RegionalModel, build_model, enrich_model, load_model
from fitrank.snapshots import local_executor
from fitrank.tables import load_dataset
from fitrank.train import TrainResult, train_full, train_reduced
from fitrank.weightings import inert_parameters, make_weighting

RESULT_FILE = "result.json"
MODEL_FILE = "model.npz"
PLOT_FILES = ("loss.png", "weights.png", "singular_values.png")
RUN_ENTRIES = frozenset(("config.toml", RESULT_FILE, "history.csv", "scores.parquet", MODEL_FILE, *PLOT_FILES))
"""Everything :func:`write_run` may put in a run folder: a folder holding anything else is not replaced."""


@dataclass(frozen=True, eq=False)
class FitResult:
    """What a fit produced; ``record`` is exactly what ``result.json`` holds.

    Attributes:
      theta: (p,) learned parameters.
      params: ``{name: value}`` of theta.
      record: the JSON-ready report (params, check, metrics, timings, model).
      x: (n,) full PageRank vector at theta.
      history: training history of every round (DataFrame, with a ``round`` column).
      problem: the PageRank problem fitted.
      model: the final reduced model (None for full-space training).
      run_dir: the run folder written (None when not written).
    """

    theta: np.ndarray
    params: dict
    record: dict
    x: np.ndarray
    history: pd.DataFrame
    problem: PageRankProblem
    model: ReducedModel | RegionalModel | None = None
    run_dir: Path | None = None
    dataset: Dataset | None = field(default=None, repr=False)


def prepare(config: Config) -> tuple[Dataset, PageRankProblem]:
    """Load the data of ``config`` and build its PageRank problem."""
    data = config.data
    dataset = load_dataset(data.edges, data.pairs, data.nodes, seed=config.training.split_seed,
                           split_fractions=tuple(data.split))
    graph = dataset.graph
    options = {}
    if config.weighting.bound is not None:
        if config.weighting.kind == "mixture":
            raise ConfigError("weighting.bound", "the mixture samples its simplex and takes no bound; remove the key")
        options["bound"] = config.weighting.bound
    try:
        weighting = make_weighting(config.weighting.kind, graph, **options)
    except ValueError as err:
        raise ConfigError("weighting.kind", str(err)) from None
    teleport = np.full(graph.n, 1.0 / graph.n) if config.graph.teleport == "uniform" else graph.teleport
    problem = PageRankProblem(graph, weighting, config.graph.damping, teleport, config.graph.dangling)
    return dataset, problem


def reduction_settings(config: Config) -> ReductionSettings:
    r = config.reduction
    return ReductionSettings(method=r.method, samples=r.samples, rank=r.rank, energy=r.energy,
                             max_rank=r.max_rank, rows=r.rows,
                             gamma=r.gamma, edge_budget=r.edge_budget or None, seed=r.seed,
                             snapshot_tol=r.snapshot_tol, regions=r.regions,
                             snapshot_path=str(r.snapshot_file) if r.snapshot_file else None)


def model_path(config: Config) -> Path:
    """Where the reduced model of ``config`` is saved and looked for."""
    given = config.reduction.model
    return Path(given) if given else Path(config.output.folder) / MODEL_FILE


def obtain_model(config: Config, problem: PageRankProblem, *, executor=None, progress: bool = True,
                 log=print) -> tuple[ReducedModel | RegionalModel, bool]:
    """(model, reused): the saved model when it matches ``problem``, else a new one."""
    path = model_path(config)
    settings = reduction_settings(config)
    if path.is_file():
        try:
            model = load_model(path, problem)
        except ModelMismatchError:
            log(f"not reusing {path}: it was built for other data or settings (its fingerprint differs); "
                "building a new one")
        except FitrankInputError as err:
            log(f"not reusing {path}: {err}")
        else:
            if _same_build(model.settings, settings):
                log(f"reusing reduced model {path} (k = {model.rank})")
                return model, True
            log(f"not reusing {path}: it was built with other reduction settings")
    own_pool = executor is None and config.reduction.workers > 1
    pool = local_executor(config.reduction.workers) if own_pool else executor
    try:
        model = build_model(problem, settings, executor=pool, progress=progress)
    finally:
        if own_pool:
            pool.shutdown()
    return model, False


def refuse_bad_outputs(config: Config, *, run: bool) -> None:
    """Raise before any solving if an output of ``config`` cannot be written or would destroy something.

    Args:
      config: the run's config.
      run: a whole run folder will be written (``fitrank fit``), not only the model (``fitrank build``).

    Raises:
      ConfigError: naming the key of the output path at fault.
    """
    model = model_path(config)
    if run:
        run_dir = Path(config.output.folder)
        refuse_unwritable(run_dir, folder=True, key="output.folder")
        kept = [config.source, config.data.edges, config.data.pairs, config.data.nodes,
                config.reduction.snapshot_file]
        if model.resolve() != (run_dir / MODEL_FILE).resolve():
            kept.append(model)  # a shared model elsewhere in the run folder would go with it
        refuse_replacing_foreign(run_dir, own=RUN_ENTRIES, key="output.folder", inputs=kept)
    if config.reduction.model or not run:
        # an empty file holds nothing to lose
        _refuse_overwriting(model, "reduction.model", lambda path: not path.stat().st_size or _is_model_file(path),
                            "a fitrank model file")
    refuse_bad_snapshot_file(config)


def refuse_bad_snapshot_file(config: Config) -> None:
    """Raise before any solving if ``reduction.snapshot_file`` cannot be written or would overwrite another file."""
    if config.reduction.snapshot_file:
        path = Path(config.reduction.snapshot_file)
        if path.resolve() == model_path(config).resolve():
            raise ConfigError("reduction.snapshot_file", f"{path} is also reduction.model, which would overwrite "
                                                         "the snapshots; choose another path")
        _refuse_overwriting(path, "reduction.snapshot_file", _is_snapshot_matrix,
                            "a snapshot matrix (a 2-d float64 .npy file)")


def _refuse_overwriting(path: Path, key: str, is_ours, what: str) -> None:
    """Raise unless ``path`` can be written and is not an existing file that ``is_ours`` does not recognise."""
    refuse_unwritable(path, folder=False, key=key)
    if path.is_file() and not is_ours(path):
        raise ConfigError(key, f"{path} exists and is not {what}, and fitrank would overwrite it; choose "
                               "another path")


def _is_snapshot_matrix(path: Path) -> bool:
    """A .npy file holding what fitrank writes there: one 2-d float64 matrix (any other array is the user's)."""
    try:
        with open(path, "rb") as handle:  # the header only, and the file closed at once (an .npz too)
            version = np.lib.format.read_magic(handle)
            read_header = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                           else np.lib.format.read_array_header_2_0)
            shape, _, dtype = read_header(handle)
    except (OSError, ValueError, EOFError):
        return False
    return len(shape) == 2 and dtype == np.float64


def _is_model_file(path: Path) -> bool:
    """An .npz archive with a model's header (readable or not for this data: that is decided on loading)."""
    try:
        with zipfile.ZipFile(path) as archive:
            return "meta.npy" in archive.namelist()
    except (zipfile.BadZipFile, OSError):
        return False


def _same_build(a: ReductionSettings, b: ReductionSettings) -> bool:
    keys = ("method", "samples", "rank", "energy", "max_rank", "rows", "gamma", "edge_budget", "probes", "seed",
            "snapshot_tol", "regions")
    return all(getattr(a, k) == getattr(b, k) for k in keys)


def full_check(problem: PageRankProblem, dataset: Dataset, theta: np.ndarray, config: Config,
               model: ReducedModel | RegionalModel | None, spec: ObjectiveSpec) -> tuple[dict, np.ndarray]:
    """Compare the reduced model with a full solve at ``theta``.

    Returns:
      (report, x): pair accuracy/loss per split for the full and the reduced
      vectors, tau and normalised L1 on the top-k, the certified bound of the
      reduced vector, ``passed``; and the full vector x (n,).
    """
    start = time.perf_counter()
    op = problem.operator(theta)
    solved = solve_operator(op, tol=min(config.graph.solver_tol, REFERENCE_TOL))
    x = solved.x
    splits = {name: dataset.pairs.subset(name) for name in SPLITS}
    # scores that differ by no more than the full solve's certified error tie, in both vectors: no order is sure
    resolution = solved.report.bound
    report = {"full": {name: pair_summary(x, pairs, spec, resolution=resolution) for name, pairs in splits.items()},
              "solver": {"iterations": solved.report.iterations, "bound": solved.report.bound,
                         "method": solved.report.method},
              "train_pairs_tied": tied_pairs(x, splits["train"], resolution)}
    if model is not None:
        y = model.vector(theta)
        k = min(config.check.top_k, x.size)  # the nodes compared: all of them on a graph smaller than top_k
        tau, l1 = agreement_with_solve(x, y, k=k, x_bound=solved.report.bound)
        report["reduced"] = {name: pair_summary(y, pairs, spec, resolution=resolution) for name, pairs in splits.items()}
        report.update({
            "top_k": k,
            "tau_topk": tau,
            "l1_topk": l1,
            "l1_error": float(np.abs(x - y).sum()),
            # training pairs the reduced vector orders otherwise than the full one: gaps within the
            # model's error, which cannot steer reduced-space training
            "train_pairs_misordered": misordered_pairs(x, y, splits["train"], resolution),
            "certified_bound": certified_bound(op, y),
            "passed": within_tolerance(x, tau, l1, k=k, tau_min=config.check.tau_min, l1_max=config.check.l1_max,
                                       x_bound=solved.report.bound),
        })
    else:
        report["passed"] = True
    report["seconds"] = time.perf_counter() - start
    return report, x


def fit(config: Config | str | Path, *, overrides=(), out: str | Path | None = None, write: bool = True,
        executor=None, progress: bool = True, log=print) -> FitResult:
    """Fit the edge-weight parameters of ``config`` to its preference pairs.

    Args:
      config: a :class:`~fitrank.config.Config` or the path of a TOML file.
      overrides: ``"section.key=value"`` strings applied on top.
      out: run folder, default ``output.folder`` of the config.
      write: write the run folder (False: only return the result).
      executor: a ``concurrent.futures.Executor`` for the offline snapshot solves
        (default: ``reduction.workers`` local processes, or this process).
      progress: show progress bars.
      log: where one-line progress messages go (``print`` by default).

    Returns:
      :class:`FitResult`.
    """
    started = time.perf_counter()
    if not isinstance(config, Config):
        config = load_config(config, overrides)
    elif overrides:
        config = with_overrides(config, overrides)
    if out is not None:
        config = replace(config, output=replace(config.output, folder=Path(out).resolve()))
    run_dir = Path(config.output.folder)
    if write:
        refuse_bad_outputs(config, run=True)
    else:
        refuse_bad_snapshot_file(config)  # written even when the run folder is not
    timings = {}
    tick = time.perf_counter()
    dataset, problem = prepare(config)
    timings["load_s"] = time.perf_counter() - tick
    graph, weighting = problem.graph, problem.weighting
    train_pairs, valid_pairs = dataset.pairs.subset("train"), dataset.pairs.subset("valid")
    if len(train_pairs) == 0:
        raise FitrankInputError(f"{config.data.pairs}: no training pairs; give some pairs the split 'train'")
    log(f"data: {graph.n} nodes, {graph.num_edges} edges, {len(dataset.pairs)} pairs "
        f"({len(train_pairs)} train, {len(valid_pairs)} valid); weighting {weighting.kind} "
        f"with {weighting.num_params} parameters")
    tick = time.perf_counter()
    x_start = problem.solve(weighting.theta0, tol=config.graph.solver_tol).x
    spec = calibrate(config.training.objective_spec(), x_start, train_pairs, n=graph.n)
    timings["theta0_solve_s"] = time.perf_counter() - tick
    loop = config.training.loop_settings()
    rounds, histories, model, reused = [], [], None, False
    theta = weighting.theta0
    if config.training.space == "full":
        tick = time.perf_counter()
        result = train_full(graph, weighting, train_pairs, spec, settings=loop, valid_pairs=valid_pairs,
                            damping=problem.damping, teleport=problem.teleport, dangling=problem.dangling,
                            tol=config.graph.solver_tol, progress=progress)
        timings["training_s"] = time.perf_counter() - tick
        theta = result.theta
        check, x = full_check(problem, dataset, theta, config, None, spec)
        rounds.append(_round_record(0, result, check, None))
        histories.append(result.history_frame().assign(round=0))
        step_s = result.per_step_seconds
    else:
        tick = time.perf_counter()
        model, reused = obtain_model(config, problem, executor=executor, progress=progress, log=log)
        timings["offline_s"] = time.perf_counter() - tick
        log(f"reduced model: {model.method}, k = {model.rank}, rows = {model.info.get('rows', 0)}, "
            f"edges touched = {model.info.get('edges_touched', 0)}"
            + (" (reused)" if reused else f", built in {timings['offline_s']:.1f} s"))
        timings["training_s"], timings["check_s"], step_times = 0.0, 0.0, []
        for round_no in range(config.check.enrich_rounds + 1):
            # training touches only the training pairs' nodes; validation has its own scorer
            scorer = model.scorer(train_pairs.nodes())
            valid_scorer = model.scorer(valid_pairs.nodes()) if len(valid_pairs) else None
            tick = time.perf_counter()
            result = train_reduced(scorer, train_pairs, spec, n=graph.n, theta0=weighting.theta0, settings=loop,
                                   theta_init=theta, valid_pairs=valid_pairs, valid_scorer=valid_scorer,
                                   progress=progress)
            timings["training_s"] += time.perf_counter() - tick
            step_times.append(result.per_step_seconds)
            theta = result.theta
            check, x = full_check(problem, dataset, theta, config, model, spec)
            timings["check_s"] += check["seconds"]
            rounds.append(_round_record(round_no, result, check, model))
            histories.append(result.history_frame().assign(round=round_no))
            log(f"round {round_no}: {result.steps} steps ({result.stopped_because}); full check "
                f"tau@{check['top_k']} = {check['tau_topk']:.5f}, L1@{check['top_k']} = {check['l1_topk']:.2e}, "
                f"bound = {check['certified_bound']:.2e} -> {'passed' if check['passed'] else 'failed'}")
            if check["passed"] or round_no == config.check.enrich_rounds:
                break
            tick = time.perf_counter()
            model = enrich_model(model, _enrichment_points(result, theta, config.check.path_points))
            timings["enrich_s"] = timings.get("enrich_s", 0.0) + time.perf_counter() - tick
        # a round that took no step (theta0 already optimal) has no step time
        timed = [t for t in step_times if np.isfinite(t)]
        step_s = float(np.median(timed)) if timed else float("nan")
    timings["online_step_s"] = step_s
    timings["total_s"] = time.perf_counter() - started
    record = _record(config, dataset, problem, theta, rounds, timings, model, reused)
    record["loss"] = {"name": spec.loss, "param": spec.loss_param, "regularization": spec.regularization}
    history = pd.concat(histories, ignore_index=True)
    outcome = FitResult(theta, weighting.named(theta), record, x, history, problem, model,
                        run_dir if write else None, dataset)
    if write:
        write_run(outcome, config, run_dir)
        if config.reduction.model and model is not None and (not reused or len(rounds) > 1):
            # the shared model file is for later fits and sweeps: give them what this fit built or
            # enriched, as a link to the run folder's copy rather than a second write of its bytes
            link_or_copy(run_dir / MODEL_FILE, model_path(config))
    return outcome


def _enrichment_points(result: TrainResult, theta: np.ndarray, path_points: int) -> np.ndarray:
    points = [theta]
    if path_points > 0 and len(result.path) > 1:
        picks = np.linspace(0, len(result.path) - 1, path_points + 1, dtype=int)[:-1]
        points.extend(result.path[i] for i in picks)
    unique = np.unique(np.asarray(points), axis=0)
    return unique


def _round_record(round_no: int, result: TrainResult, check: dict,
                  model: ReducedModel | RegionalModel | None) -> dict:
    return {
        "round": round_no,
        "steps": result.steps,
        "stopped_because": result.stopped_because,
        "best_valid_acc": result.best_valid_acc,
        "per_step_s": result.per_step_seconds,
        "k": model.rank if model is not None else None,
        "check": {key: value for key, value in check.items() if key != "seconds"},
        "check_s": check["seconds"],
    }


def _record(config, dataset, problem, theta, rounds, timings, model, reused) -> dict:
    weighting = problem.weighting
    final = rounds[-1]["check"]
    record = {
        "params": weighting.named(theta),
        "theta0": weighting.named(weighting.theta0),
        "weighting": weighting.kind,
        "space": config.training.space,
        "check": {"passed": bool(final["passed"]), "rounds": len(rounds),
                  **{k: final[k] for k in ("tau_topk", "l1_topk", "certified_bound", "l1_error", "top_k",
                                           "train_pairs_misordered", "train_pairs_tied") if k in final}},
        "metrics": {"full": final["full"], **({"reduced": final["reduced"]} if "reduced" in final else {})},
        "rounds": rounds,
        "timings": timings,
        "data": {"nodes": problem.graph.n, "edges": problem.graph.num_edges, "pairs": len(dataset.pairs),
                 "notes": list(dataset.notes)},
    }
    record["inert_parameters"] = inert_parameters(weighting, theta)
    if weighting.coefficients is not None:
        record["mixture_weights"] = weighting.named(np.asarray(weighting.coefficients(np.asarray(theta))))
    if model is not None:
        theta = np.asarray(theta, dtype=np.float64)
        outside = (theta < weighting.lower) | (theta > weighting.upper)
        # The basis was sampled inside the box: beyond it the reduced model extrapolates
        # (the full check still judges the result, and enrichment adds snapshots there).
        record["outside_sampled_box"] = [name for name, out in zip(weighting.param_names, outside) if out]
        record["model"] = {"method": model.method, "k": model.rank, "rows": model.info.get("rows", 0),
                           "edges_touched": model.info.get("edges_touched", 0), "reused": reused,
                           "fingerprint": problem.fingerprint(), "lost_energy": model.info["lost_energy"]}
    return _json_ready(record)


def _json_ready(value):
    if isinstance(value, dict):
        return {str(k): _json_ready(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_ready(v) for v in value]
    if isinstance(value, (np.floating, float)):
        return None if not np.isfinite(value) else float(value)
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, np.bool_):
        return bool(value)
    return value


def write_run(result: FitResult, config: Config, run_dir: Path) -> Path:
    """Write the run folder: effective config, result.json, history.csv, scores, plots, model.

    Everything goes into a temporary sibling folder first and is renamed into
    place at the end, so a failed run leaves any earlier run folder intact.
    """
    run_dir = Path(run_dir)
    with staged_folder(run_dir) as staging:
        (staging / "config.toml").write_text(effective_config(config), encoding="utf-8")
        (staging / RESULT_FILE).write_text(json.dumps(result.record, indent=2) + "\n", encoding="utf-8")
        result.history.to_csv(staging / "history.csv", index=False)
        graph = result.problem.graph
        order = np.argsort(-result.x, kind="stable")
        rank = np.empty(graph.n, dtype=np.int64)
        rank[order] = np.arange(1, graph.n + 1)
        ids = graph.node_ids
        scores = pd.DataFrame({"node": ids if ids.dtype != object else ids.astype(str),
                               "score": result.x, "rank": rank}).sort_values("rank")
        scores.to_parquet(staging / "scores.parquet", index=False)
        if result.model is not None:
            result.model.save(staging / MODEL_FILE)
        if config.output.plots:
            _write_plots(result, staging)
    return run_dir


def _write_plots(result: FitResult, folder: Path) -> None:
    from fitrank.plots import plot_singular_values, plot_training, plot_weights

    weighting = result.problem.weighting
    training, weights, singular_values = PLOT_FILES
    plot_training(result.history, folder / training)
    plot_weights(weighting.param_names, result.theta, weighting.theta0, folder / weights)
    if result.model is not None:
        plot_singular_values(np.asarray(result.model.info["singular_values"]), folder / singular_values,
                             rank=result.model.rank)


def summary_lines(result: FitResult) -> list[str]:
    """A short human summary of a fit: parameters, accuracy full vs reduced, the check, timings."""
    record = result.record
    lines = ["learned parameters:"]
    width = max(len(name) for name in record["params"])
    for name, value in record["params"].items():
        extra = ""
        if "mixture_weights" in record:
            extra = f"   (weight {record['mixture_weights'][name]:.3f})"
        lines.append(f"  {name:<{width}}  {value:+.4f}{extra}")
    full = record["metrics"]["full"]
    reduced = record["metrics"].get("reduced", {})
    lines.append("pair accuracy       " + "  ".join(f"{name:>7s}" for name in SPLITS))
    for label, block in (("full solve", full), ("reduced model", reduced)):
        if block:
            cells = "  ".join(_cell(block[name]["accuracy"]) for name in SPLITS)
            lines.append(f"  {label:<18}{cells}")
    if _kept_theta0(record):
        lines.append("note: validation accuracy was best before the first step, so the parameters stay at theta0 "
                     "(the best validation step is the one kept); check that the valid pairs agree with the train pairs")
    for round_record in record["rounds"]:
        if round_record["stopped_because"] == "non_finite":
            lines.append(f"note: training round {round_record['round']} stopped after {round_record['steps']} step(s): "
                         "the objective or its gradient was not finite there (the pair losses overflow when "
                         "training.temperature is tiny or pair weights are extreme); the parameters are the last "
                         "finite ones")
    tied, train_pairs = record["check"].get("train_pairs_tied"), full["train"]["pairs"]
    if tied and train_pairs and tied >= 0.05 * train_pairs:
        lines.append(f"note: {tied} of {train_pairs} training pairs differ by less than the full solve's certified "
                     "error at the learned parameters: they count as ties, and no solve can order them there")
    misordered = record["check"].get("train_pairs_misordered")
    if misordered and train_pairs and misordered >= 0.05 * train_pairs:
        lines.append(f"note: the reduced model orders {misordered} of {train_pairs} training pairs otherwise than "
                     "the full solve (their gaps are within its error), so they could not steer training; train "
                     "in the full space (training.space = \"full\") or raise reduction.rank")
    if record.get("inert_parameters"):
        lines.append(f"note: {', '.join(record['inert_parameters'])} cannot change the walk (each node weighs all "
                     "its out-edges by it alike, and the normalisation cancels it), so the pairs cannot inform it; "
                     "it stays at theta0")
    if record.get("outside_sampled_box"):
        lines.append(f"note: {', '.join(record['outside_sampled_box'])} ended outside the box sampled offline, "
                     "where the reduced model extrapolates; widen weighting.bound to sample there")
    check = record["check"]
    if "tau_topk" in check:
        lines.append(f"full check: {'passed' if check['passed'] else 'FAILED'} after {check['rounds']} round(s): "
                     f"Kendall tau@{check['top_k']} {_cell(check['tau_topk'], '.5f', 0)}, L1@{check['top_k']} "
                     f"{_cell(check['l1_topk'], '.2e', 0)}, certified L1 bound "
                     f"{_cell(check['certified_bound'], '.2e', 0)}")
    t = record["timings"]
    parts = [f"total {t['total_s']:.1f} s"]
    if "offline_s" in t:
        parts.append(f"offline {t['offline_s']:.1f} s")
    if t.get("online_step_s") is not None:
        parts.append(f"per step {t['online_step_s'] * 1e3:.2f} ms")
    lines.append("time: " + ", ".join(parts))
    if result.run_dir is not None:
        lines.append(f"run folder: {result.run_dir}")
    return lines


def _kept_theta0(record: dict) -> bool:
    """True when training took steps but the best-validation rule kept the starting parameters theta0."""
    stepped = any(round_record["steps"] > 0 for round_record in record["rounds"])
    validated = record["metrics"]["full"]["valid"]["pairs"] > 0
    return stepped and validated and record["params"] == record["theta0"]


def _cell(value, spec: str = "7.4f", width: int = 7) -> str:
    # record values went through _json_ready: a NaN or infinite number arrives as None
    return f"{'n/a':>{width}}" if value is None or not np.isfinite(value) else format(value, spec)
