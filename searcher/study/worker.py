"""One worker's loop over a study: propose a candidate, gate it, settle it, tell Optuna.

Each proposal ends in one state (the ``state`` column of trials.csv):

* ``rejected`` — breaks a cap by exact arithmetic (:mod:`searcher.core.gate`); never built. Told to
  Optuna as COMPLETE with a plausible accuracy (chance level) and a positive constraint, so TPE
  and NSGA-II learn to avoid the region (a FAIL would be invisible to TPE).
* ``trained`` / ``stopped_early`` — trained; stopped early means it fell behind candidates of
  similar cost at a rung (:mod:`searcher.study.early_stop`).
* ``failed`` — training diverged, or it ran past the per-candidate time limit.
* ``interrupted`` — a signal, the run's time limit or a crash ended it; queued again once.
* ``not_started`` — predicted not to finish in the time left; skipped, and the loop goes on with
  the next proposal (a smaller candidate may well fit). The phase ends when not even the space's
  cheapest fitting candidate would finish, or after MAX_TOO_LONG such proposals in a row.
* ``duplicate`` — another worker was training the same architecture at that moment.

A proposal of an architecture that was already trained, stopped early or failed takes that
outcome over (``repeat_of`` names the trial) and costs no training time. Every trial is told to
Optuna as soon as it ends, so a kill loses at most the candidate in flight, and
:mod:`searcher.study.liveness` queues that one again. Training itself is injected (a
:class:`Trainer`), so the loop runs the same with torch or with a stand-in.
"""

from __future__ import annotations

import logging
import math
import os
import time
from dataclasses import dataclass, field
from typing import Callable, Protocol

import optuna
from optuna.trial import TrialState

from searcher.core.arch import Arch
from searcher.core.budget import Budget
from searcher.core.gate import judge
from searcher.core.space import Space
from searcher.core.train_settings import TrainSettings
from searcher.model.train import OutOfTime, TrainProgress, TrainResult
from searcher.run.records import (
    ACCURACY, DUPLICATE, FAILED, NOT_STARTED, RECORD, REJECTED, STOPPED, TRAINED, Metric, describe, record_of,
)
from searcher.study.early_stop import CostAwareHalving, EarlyStop
from searcher.study.ending import Ending, StopReason
from searcher.study.ledger import Ledger, Outcome
from searcher.study.liveness import claim
from searcher.study.loop import LoopPlan, TrialLoop
from searcher.run.config import OBJECTIVES
from searcher.study.samplers import trial_seed
from searcher.study.timebox import Throughput

log = logging.getLogger(__name__)

MAX_IDLE_PROPOSALS = 300  # stop after this many proposals in a row that could not be trained
MAX_TOO_LONG = 25  # end the phase after this many proposals in a row predicted not to finish in the time left
REPEAT = "repeat"  # what step() returns for a proposal that reused a known outcome
_IDLE = (REJECTED, DUPLICATE, REPEAT)  # proposals that trained nothing


class Trainer(Protocol):
    """Trains one candidate: the seam between the loop and torch (see searcher.study.launch)."""

    def __call__(self, arch: Arch, *, seed: int, on_epoch: Callable[[int, float], None], deadline: float | None,
                 progress: TrainProgress) -> TrainResult:
        """Train ``arch``; call ``on_epoch(epoch, accuracy)`` after each epoch, letting what it raises out.

        ``deadline`` is a time.monotonic() value; raise OutOfTime past it, Diverged on a NaN loss.
        ``progress`` is filled in as training runs, so a caller has the figures after an exception.
        """


@dataclass(frozen=True, kw_only=True)
class WorkerPlan(LoopPlan):
    """What one worker needs beyond the study: limits, and the loop's deadline and log."""

    trials: int  # candidates to train over the study's life (repeats of known results are free)
    candidate_seconds: float | None  # per-candidate training time limit
    memory_cap: int  # bytes; candidates whose training-memory estimate exceeds it are rejected
    images_per_epoch: int  # training images one candidate sees per epoch (for time predictions)
    seed: int = 0
    parent_pid: int | None = None  # stop when the parent process is gone
    reserve: Callable[[Ledger, Throughput], float] | None = None  # seconds of the time box kept for confirmation
    least_macs: int | None = None  # MACs of the space's cheapest candidate within the caps (the census's)


