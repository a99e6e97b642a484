"""Storage overhead per candidate: SQLite, the journal file and PostgreSQL, side by side in one run.

Run: python benchmarks/bench_storage.py [--rejected N] [--trained N] [--rounds R]

Through the real worker path (``Worker.stop_reason`` then ``Worker.step``: ask, claim, suggest,
budget gate, constraint, record, tell), on the mcu space:

* rejected — a budget nothing fits, so every candidate ends at the gate;
* trained — caps nothing breaks, and training replaced by a stand-in that reports three epochs at
  once, so what is timed is the bookkeeping of a trained candidate (the running-architecture and
  known-result reads, heartbeat, per-epoch reports, pruning, record, tell) and not torch;
* rejected, two workers at once — two processes on one fresh study, per candidate per worker.

PostgreSQL is $SEARCHER_TEST_POSTGRES when set, else a throw-away cluster like the tests' fixture.
Every store starts empty for each measurement (TPE's cost grows with the trials it reads); a
warm-up pass on each store first keeps lazy imports and first calls out of the figures.
"""

from __future__ import annotations

import argparse
import logging
import math
import multiprocessing
import os
import sys
import tempfile
import time
import uuid
from dataclasses import asdict, replace
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # run from a checkout without installing
sys.path.insert(0, str(HERE.parent / "tests"))  # the tests' helpers

import numpy as np  # noqa: E402
import optuna  # noqa: E402

from searcher.core.budget import Budget  # noqa: E402
from searcher.study.worker import Worker, WorkerPlan  # noqa: E402
from searcher.core.space_file import load_space  # noqa: E402
from searcher.run.config import RunConfig  # noqa: E402
from searcher.study.samplers import make_sampler  # noqa: E402
from searcher.study.studies import open_study  # noqa: E402
from searcher.model.train import TrainResult, TrainSettings  # noqa: E402

SPACE = HERE.parent / "spaces" / "mcu.toml"
CLASSES = 10
EPOCHS = 3
NOTHING_FITS = Budget(max_params=1)
EVERYTHING_FITS = Budget(max_params=10**12, max_macs=10**15, max_activation_bytes=10**12, max_weight_bytes=10**12)


def stand_in_training(arch, *, seed, on_epoch, deadline, progress) -> TrainResult:
    """A Trainer (searcher.study.worker) that reports made-up accuracies for each epoch at once, as the
    real trainer reports real ones: the loop's bookkeeping is all that is timed."""
    rng = np.random.default_rng(seed)
    for epoch in range(EPOCHS):
        progress.history.append(float(rng.uniform(0.1, 0.9)))
        on_epoch(epoch, progress.history[-1])
    return progress.result()


def make_search(url: str | None, name: str, budget: Budget, worker: int = 0) -> Worker:
    """A worker on a fresh study; ``url`` None: Optuna's in-memory storage, the baseline."""
    space = load_space(SPACE)
    budget = replace(space.budget, **{k: v for k, v in budget.__dict__.items() if k.startswith("max_")})
    settings = TrainSettings(epochs=EPOCHS)
    config = RunConfig(space_name=space.name, space_text=SPACE.read_text(), budget=asdict(budget),
                       train=asdict(settings), data="bench", data_fingerprint="bench", classes=CLASSES,
                       class_names=tuple(map(str, range(CLASSES))), objective="accuracy", seed=0)
    if url is None:
        study = optuna.create_study(study_name=name, sampler=make_sampler("tpe", "accuracy", worker),
                                    pruner=optuna.pruners.NopPruner())
    else:
        study, _ = open_study(name, url, config, "tpe", worker=worker)
    plan = WorkerPlan(trials=10**9, deadline=None, candidate_seconds=None, memory_cap=10**15, images_per_epoch=100,
                      seed=worker)
    return Worker(study, space, budget, settings, "accuracy", CLASSES, plan, stand_in_training)


def timed_loop(search: Worker, count: int) -> tuple[float, dict[str, int]]:
    """Seconds per candidate over ``count`` turns of the worker loop, and how the candidates ended."""
    states: dict[str, int] = {}
    started = time.perf_counter()
    for _ in range(count):
        search.stop_reason()
        state = search.step()
        states[state] = states.get(state, 0) + 1
    return (time.perf_counter() - started) / count, states


