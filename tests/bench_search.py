"""Search benchmarks, measured side by side in one run (a script; pytest does not collect it).

    python tests/bench_search.py            # both parts
    python tests/bench_search.py overhead   # only the loop-overhead part

1. Overhead: on a demo run, the share of wall time that is not training (sampling, storage,
   budget checks, logging, the report). Goal: under 5%.
2. Against the plain way: an Optuna loop that builds and trains every sample and applies the cap
   only afterwards, on the UCI digits set (scikit-learn) with a 5k-parameter cap. Printed: the wall
   time our search needs to reach the plain loop's best fitting validation accuracy, as a ratio of
   the time the plain loop needed to reach it. Goal: ≤ 1/3.
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import optuna
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from searcher.budget import Budget  # noqa: E402
from searcher.runner import SearchSettings, prepare, search  # noqa: E402
from searcher.study import open_study, storage_url  # noqa: E402


def overhead(folder: Path) -> None:
    settings = SearchSettings(name="overhead", space=str(ROOT / "examples" / "stamp_inspection.toml"), data="demo",
                              trials=12, root=folder)
    started = time.perf_counter()
    outcome = search(settings, train={"epochs": 3})
    wall = time.perf_counter() - started
    trials = pd.read_csv(outcome.folder / "trials.csv")
    training = trials["train_seconds"].sum()
    # data loading and the up-front census are once per run, not per candidate: shown apart
    setup = _setup_seconds(settings)
    print(f"[overhead] {len(trials)} proposals, {outcome.counts['rejected']} rejected, "
          f"{outcome.counts['trained'] + outcome.counts['stopped_early']} trained")
    print(f"[overhead] wall {wall:.1f} s, training {training:.1f} s, one-off set-up (data, census) {setup:.1f} s")
    loop = wall - training - setup
    print(f"[overhead] loop overhead (sampling, storage, checks, logging, report): {loop:.1f} s "
          f"= {loop / wall:.1%} of wall time (goal < 5%); with set-up {(wall - training) / wall:.1%}")


def _setup_seconds(settings: SearchSettings) -> float:
    started = time.perf_counter()
    prepare(settings, None, {"epochs": 3})
    return time.perf_counter() - started


def plain_loop(space, data, budget: Budget, trials: int, seed: int) -> tuple[float, float]:
    """Build and train every sample, apply the cap afterwards; (best fitting accuracy, seconds to reach it)."""
    from searcher.build import build
    from searcher.cost import cost
    from searcher.train import TrainSettings, train_candidate

    settings = TrainSettings(**{**TrainSettings().__dict__, **space.train})
    study = optuna.create_study(direction="maximize", sampler=optuna.samplers.TPESampler(seed=seed))
    started = time.perf_counter()
    best, reached = -1.0, 0.0
    for _ in range(trials):
        trial = study.ask()
        arch = space.suggest(trial, data.num_classes)
        split = data.at(arch.input_shape)
        result = train_candidate(build(arch), split.train.images, split.train.labels, split.val.images,
                                 split.val.labels, settings, seed=seed * 1_000_003 + trial.number)
        study.tell(trial, result.val_accuracy)
        fits = not budget.check(budget.totals(cost(arch)))
        if fits and result.val_accuracy > best:
            best, reached = result.val_accuracy, time.perf_counter() - started
    return best, reached


def against_plain_loop(folder: Path) -> None:
    from test_search import write_digits

    npz, space_file = write_digits(folder)
    budget = {"max_params": 5_000}
    settings = SearchSettings(name="digits-5k", space=str(space_file), data=str(npz), trials=40, seed=0, root=folder)
    run = prepare(settings, budget)
    started = time.perf_counter()
    target, plain_seconds = plain_loop(run.space, run.data, run.budget, trials=40, seed=0)
    plain_total = time.perf_counter() - started
    print(f"[plain] 40 trials in {plain_total:.1f} s; best fitting val accuracy {target:.4f}, reached after {plain_seconds:.1f} s")

    started = time.perf_counter()
    search(settings, budget)
    study, _ = open_study("digits-5k", storage_url(None, folder / "digits-5k"), None)
    reached = None
    for t in sorted(study.get_trials(deepcopy=False), key=lambda t: t.datetime_complete or t.datetime_start):
        record = t.user_attrs.get("searcher", {})
        if record.get("state") == "trained" and record.get("params", 1e9) <= 5_000 and record["val_accuracy"] >= target:
            reached = (t.datetime_complete - study.get_trials(deepcopy=False)[0].datetime_start).total_seconds()
            break
    ours_total = time.perf_counter() - started
    if reached is None:
        best = max((t.user_attrs["searcher"].get("val_accuracy") or 0) for t in study.get_trials(deepcopy=False)
                   if t.user_attrs.get("searcher", {}).get("state") == "trained")
        print(f"[ours] did not reach {target:.4f} in {ours_total:.1f} s (best {best:.4f})")
    else:
        print(f"[ours] reached {target:.4f} after {reached:.1f} s (whole run {ours_total:.1f} s)")
        print(f"[ratio] time to the plain loop's best: ours / plain = {reached / plain_seconds:.2f} (goal ≤ 0.33)")


if __name__ == "__main__":
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    which = sys.argv[1:] or ["overhead", "plain"]
    with tempfile.TemporaryDirectory() as tmp:
        if "overhead" in which:
            overhead(Path(tmp))
        if "plain" in which:
            against_plain_loop(Path(tmp))
