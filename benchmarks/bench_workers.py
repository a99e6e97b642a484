"""Two workers against one: trained candidates per hour, side by side in one run.

Run: python benchmarks/bench_workers.py [--minutes M] [--rounds R] [--storage sqlite|journal] [--space FILE]

Each round runs the same time-limited search (demo data, one epoch on a share of it, small
candidates that all fit) with ``--workers 1`` and with ``--workers 2``, alternating so load from other
processes falls on both alike. Goal on a 2-core machine: two workers ≥ 1.6× one worker's rate.

Printed per setting: candidates per hour over the whole invocation (start-up included) and over
the steady window (first to last finished trial), and where a worker's time went: training,
start-up (process start to its first trial), and the rest (proposal, budget gate, storage).
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout without installing
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))  # the tests' helpers

from conftest import TINY_SPACE  # noqa: E402

import optuna  # noqa: E402

from searcher.run.records import SPENT, record_of  # noqa: E402
from searcher import ConfirmSettings, SearchSettings, search  # noqa: E402
from searcher.study.studies import open_study  # noqa: E402

# The tests' tiny space made uniform: 30,720 candidates of two stages on 16x16 input, every one within
# the budget and small (28k to 4.2M MACs; at this size per-batch overhead dominates their
# training), so the rate hangs less on which ones the sampler happened to pick. Large enough that a
# run of a few minutes explores a few per cent of it: in a space nearly used up most proposals are
# repeats of known outcomes, and the figure would measure how soon the sampler runs dry, not the
# workers (an earlier 1,536-candidate version did: 40-60% repeats).
UNIFORM_CHANGES = {
    "sizes = [[12, 12], [16, 16]]": "sizes = [[16, 16]]", "count = [1, 3]": "count = [2, 2]",
    "first_width = [2, 4]": "first_width = [4, 6, 8, 10, 12, 16]", "max_width = 8": "max_width = 32",
    "kernel = 3": "kernel = [3, 5]", 'activation = ["relu", "tanh"]':
    'activation = ["relu", "relu6", "tanh", "sigmoid", "hardswish"]', "batch_norm = [true, false]": "batch_norm = [true]",
    'kind = ["max", "none"]': 'kind = ["max", "avg"]', "hidden_width = [3, 5]": "hidden_width = [8, 16, 24]",
    "dropout = 0.0": "dropout = [0.0, 0.1]", 'max_params = "300"\nmax_macs = "20k"': 'max_params = "1M"',
}


def uniform_space() -> str:
    text = TINY_SPACE
    for old, new in UNIFORM_CHANGES.items():
        assert old in text, f"the tiny space no longer has {old!r}"
        text = text.replace(old, new)
    return text


def one_search(root: Path, name: str, workers: int, minutes: float, space: str, fraction: float,
               store: str) -> dict:
    url = str(root / name / "study.journal") if store == "journal" else f"sqlite:///{root / name / 'study.db'}"
    settings = SearchSettings(name=name, space=space, trials=100_000, minutes=minutes, workers=workers, root=root,
                              confirm=ConfirmSettings(seeds=0),
                              storage=url)
    started = time.time()
    search(settings, train={"epochs": 1, "train_fraction": fraction})
    wall = time.time() - started
    study, _ = open_study(name, url, None)
    trials = [t for t in study.get_trials(deepcopy=False) if t.state.is_finished()]  # not queued again
    spent = [t for t in trials if record_of(t).get("state") in SPENT and record_of(t).get("repeat_of") is None]
    ends = sorted(t.datetime_complete.timestamp() for t in trials if t.datetime_complete)
    window = ends[-1] - ends[0] if len(ends) > 1 else float("nan")
    in_window = sum(1 for t in spent if t.datetime_complete.timestamp() > ends[0])
    per_worker: dict[str, dict] = {}
    for t in trials:
        who = t.user_attrs.get("worker", {})
        row = per_worker.setdefault(f"{who.get('pid')}", {"first": who.get("started", started), "train": 0.0,
                                                           "count": 0, "proposals": 0})
        row["first"] = min(row["first"], t.datetime_start.timestamp())
        row["train"] += float(record_of(t).get("train_seconds") or 0.0)
        row["count"] += record_of(t).get("state") in SPENT and record_of(t).get("repeat_of") is None
        row["proposals"] += 1
    for row in per_worker.values():
        row["startup"] = row["first"] - started
        row["other"] = wall - row["startup"] - row["train"]
    return {"wall": wall, "count": len(spent), "per_hour": len(spent) / wall * 3600,
            "steady_per_hour": in_window / window * 3600 if window == window and window > 0 else float("nan"),
            "proposals": len(trials), "workers": per_worker,
            "repeats": sum(record_of(t).get("repeat_of") is not None for t in trials)}


def show(label: str, result: dict) -> None:
    print(f"  {label}: {result['count']} trained of {result['proposals']} proposals ({result['repeats']} repeats "
          f"of a known outcome) in {result['wall']:.0f} s -> "
          f"{result['per_hour']:.0f}/h overall, {result['steady_per_hour']:.0f}/h steady")
    for pid, row in sorted(result["workers"].items()):
        print(f"      worker pid {pid}: start-up {row['startup']:.1f} s, training {row['train']:.1f} s "
              f"({row['count']} candidates), other {row['other']:.1f} s over {row['proposals']} proposals")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--minutes", type=float, default=1.5, help="time limit of each search")
    parser.add_argument("--rounds", type=int, default=1)
    parser.add_argument("--space", help="space file (default: 30,720 small two-stage candidates)")
    parser.add_argument("--train-fraction", type=float, default=0.3)
    parser.add_argument("--storage", choices=("sqlite", "journal"), default="sqlite", help="the run's store")
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    print(f"store {args.storage}; {os.cpu_count()} cores; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    totals = {1: [], 2: []}
    with tempfile.TemporaryDirectory(prefix="bench-workers-") as folder:
        if args.space is None:
            args.space = str(Path(folder) / "uniform.toml")
            Path(args.space).write_text(uniform_space(), encoding="utf-8")
        for round_ in range(args.rounds):
            for workers in (1, 2) if round_ % 2 == 0 else (2, 1):
                result = one_search(Path(folder), f"r{round_}w{workers}", workers, args.minutes, args.space,
                                    args.train_fraction, args.storage)
                totals[workers].append(result)
                show(f"round {round_ + 1}, {workers} worker(s)", result)
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    for key, label in (("per_hour", "overall"), ("steady_per_hour", "steady")):
        one = sum(r[key] for r in totals[1]) / len(totals[1])
        two = sum(r[key] for r in totals[2]) / len(totals[2])
        print(f"{label:8s} candidates per hour: 1 worker {one:7.0f} | 2 workers {two:7.0f} | "
              f"ratio {two / one:.2f}x (goal >= 1.6x)")


if __name__ == "__main__":
    main()
