"""The ``fitrank`` command line: one subcommand per job.

Every subcommand is a small function ``_cmd_<name>(args) -> int`` registered in
:func:`_parser`. Bad input (:class:`fitrank.errors.FitrankInputError`) becomes
one line on stderr and exit code 2, never a traceback.
"""

from __future__ import annotations

import argparse
import os
import sys
import warnings
from concurrent.futures import BrokenExecutor

from fitrank.errors import ConvergenceError, FitrankInputError
from fitrank import interrupt


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line error: the message and where the help is, not the whole usage block."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="fitrank",
        description="Learn edge-weight parameters so that PageRank agrees with preference pairs.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    # --- generate -----------------------------------------------------------
    gen = sub.add_parser("generate", help="write a synthetic dataset with known ground-truth parameters")
    gen.add_argument("out_dir", metavar="OUT_DIR")
    gen.add_argument("--nodes", type=int, default=5000)
    gen.add_argument("--seed", type=int, default=0)
    gen.add_argument("--weighting", choices=("mixture", "scale", "features"), default="scale")
    gen.add_argument("--relations", type=int, help="relation types (default 3)")
    gen.add_argument("--features", type=int, help="numeric edge feature columns (default 4)")
    gen.add_argument("--avg-degree", dest="avg_degree", type=float, help="edges per node (default 10)")
    gen.add_argument("--communities", type=int, help="communities per relation (default about sqrt(nodes)/2)")
    gen.add_argument("--mixing", type=float, help="mean share of edges leaving their community (default 0.3)")
    gen.add_argument("--dangling", type=float, help="share of nodes with no out-edges by design (default 0.1)")
    gen.add_argument("--pairs", type=int, help="preference pairs (default min(4000, 2 * nodes))")
    gen.add_argument("--noise", type=float, help="share of pair labels flipped, in [0, 0.5) (default 0)")
    gen.add_argument("--top", type=int, help="top-rank pool most pair anchors come from (default 1000)")
    gen.add_argument("--window", type=float, help="partner within window * rank of the anchor (default 0.2)")
    gen.add_argument("--split", help="train,valid,test fractions (default 0.7,0.15,0.15)")
    gen.add_argument("--damping", type=float, help="PageRank damping of the truth (default 0.85)")
    gen.add_argument("--ids", choices=("str", "int"), help="node ids like n000123 (str, default) or integers")
    gen.add_argument("--format", choices=("csv", "parquet"), default="csv", help="table file format")
    gen.add_argument("--force", action="store_true", help="replace OUT_DIR if it exists and is not empty")
    gen.set_defaults(func=_cmd_generate)

    # --- build / fit / settings ------------------------------------------------
    build = sub.add_parser("build", help="build and save the reduced model of a config (offline stage)")
    _config_arguments(build)
    build.set_defaults(func=_cmd_build)

    fit = sub.add_parser("fit", help="learn the parameters of a config and write a run folder")
    _config_arguments(fit)
    fit.add_argument("--out", metavar="DIR", help="run folder (default: output.folder of the config)")
    fit.add_argument("--quiet", action="store_true", help="no progress bars or progress lines")
    fit.set_defaults(func=_cmd_fit)

    show = sub.add_parser("settings", help="print the effective config (every key, defaults filled in)")
    show.add_argument("config", metavar="CONFIG.toml", nargs="?", help="config file (omit with --reference)")
    show.add_argument("--set", dest="overrides", action="append", default=[], metavar="SECTION.KEY=VALUE")
    show.add_argument("--reference", action="store_true", help="print every key with type, default and meaning")
    show.set_defaults(func=_cmd_settings)

    return parser


def _config_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("config", metavar="CONFIG.toml")
    parser.add_argument("--set", dest="overrides", action="append", default=[], metavar="SECTION.KEY=VALUE",
                        help="override one config key (TOML value syntax); repeatable")


def _cmd_build(args: argparse.Namespace) -> int:
    import time
    from dataclasses import replace

    from fitrank import native
    from fitrank.config import load_config
    from fitrank.heldout import held_out_check
    from fitrank.pipeline import model_path, prepare, reduction_settings, refuse_bad_outputs
    from fitrank.regions import build_model
    from fitrank.snapshots import local_executor

    config = load_config(args.config, args.overrides)
    refuse_bad_outputs(config, run=False)
    start = time.perf_counter()
    _, problem = prepare(config)
    workers = config.reduction.workers
    pool = local_executor(workers) if workers > 1 else None
    check = config.check
    held_out = None
    try:
        model = build_model(problem, reduction_settings(config), executor=pool)
        if check.build_points:
            held_out = held_out_check(model, check.build_points, top_k=check.top_k, tau_min=check.tau_min,
                                      l1_max=check.l1_max, tol=config.graph.solver_tol, executor=pool).summary()
            # saved with the model, so whoever reuses it later can see how far it was trusted
            model = replace(model, info={**model.info, "held_out": held_out})
    finally:
        if pool is not None:
            pool.shutdown()
    path = model.save(model_path(config))
    info, s = model.info, model.info["singular_values"]
    decay = ", ".join(f"s{i + 1}/s1={s[i] / s[0]:.1e}" for i in sorted({0, 4, 9, 19, 49, model.rank - 1}) if i < len(s))
    print(f"reduced model: {model.method}, k = {model.rank} (lost energy {info['lost_energy']:.1e}), "
          f"{info['samples']} samples")
    if "regions" in info:
        print(f"regions: {len(info['regions'])}, k per region "
              f"{', '.join(str(region['k']) for region in info['regions'])}; singular values of the largest:")
    print(f"singular values: {decay}")
    if model.method == "interpolation":
        print(f"rows chosen: {info['rows']}, edges touched: {info['edges_touched']} "
              f"({info['edges_touched_fraction']:.1%} of {problem.graph.num_edges})")
        transition = ", feature transition: native kernel" if problem.weighting.kind == "features" else ""
        print("online least squares: " + (f"native BLAS/LAPACK kernel{transition}" if native.available() else
                                          "XLA operations (the native kernels are not built: python -m fitrank.native)"))
    if held_out is not None:
        print(_held_out_line(held_out, check))
    print(f"offline time: {time.perf_counter() - start:.1f} s "
          f"(snapshots {info['timings']['snapshots_s']:.1f} s, basis {info['timings']['basis_s']:.1f} s, "
          f"assembly {info['timings']['assemble_s']:.1f} s)")
    print(f"saved {path}")
    return 0


