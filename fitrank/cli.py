"""The ``fitrank`` command line: one subcommand per job.

Every subcommand is a small function ``_cmd_<name>(args) -> int`` registered in
:func:`_parser`. Bad input (:class:`fitrank.errors.FitrankInputError`) becomes
one line on stderr and exit code 2, never a traceback.
"""

from __future__ import annotations

import argparse
import sys

from fitrank.errors import FitrankInputError


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
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

    return parser


def _cmd_generate(args: argparse.Namespace) -> int:
    from fitrank import generate

    generate.run_cli(args)
    return 0


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except FitrankInputError as err:
        print(f"fitrank {args.command}: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"fitrank {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