def _parallel_worker(url: str, name: str, count: int, worker: int, gate, results) -> None:
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    search = make_search(url, name, NOTHING_FITS, worker)
    timed_loop(search, 2)  # warm up this process, as the single-process figures were
    gate.wait()
    results.put(timed_loop(search, count)[0])


def parallel_rejected(url: str, name: str, count: int) -> float:
    """Per candidate per worker with two processes on one study at once."""
    make_search(url, name, NOTHING_FITS)  # create the study before the workers race to open it
    context = multiprocessing.get_context("spawn")
    gate, results = context.Barrier(2), context.Queue()
    processes = [context.Process(target=_parallel_worker, args=(url, name, count, i, gate, results)) for i in (0, 1)]
    for p in processes:
        p.start()
    seconds = [results.get(timeout=600) for _ in processes]
    for p in processes:
        p.join()
    return sum(seconds) / len(seconds)


def stores(folder: Path, postgres: str) -> dict:
    """Store label -> a function giving a fresh, empty store URL for one measurement."""
    from conftest import create_database

    def sqlite() -> str:
        return f"sqlite:///{folder / uuid.uuid4().hex / 'study.db'}"

    def journal() -> str:
        return str(folder / uuid.uuid4().hex / "study.journal")

    def pg() -> str:
        return create_database(postgres, "bench_" + uuid.uuid4().hex[:10])

    return {"in-memory": lambda: None, "sqlite": sqlite, "journal": journal, "postgresql": pg}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rejected", type=int, default=60, help="rejected candidates per measurement")
    parser.add_argument("--trained", type=int, default=30, help="trained candidates per measurement")
    parser.add_argument("--rounds", type=int, default=2)
    args = parser.parse_args()
    logging.basicConfig(level=logging.WARNING)
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    print(f"{os.cpu_count()} cores; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")

    from conftest import POSTGRES_ENV, ThrowawayPostgres

    cluster = None
    postgres = os.environ.get(POSTGRES_ENV)
    if not postgres:
        cluster = ThrowawayPostgres()
        postgres = cluster.start()
    rows: dict[str, dict[str, list[float]]] = {}
    try:
        with tempfile.TemporaryDirectory(prefix="bench-storage-") as folder:
            fresh = stores(Path(folder), postgres)
            for new_url in fresh.values():  # warm up: lazy imports and first-call set-up, not timed
                timed_loop(make_search(new_url(), "warm", NOTHING_FITS), 3)
                timed_loop(make_search(new_url(), "warm", EVERYTHING_FITS), 2)
            for round_ in range(args.rounds):
                for label, new_url in fresh.items():
                    row = rows.setdefault(label, {"rejected": [], "trained": [], "parallel": []})
                    seconds, _ = timed_loop(make_search(new_url(), "bench", NOTHING_FITS), args.rejected)
                    row["rejected"].append(seconds)
                    seconds, states = timed_loop(make_search(new_url(), "bench", EVERYTHING_FITS), args.trained)
                    row["trained"].append(seconds)
                    if label != "in-memory":  # one process's memory cannot be shared
                        row["parallel"].append(parallel_rejected(new_url(), "bench", args.rejected))
                    print(f"  round {round_ + 1} {label}: done ({states})", flush=True)
    finally:
        if cluster is not None:
            cluster.stop()
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"ms per candidate (best of {args.rounds} round(s); {args.rejected} rejected, {args.trained} trained "
          f"per measurement, each on an empty store)")
    best = {label: {k: min(v) * 1e3 if v else math.nan for k, v in row.items()} for label, row in rows.items()}
    memory = best["in-memory"]
    print(f"{'store':12s} {'rejected':>9s} {'(storage)':>10s} {'trained':>9s} {'(storage)':>10s} "
          f"{'rejected, 2 workers at once':>28s}")
    for label, row in best.items():
        print(f"{label:12s} {row['rejected']:9.1f} {row['rejected'] - memory['rejected']:+10.1f} "
              f"{row['trained']:9.1f} {row['trained'] - memory['trained']:+10.1f} {row['parallel']:28.1f}")
    print("(storage): the store's cost over Optuna's in-memory storage, the same search otherwise")


if __name__ == "__main__":
    main()
