"""Command line: a thin shell that parses, calls the library, and prints."""

from __future__ import annotations

import argparse
import functools
import logging
import sys
from pathlib import Path

import pandas as pd

from searcher.cli.run_commands import add_search_commands
from searcher.core.arch import parse_arch
from searcher.core.budget import BUDGET_KEYS, LATENCY, Budget, show_cost
from searcher.core.census_report import CensusSettings, summary_lines
from searcher.core.cost import cost
from searcher.core.latency import Latency, cores, parse_target, predict
from searcher.core.space_file import builtin_space, load_space, shipped_spaces
from searcher.errors import SearcherError, one_of, readable, shown
from searcher.files import read_regular
from searcher.limits import MAX_ARCH_FILE_BYTES
from searcher.redact import redact
from searcher.results.census_files import census as take_census, writable, write_census
from searcher.run.folders import plain_name, run_folder

log = logging.getLogger("searcher")


def _space_path(text: str) -> Path:
    """A space is a file path or the name of a shipped space (mcu, workstation, classic)."""
    if not text.strip():
        raise SearcherError(f"`--space` {shown(text)} is empty; give a .toml file or a shipped space "
                            f"({', '.join(shipped_spaces())})", key="--space")
    path = Path(text)
    try:
        found, folder = path.exists(), path.is_dir()
    except (OSError, ValueError):  # a name too long for the file system, a NUL byte
        found = folder = False
    if folder:
        raise SearcherError(f"`--space` {shown(text)} is a folder; give a .toml file or a shipped space "
                            f"({', '.join(shipped_spaces())})", key="--space")
    if found:
        return path
    if text in shipped_spaces():
        return builtin_space(text)
    hint = "" if path.suffix == ".toml" else f", nor a shipped space: use {one_of(text, shipped_spaces())}"
    raise SearcherError(f"`--space` {shown(text)} is not a file{hint}", key="--space")