@dataclass
class WorkerTally:
    """What this worker did, for the progress line and the closing summary."""

    proposals: list[str] = field(default_factory=list)  # state of every proposal, in order
    throughput: Throughput = field(default_factory=Throughput)  # measured on trained candidates
    started: float = field(default_factory=time.time)
    stop: StopReason | None = None  # why the loop ended


class Worker(TrialLoop):
    """One worker's loop over a study; see the module docstring for the states."""

    def __init__(self, study: optuna.Study, space: Space, budget: Budget, settings: TrainSettings,
                 objective: str, classes: int, plan: WorkerPlan, trainer: Trainer, metric: Metric = ACCURACY) -> None:
        super().__init__(study, plan)
        self.space, self.budget, self.settings = space, budget, settings
        self.objective, self.classes, self.trainer = objective, classes, trainer
        self.metric = metric  # the score told to Optuna, pruned and ranked by
        self.tally = WorkerTally()
        self.ledger = Ledger(metric.column)
        self.on_proposal: Callable[[str, WorkerTally, Ledger], None] | None = None  # after each proposal
        self.idle = 0  # proposals in a row that trained nothing
        self.too_long = 0  # proposals in a row predicted not to finish in the time left
        self._limit: float | None = None  # time.monotonic() of the candidate in training's own limit

    # -- the loop ----------------------------------------------------------------------------------
    def run(self) -> WorkerTally:
        """Propose and settle candidates until a stop reason comes up; the first look recovers dead trials."""
        self.tally.stop = super().run()
        return self.tally

    def after(self, state: str) -> None:
        self.tally.proposals.append(state)
        if self.on_proposal is not None:
            self.on_proposal(state, self.tally, self.ledger)
        self.idle = self.idle + 1 if state in _IDLE else 0
        self.too_long = self.too_long + 1 if state == NOT_STARTED else 0 if state not in _IDLE else self.too_long

    def ends(self) -> StopReason | None:
        if self.plan.deadline is not None and time.time() >= self.plan.deadline - self._reserve():
            return StopReason(Ending.TIME_NEAR, "the rest of the time box is kept for confirming the front")
        if self.plan.deadline is not None and (self.too_long >= MAX_TOO_LONG or self._nothing_fits_in_time()):
            return StopReason(Ending.TIME_NEAR, "the rest of the time box is kept for confirming the front"
                              if self._reserve() > 0 else "time limit near: " + (
                f"{self.too_long} proposals in a row were predicted not to finish in the time left"
                if self.too_long >= MAX_TOO_LONG else
                "not even the space's cheapest candidate would finish in the time left"))
        if self.plan.parent_pid is not None and os.getppid() != self.plan.parent_pid:
            return StopReason(Ending.PARENT_GONE, "parent process gone")
        if self.idle >= MAX_IDLE_PROPOSALS:
            return StopReason(Ending.EXHAUSTED, f"{self.idle} proposals in a row were over budget or already known; "
                                                "the space looks exhausted")
        return None

    def done(self) -> StopReason | None:
        # other workers' candidates count too; an unclaimed trial is a kill's leftover (or one that is
        # claimed a moment later), so it does not hold back the last candidate
        in_flight = sum("worker" in t.user_attrs for t in self.ledger.update(self.study))
        if self.ledger.spent + in_flight >= self.plan.trials:
            return StopReason(Ending.DONE, f"{self.plan.trials} candidates trained")
        return None

    def step(self) -> str:
        """Propose one candidate and settle it; its state (or ``repeat``)."""
        trial = self.study.ask()
        claim(trial)
        arch = self.space.suggest(trial, self.classes)
        verdict = judge(arch, self.budget, self.settings.batch_size, self.plan.memory_cap)
        record = describe(arch, verdict.totals) | {"retry_of": trial.user_attrs.get("retry_of")}
        trial.set_constraint("budget", verdict.constraint)
        if not verdict.fits:
            return self._end(trial, record, REJECTED, verdict.reason, rejected_by=verdict.rejected_by)
        # Write the architecture on the trial before looking at the others: of two workers that draw
        # it at once, at least one then sees the other, so it is never trained twice (both may yield).
        # The look is one read of the study, after the write: a trial that drew the same architecture
        # is in it either still running or finished, and then its outcome is known.
        record = record | {"state": "training"}
        trial.set_user_attr(RECORD, record)
        running = self.ledger.update(self.study)
        if any(t.number != trial.number and record_of(t).get("arch") == record["arch"] for t in running):
            return self._end(trial, record, DUPLICATE, "another worker is training the same architecture",
                             optuna_state=TrialState.FAIL)
        known = self.ledger.outcomes.get(record["arch"])
        if known is not None:
            return self._repeat(trial, record, known)
        left = None if self.plan.deadline is None else self.plan.deadline - self._reserve() - time.time()
        predicted = self.predicted_seconds(verdict.totals["macs"])
        if left is not None and predicted is not None and predicted > left:
            return self._end(trial, record, NOT_STARTED,
                             f"predicted {predicted:.0f} s of training but {left:.0f} s left; skipped",
                             optuna_state=TrialState.FAIL)
        return self._train(trial, arch, verdict.totals, record)

    def _nothing_fits_in_time(self) -> bool:
        """True when the time left (less the confirmation's reserve) is shorter than the cheapest candidate's prediction."""
        if self.plan.least_macs is None:
            return False
        predicted = self.predicted_seconds(self.plan.least_macs)
        return predicted is not None and predicted > self.plan.deadline - self._reserve() - time.time()

    def _reserve(self) -> float:
        return 0.0 if self.plan.reserve is None else self.plan.reserve(self.ledger, self.tally.throughput)

    def predicted_seconds(self, macs: int) -> float | None:
        """Training seconds predicted for a candidate of ``macs`` (None until one was measured)."""
        return self.tally.throughput.predict(macs, self.settings.epochs * self.plan.images_per_epoch)

    # -- training one candidate ---------------------------------------------------------------------
    def _train(self, trial: optuna.Trial, arch: Arch, totals: dict, record: dict) -> str:
        progress = TrainProgress()
        run_deadline = _monotonic(self.plan.deadline)
        self._limit = None if self.plan.candidate_seconds is None else time.monotonic() + self.plan.candidate_seconds
        deadline = min((d for d in (run_deadline, self._limit) if d is not None), default=None)
        policy = self._early_stop(trial, totals)

        def on_epoch(epoch: int, accuracy: float) -> None:
            with self.signals.held():  # telling Optuna must not be cut half-way
                if policy(epoch, accuracy):
                    raise optuna.TrialPruned()

        def call(progress: TrainProgress) -> TrainResult:
            return self.trainer(arch, seed=trial_seed(self.plan.seed, trial.number), on_epoch=on_epoch,
                                deadline=deadline, progress=progress)

        try:
            state, reason, result = self.train(trial, call, progress)
        except optuna.TrialPruned:
            state, reason = STOPPED, f"behind candidates of similar cost after epoch {len(progress.history)}"
            result = progress.result()
        if state in (TRAINED, STOPPED):
            self.tally.throughput.add(totals["macs"], progress.images_seen, result.seconds)
        record.update(scores_of(result), history=[_finite(h) for h in result.history],
                      train_seconds=round(result.seconds, 3), epochs=result.epochs,
                      int8_seconds=round(result.int8_seconds, 3), threads=result.threads)
        optuna_state = {TRAINED: TrialState.COMPLETE, STOPPED: TrialState.PRUNED}.get(state, TrialState.FAIL)
        score = result.history[-1] if result.history else math.nan  # the metric's score after the last epoch
        values = self._values(score, totals) if state == TRAINED else None
        return self._end(trial, record, state, reason, values=values, optuna_state=optuna_state)

    def out_of_time(self, exc: OutOfTime) -> tuple[str, str]:
        run_deadline = _monotonic(self.plan.deadline)
        if self._limit is not None and (run_deadline is None or self._limit <= run_deadline):
            return FAILED, f"over the per-candidate limit of {self.plan.candidate_seconds:.3g} s"
        return super().out_of_time(exc)

    def _early_stop(self, trial: optuna.Trial, totals: dict) -> EarlyStop:
        """Successive halving among candidates of similar cost: the objective's cost, else parameters."""
        column = OBJECTIVES[self.objective] or "params"
        single = OBJECTIVES[self.objective] is None  # Optuna takes intermediate scores in one-objective studies only
        return CostAwareHalving(lambda rung: self.ledger.reached(rung, column), totals[column], self.settings.epochs,
                                report=trial.report if single else None)

    # -- telling Optuna and the log ---------------------------------------------------------------
    def _values(self, accuracy: float, totals: dict) -> list[float]:
        column = OBJECTIVES[self.objective]
        accuracy = accuracy if math.isfinite(accuracy) else 0.0
        return [accuracy] if column is None else [accuracy, float(totals[column])]

    def _end(self, trial: optuna.Trial, record: dict, state: str, reason: str, *, rejected_by: str = "",
             values: list[float] | None = None, optuna_state: TrialState = TrialState.COMPLETE) -> str:
        """The loop's end of a trial, with what the search keeps: rejections told at chance, the ledger."""
        record = record | {"rejected_by": rejected_by}
        if state == REJECTED:
            values = self._values(1.0 / self.classes, record)  # chance level: plausible for GP, dull for TPE
            record["train_seconds"] = 0.0
        self.end(trial, record, state, reason, optuna_state, values)
        self.ledger.add(trial.number, optuna_state, values if optuna_state == TrialState.COMPLETE else None,
                        record | {"state": state, "reason": reason})
        return state

    def flushes(self, state: str) -> bool:
        return state not in (REJECTED, DUPLICATE)  # a power cut can cost only rejections, which are free to redo

    def _repeat(self, trial: optuna.Trial, record: dict, known: Outcome) -> str:
        """Reuse the outcome of the same architecture trained before, whatever it was; no training time."""
        earlier = known.record
        record = record | {key: earlier.get(key) for key in (*SCORE_KEYS, "history", "epochs")}
        record |= {"repeat_of": known.number, "train_seconds": 0.0}
        reason = f"same architecture as trial {known.number}" + (f": {earlier['reason']}" if earlier.get("reason") else "")
        self._end(trial, record, earlier["state"], reason, values=known.values, optuna_state=known.optuna_state)
        return REPEAT

    def log_line(self, number: int, record: dict) -> str:
        acc = record.get("val_accuracy")
        line = (f"trial {number} {record['state']} acc={'-' if acc is None else f'{acc:.4f}'}"
                + (f" int8={record['val_accuracy_int8']:.4f}" if record.get("val_accuracy_int8") is not None else "")
                + f" params={record['params']} macs={record['macs']}"
                f" seconds={record.get('train_seconds', 0):.1f} arch={record['arch']}"
                + (f" reason={record['reason']}" if record.get("reason") else ""))
        log.debug(line)
        return line


def _monotonic(wall: float | None) -> float | None:
    return None if wall is None else time.monotonic() + (wall - time.time())


def _finite(value: float | None) -> float | None:
    return value if value is not None and math.isfinite(value) else None


SCORE_KEYS = ("val_accuracy", "val_balanced_accuracy", "val_recall", "val_accuracy_int8")  # what scores_of records


def scores_of(result: TrainResult) -> dict[str, object]:
    """A training's validation scores as a record keeps them (NaN as None, so the record stays plain JSON)."""
    scores = result.val_scores
    return {"val_accuracy": _finite(result.val_accuracy),
            "val_balanced_accuracy": None if scores is None else _finite(scores.balanced_accuracy),
            "val_recall": None if scores is None else [_finite(r) for r in scores.recall],
            "val_accuracy_int8": _finite(result.val_accuracy_int8)}

