"""Command line: a thin shell that parses, calls the library, and prints."""

from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path

import pandas as pd

from searcher.cli.run_commands import add_search_commands
from searcher.core.arch import parse_arch
from searcher.core.budget import BUDGET_KEYS, Budget, show_cost
from searcher.core.census_report import CensusSettings, run_census, summary_lines, write_census
from searcher.core.cost import cost
from searcher.core.space_file import builtin_space, load_space
from searcher.errors import SearcherError
from searcher.runs import run_folder

log = logging.getLogger("searcher")


def _space_path(text: str) -> Path:
    """A space is a file path or the name of a shipped space (mcu, workstation, classic)."""
    path = Path(text)
    return path if path.suffix == ".toml" or path.exists() else builtin_space(text)


def _add_budget(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("budget (overrides the space file's [budget])")
    group.add_argument("--max-params", metavar="N", help="cap on trainable parameters, e.g. 20k")
    group.add_argument("--max-macs", metavar="N", help="cap on multiply-accumulates per inference, e.g. 2M")
    group.add_argument("--max-activation", metavar="BYTES", help="cap on peak activation memory, e.g. 64KiB")
    group.add_argument("--max-weight", metavar="BYTES", help="cap on weight storage, e.g. 256KiB")
    group.add_argument("--weight-precision", choices=["fp32", "fp16", "int8"])
    group.add_argument("--activation-precision", choices=["fp32", "fp16", "int8"])


def _budget(args: argparse.Namespace) -> dict:
    """The budget options given on the command line, keyed like a space file's [budget]."""
    return {key: getattr(args, key) for key in BUDGET_KEYS if getattr(args, key, None) is not None}


def cmd_cost(args: argparse.Namespace) -> int:
    text = Path(args.arch).read_text() if args.arch.endswith(".json") else args.arch
    arch = parse_arch(text)
    base = load_space(_space_path(args.space)).budget if args.space else Budget()
    budget = base.updated(_budget(args), prefix="--")
    result = cost(arch, budget.activation_precision)
    table = pd.DataFrame(result.table())
    print(arch)
    print(table.to_string(index=False))
    totals = budget.totals(result)
    print(f"parameters {totals['params']:,} (+{result.buffers:,} batch-norm running statistics)")
    print(f"MACs {totals['macs']:,}")
    print(f"peak activation {totals['peak_activation_bytes']:,} bytes at {budget.activation_precision}")
    print("weights " + ", ".join(f"{p} {show_cost('weight_bytes', result.weight_bytes(p))}" for p in ("fp32", "fp16", "int8")))
    broken = budget.check(totals)
    if budget.caps():
        print("budget: " + ("fits" if not broken else "breaks " + "; ".join(map(str, broken))))
    return 0


def cmd_census(args: argparse.Namespace) -> int:
    space = load_space(_space_path(args.space))
    folder = run_folder(args.name or f"census-{space.name}")
    settings = CensusSettings(samples=args.samples, seed=args.seed, classes=args.classes)
    census = run_census(space, space.budget.updated(_budget(args), prefix="--"), settings)
    print("\n".join(summary_lines(census)))
    written = write_census(census, folder)
    print("wrote " + ", ".join(str(p) for p in written))
    return 0


def make_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="searcher",
        description="Find a small image classifier that fits a fixed hardware budget: census, search, report, export.",
        epilog="Start with: searcher census --space mcu   (see README.md for the walkthrough)")
    parser.add_argument("-v", "--verbose", action="store_true", help="log debug detail")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("cost", help="per-layer cost table and totals of one architecture")
    p.add_argument("arch", help="architecture text (e.g. 1x32x32_c8k3-m2_gap-o10_relu), JSON, or a .json file")
    p.add_argument("--space", help="take the budget from this space file (or shipped space name)")
    _add_budget(p)
    p.set_defaults(run=cmd_cost)

    p = sub.add_parser("census", help="how much of a space fits the budget, without training")
    p.add_argument("--space", required=True, help="space file, or a shipped space: mcu, workstation, classic")
    p.add_argument("--name", help="run folder under runs/ (default census-<space>)")
    p.add_argument("--samples", type=int, default=200_000, help="random draws when the space is too big to enumerate")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--classes", type=int, help="output classes (default: the space's input.classes)")
    _add_budget(p)
    p.set_defaults(run=cmd_census)

    add_search_commands(sub, _space_path, _add_budget, _budget)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run one command; user mistakes print a message and return 2, never a traceback."""
    parser = make_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.verbose else logging.INFO, format="%(message)s")
    try:
        return args.run(args)
    except SearcherError as exc:
        print(f"searcher: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("searcher: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