def _add_budget(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("budget (overrides the space file's [budget])")
    group.add_argument("--max-params", metavar="N", help="cap on trainable parameters, e.g. 20k")
    group.add_argument("--max-macs", metavar="N", help="cap on multiply-accumulates per inference, e.g. 2M")
    group.add_argument("--max-activation", metavar="BYTES", help="cap on peak activation memory, e.g. 64KiB")
    group.add_argument("--max-weight", metavar="BYTES", help="cap on weight storage, e.g. 256KiB")
    group.add_argument("--weight-precision", choices=["fp32", "fp16", "int8"])
    group.add_argument("--activation-precision", choices=["fp32", "fp16", "int8"])
    group.add_argument("--max-latency", metavar="TIME", help="cap on predicted time per inference on the target, "
                       "e.g. 20ms (needs a target)")
    add_target(group)


def add_target(parser) -> None:
    """--target, on cost, census, search and export."""
    parser.add_argument("--target", metavar="CORE@CLOCK", help="the core and clock the int8 C file runs on, "
                        f"e.g. cortex-m4@80MHz (cores: {', '.join(cores())}; overrides the space file's [target])")


def _budget(args: argparse.Namespace) -> dict:
    """The budget options given on the command line, keyed like a space file's [budget]."""
    return {key: getattr(args, key) for key in BUDGET_KEYS if getattr(args, key, None) is not None}


def _with_target(budget: Budget, args: argparse.Namespace) -> Budget:
    """The budget judged on --target when given; a --max-latency with no target anywhere is refused."""
    target = None if args.target is None else parse_target(args.target, "--target")
    return budget.targeted(target).check_target("--max-latency")


def _arch_text(given: str) -> str:
    """The architecture ``cost`` was given: its text or JSON, or the content of a .json file."""
    if not given.endswith(".json"):
        return given
    path = Path(given)
    try:
        text = read_regular(path, MAX_ARCH_FILE_BYTES, "architecture file").decode("utf-8-sig")
    except UnicodeDecodeError:
        raise SearcherError(f"architecture file {shown(given)} is not JSON text (not UTF-8)") from None
    except IsADirectoryError:
        raise SearcherError(f"architecture file {shown(given)} is a folder; give a .json file") from None
    except OSError as exc:
        raise SearcherError(f"architecture file {shown(given)} cannot be read: {exc.strerror or exc}") from None
    if not text.lstrip().startswith("{"):
        raise SearcherError(f"architecture file {shown(given)} holds no JSON object; write one with Arch.to_json()")
    return text


def cmd_cost(args: argparse.Namespace) -> int:
    arch = parse_arch(_arch_text(args.arch))
    base = load_space(_space_path(args.space)).budget if args.space is not None else Budget()
    budget = _with_target(base.updated(_budget(args), prefix="--"), args)
    result = cost(arch, budget.activation_precision)
    table = pd.DataFrame(result.table())
    predicted = None if budget.target is None else predict(arch, budget.target)
    if predicted is not None:  # beside each layer, its predicted instructions and time on the target
        table = _with_latency(table, predicted)
    print(arch)
    print(table.to_string(index=False))
    totals = budget.totals(result, arch)
    print(f"parameters {totals['params']:,} (+{result.buffers:,} batch-norm running statistics)")
    print(f"MACs {totals['macs']:,}")
    print(f"peak activation {totals['peak_activation_bytes']:,} bytes at {budget.activation_precision}")
    print("weights " + ", ".join(f"{p} {show_cost('weight_bytes', result.weight_bytes(p))}" for p in ("fp32", "fp16", "int8")))
    if predicted is not None:
        print(f"predicted time per inference on {budget.target.text()}: {show_cost(LATENCY, totals[LATENCY])} "
              f"({predicted.instructions:,.0f} instructions of the int8 C file at "
              f"{predicted.target.cycles_per_instruction:g} cycle each: a lower bound, see searcher.core.latency)")
    broken = budget.check(totals)
    if budget.caps():
        print("budget: " + ("fits" if not broken else "breaks " + "; ".join(map(str, broken))))
    return 0


def _with_latency(table: pd.DataFrame, predicted: Latency) -> pd.DataFrame:
    """The cost table with each layer's predicted instructions and time, and rows for the copy in and out."""
    rows = dict(predicted.rows)
    table = table.astype(object)
    ends = pd.DataFrame([{"layer": name, "kind": kind} for name, kind in (("input", "copy in"), ("output", "class out"))],
                        columns=table.columns)
    table = pd.concat([ends[:1], table, ends[1:]], ignore_index=True).fillna("")
    table["instructions"] = [f"{rows[name]:,.0f}" if name in rows else "" for name in table["layer"]]
    table["latency"] = [show_cost(LATENCY, predicted.target.seconds(rows[name]) * 1e3) if name in rows else ""
                        for name in table["layer"]]
    return table


def cmd_census(args: argparse.Namespace) -> int:
    space = load_space(_space_path(args.space))
    budget = _with_target(space.budget.updated(_budget(args), prefix="--"), args)
    settings = CensusSettings(samples=args.samples, seed=args.seed, classes=args.classes)
    folder = writable(run_folder(args.name if args.name is not None else f"census-{plain_name(space.name)}"))
    census = take_census(space, budget, settings, args.data)
    print("\n".join(summary_lines(census)))
    written = write_census(census, folder)
    print("wrote " + ", ".join(str(p) for p in written))
    return 0


class _Parser(argparse.ArgumentParser):
    """argparse, with the value in its error messages cut to a readable length."""

    def error(self, message: str):  # type: ignore[override]
        super().error(readable(message))


@functools.cache
def make_parser() -> argparse.ArgumentParser:
    """The parser of every command, built once: parsing leaves it unchanged."""
    parser = _Parser(
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
    p.add_argument("--classes", type=int, help="output classes (default: the data's, else the space's input.classes)")
    p.add_argument("--data", help="count the output classes from this data ('demo', an .npz file or a folder) and "
                   "warn of classes with fewer than 10 validation or test images")
    _add_budget(p)
    p.set_defaults(run=cmd_census)

    add_search_commands(sub, _space_path, _add_budget, _budget, add_target)
    return parser


def _options(parser: argparse.ArgumentParser) -> tuple[set[str], set[str]]:
    """Every option string of the parser and its commands, and those that take one value."""
    every, valued = set(), set()
    parsers = [parser]
    while parsers:
        current = parsers.pop()
        for action in current._actions:  # argparse keeps no public list of them
            every.update(action.option_strings)
            if action.option_strings and action.nargs is None:
                valued.update(action.option_strings)
            if isinstance(action, argparse._SubParsersAction):
                parsers.extend(action.choices.values())
    return every, valued


def _dashed_values(argv: list[str], parser: argparse.ArgumentParser) -> list[str]:
    """``--max-params -5k`` as ``--max-params=-5k``: argparse takes a value that starts with '-' and is not a
    plain negative number for an option and answers "expected one argument"; joined, the value reaches the
    check that says what is wrong with it."""
    every, valued = _options(parser)
    out: list[str] = []
    for token in argv:
        if (out and out[-1] in valued and token.startswith("-") and not token.startswith("--")
                and token not in every):
            out[-1] = f"{out[-1]}={token}"
        else:
            out.append(token)
    return out


def main(argv: list[str] | None = None) -> int:
    """Run one command; user mistakes print a message and return 2, never a traceback."""
    parser = make_parser()
    args = parser.parse_args(_dashed_values(sys.argv[1:] if argv is None else list(argv), parser))
    logging.basicConfig(level=logging.DEBUG if args.verbose else logging.INFO, format="%(message)s")
    try:
        return args.run(args)
    except SearcherError as exc:
        print(f"searcher: error: {readable(redact(exc))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("searcher: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stderr.close()
        return 0