def _held_out_line(summary: dict, check) -> str:
    k = summary["top_k"]
    verdict = (f"within check.tau_min = {check.tau_min:g} and check.l1_max = {check.l1_max:g}" if summary["passed"]
               else f"outside check.tau_min = {check.tau_min:g} or check.l1_max = {check.l1_max:g}: more "
                    "reduction.samples, a larger basis (reduction.rank, max_rank) or reduction.regions would help; "
                    "a fit still checks its answer with a full solve and enriches the model")
    return (f"held-out check at {summary['points']} fresh points ({summary['seconds']:.1f} s): worst tau@{k} "
            f"{summary['tau_topk_min']:.5f}, worst L1@{k} {summary['l1_topk_max']:.1e}, L1 error "
            f"{summary['error_max']:.1e} (certified bound {summary['bound_max']:.1e}) -> {verdict}")


COMPILE_CACHE_VARIABLE = "FITRANK_COMPILE_CACHE"
"""Folder for jit-compiled programs kept between runs; "off" (or empty) disables it."""


def _keep_compiled_programs() -> None:
    """Let JAX keep compiled programs on disk, so a later run skips recompiling them.

    A demo fit spends about 1.8 of its 5 s compiling; the next run reads them back.
    The folder is $FITRANK_COMPILE_CACHE, else $XDG_CACHE_HOME/fitrank/jax (default
    ~/.cache). A folder that cannot be created only means running without it.
    """
    folder = os.environ.get(COMPILE_CACHE_VARIABLE)
    if folder is None:
        base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
        folder = os.path.join(base, "fitrank", "jax")
    if folder.strip().lower() in ("", "off"):
        return
    try:
        os.makedirs(folder, exist_ok=True)
    except OSError:
        return
    import jax

    jax.config.update("jax_compilation_cache_dir", folder)
    # fitrank compiles several small programs (0.1-1 s each) and JAX's default keeps only those
    # over 1 s; keeping all of them also makes what a run finds independent of timing noise
    jax.config.update("jax_persistent_cache_min_compile_time_secs", 0.0)


def _cmd_fit(args: argparse.Namespace) -> int:
    from fitrank.pipeline import fit, summary_lines

    _keep_compiled_programs()

    log = (lambda message: None) if args.quiet else (lambda message: print(message, file=sys.stderr))
    result = fit(args.config, overrides=args.overrides, out=args.out, progress=not args.quiet, log=log)
    print("\n".join(summary_lines(result)))
    return 0


def _cmd_settings(args: argparse.Namespace) -> int:
    from fitrank.config import config_reference_markdown, effective_config, load_config

    if args.reference:
        print(config_reference_markdown())
        return 0
    if args.config is None:
        raise FitrankInputError("give a CONFIG.toml, or --reference for the list of keys")
    print(effective_config(load_config(args.config, args.overrides, check_files=False)), end="")
    return 0


def _cmd_generate(args: argparse.Namespace) -> int:
    from fitrank import generate

    generate.run_cli(args)
    return 0


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    with interrupt.handling_interrupts(), warnings.catch_warnings():
        # a warning is one line on stderr, like an error, not Python's file:line form with source
        warnings.showwarning = lambda message, *_, **__: print(
            f"fitrank {args.command}: warning: {' '.join(str(message).split())}", file=sys.stderr)
        try:
            status = int(args.func(args) or 0)
            interrupt.checkpoint()  # a Ctrl-C that came where it had to wait still ends the command as interrupted
            return status
        except (FitrankInputError, ConvergenceError) as err:
            print(f"fitrank {args.command}: error: {err}", file=sys.stderr)
            return 2
        except BrokenExecutor as err:
            print(f"fitrank {args.command}: error: a worker process stopped before its solves were done ({err}); "
                  "no model or run was saved; run again, with fewer reduction.workers if memory ran out",
                  file=sys.stderr)
            return 1
        except (KeyboardInterrupt, Exception) as err:
            # a second Ctrl-C raised inside compiled JAX code comes back as JAX's own error
            if not (isinstance(err, KeyboardInterrupt) or interrupt.requested()):
                raise
            print(f"fitrank {args.command}: interrupted", file=sys.stderr)
            return 130


if __name__ == "__main__":
    sys.exit(main())
