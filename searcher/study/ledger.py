"""One worker's running account of the study's finished trials, each read once.

A finished trial never changes, so the ledger reads each one once and keeps what the loop asks
about every proposal: counts by state, how many candidates cost training time, the best accuracy,
the first outcome of every architecture (a repeat takes it over), and the per-epoch scores of
every trained or stopped candidate (the early stop judges a candidate against them). This keeps the bookkeeping per
proposal flat as a study grows to thousands of trials. This worker's own trials are added as it
tells them, other workers' at the next :meth:`Ledger.update`.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass

import optuna
from optuna.trial import TrialState

from searcher.run.records import SPENT, STOPPED, TRAINED, counts_of, finished_state, record_of


@dataclass(frozen=True)
class Outcome:
    """A spent trial's result, as a repeat of its architecture reuses it."""

    number: int
    optuna_state: TrialState
    values: list[float] | None
    record: dict


class Ledger:
    """Finished trials by state, spent candidates, the best accuracy and each architecture's outcome."""

    def __init__(self, score: str = "val_accuracy") -> None:
        self.score = score  # the record's column the search ranks by
        self.seen: set[int] = set()
        self.by_state: Counter[str] = Counter()  # searcher state -> finished distinct candidates (repeats apart)
        self.repeats = 0
        self.spent = 0  # candidates that used training time (trained, stopped early, failed; repeats excluded)
        self.best = math.nan  # best validation score of a trained candidate
        self.outcomes: dict[str, Outcome] = {}  # arch text -> its first spent trial's outcome
        self.trained: dict[int, dict] = {}  # trial number -> record, of fully trained candidates (repeats excluded)
        self.judged: list[dict] = []  # records of trained and stopped candidates: their histories meet the rungs

    def update(self, study: optuna.Study) -> list[optuna.trial.FrozenTrial]:
        """Read trials finished since the last call; return the running ones."""
        running = []
        for t in study.get_trials(deepcopy=False):
            if t.state == TrialState.RUNNING:
                running.append(t)
            elif t.state.is_finished():
                self.add(t.number, t.state, list(t.values) if t.state == TrialState.COMPLETE else None, record_of(t))
        return running

    def add(self, number: int, optuna_state: TrialState, values: list[float] | None, record: dict) -> None:
        if number in self.seen:
            return
        self.seen.add(number)
        state = finished_state(record)
        if record.get("repeat_of") is not None:
            self.repeats += 1
            return
        self.by_state[state] += 1
        if state not in SPENT:
            return
        self.spent += 1
        self.outcomes.setdefault(record["arch"], Outcome(number, optuna_state, values, record))
        if state in (TRAINED, STOPPED) and record.get("history"):
            self.judged.append(record)
        accuracy = record.get(self.score)
        if state == TRAINED and accuracy is not None:
            self.best = accuracy if math.isnan(self.best) else max(accuracy, self.best)
            self.trained[number] = record

    def reached(self, rung: int, column: str) -> list[tuple[float, float]]:
        """(``column`` cost, score after epoch ``rung``) of every trained or stopped candidate that got that far."""
        return [(r[column], r["history"][rung - 1]) for r in self.judged
                if len(r["history"]) >= rung and r["history"][rung - 1] is not None and r.get(column) is not None]

    def counts(self) -> dict[str, int]:
        """As :func:`searcher.run.records.counts` gives for the finished trials."""
        return counts_of(self.by_state, self.repeats)
