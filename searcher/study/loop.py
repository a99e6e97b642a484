"""The skeleton every worker loop shares: the proxy search (:mod:`searcher.study.worker`) and the
confirmation (:mod:`searcher.study.confirm`) each supply only what differs.

A loop takes one trial at a time from its study until a reason to stop comes up. What both loops
do the same way lives here:

* **stopping** — a signal (Ctrl-C, SIGTERM) or the run's deadline first; then the loop's own
  reasons (:meth:`TrialLoop.ends`); every RECOVER_SECONDS a look for trials that dead workers left
  running (:func:`searcher.study.liveness.recover_stale`); then :meth:`TrialLoop.done`;
* **training one trial** — a heartbeat while it trains, signals turned into an exception the trainer
  lets out, and the outcome sorted into a state: diverged is ``failed``, a signal is
  ``interrupted`` and the trial is queued again once;
* **ending one trial** — its record stored on the trial, Optuna told, the store flushed to disk when
  the trial cost training, and one line in search.log.
"""

from __future__ import annotations

import contextlib
import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import optuna
from optuna.trial import TrialState

from searcher.model.train import Diverged, OutOfTime, TrainProgress, TrainResult
from searcher.run.records import FAILED, INTERRUPTED, RECORD, TRAINED
from searcher.study.ending import Ending, StopReason, StopRequested, StopSignals
from searcher.study.liveness import Heartbeat, Registry, queue_retry, recover_stale

RECOVER_SECONDS = 30.0  # how often a running loop looks for trials that dead workers left running


@dataclass(frozen=True, kw_only=True)
class LoopPlan:
    """What every loop needs beyond its study (each loop's plan adds its own fields)."""

    deadline: float | None  # time.time() after which nothing new starts and training stops
    log_path: Path | None = None  # one line per trial, appended (search.log)
    run_folder: Path | None = None  # given when every worker of the study runs on this machine
    flush: Callable[[], None] | None = None  # puts what the store has committed on disk (storage.disk_flush)


class TrialLoop:
    """Take trials one at a time until a reason to stop; see the module docstring.

    A subclass supplies :meth:`step` (take one trial and settle it, returning its state) and may
    supply :meth:`ends` (its reasons to stop before the look for dead workers' trials), :meth:`done`
    (after it), :meth:`after` (bookkeeping after each step), :meth:`out_of_time` and :meth:`log_line`.
    """

    def __init__(self, study: optuna.Study, plan: LoopPlan) -> None:
        self.study, self.plan = study, plan
        self.signals = StopSignals()
        self.registry: Registry | None = None  # this run's local worker registry, when its store is local
        self._recovered_at = -math.inf  # time.monotonic() of the last look for dead workers' trials

    # -- what a loop supplies -------------------------------------------------------------------------
    def step(self) -> str:
        raise NotImplementedError

    def ends(self) -> StopReason | None:
        """The loop's own reasons to stop, asked before the look for dead workers' trials."""
        return None

    def done(self) -> StopReason | None:
        """The loop's reasons to stop that need an up-to-date view of the study (asked after the look)."""
        return None

    def after(self, state: str) -> None:
        """Bookkeeping after each step."""

    def out_of_time(self, exc: OutOfTime) -> tuple[str, str]:
        """(state, reason) when training ran past its deadline: by default the run's time limit."""
        return INTERRUPTED, "the run's time limit was reached during training; queued again"

    def log_line(self, number: int, record: dict) -> str | None:
        """The search.log line of a finished trial; None: none."""
        return None

    def flushes(self, state: str) -> bool:
        """Whether a trial ending in ``state`` is put on disk at once: it cost training time."""
        return state in (TRAINED, FAILED)

    # -- the skeleton ---------------------------------------------------------------------------------
    def run(self) -> StopReason:
        """Step until a reason to stop comes up; the first look recovers dead workers' trials."""
        self.signals.install()
        registry = Registry(self.plan.run_folder) if self.plan.run_folder else contextlib.nullcontext()
        with registry as self.registry:
            while (stop := self.stop_reason()) is None:
                state = self.step()
                self.after(state)
                if state == INTERRUPTED:  # say why (a signal sets the exit status)
                    return self.stop_reason() or StopReason(
                        Ending.TIME_LIMIT, "interrupted during training (queued for the next run)")
        return stop

    def stop_reason(self) -> StopReason | None:
        """Why the loop must stop now, or None; looks for dead workers' trials every RECOVER_SECONDS."""
        if self.signals.received:
            return StopReason.by_signal(self.signals.received)
        if self.plan.deadline is not None and time.time() >= self.plan.deadline:
            return StopReason(Ending.TIME_LIMIT, "time limit reached")
        if (own := self.ends()) is not None:
            return own
        if time.monotonic() - self._recovered_at >= RECOVER_SECONDS:
            # not only at start: a worker elsewhere may die later, and a trial a kill left unclaimed is
            # only called dead after a grace period
            recover_stale(self.study, self.registry)
            self._recovered_at = time.monotonic()
        return self.done()

    def train(self, trial: optuna.Trial, call: Callable[[TrainProgress], TrainResult],
              progress: TrainProgress) -> tuple[str, str, TrainResult]:
        """Run ``call(progress)`` under a heartbeat with signals raised inside it; (state, reason, result).

        Diverged fails the trial; running past a deadline is :meth:`out_of_time`'s to say; a signal
        interrupts it. An interrupted trial is queued again once. Anything else (optuna.TrialPruned)
        is the caller's.
        """
        with Heartbeat(self.study, trial):
            try:
                with self.signals.raising():
                    result = call(progress)
                state, reason = TRAINED, ""
            except Diverged as exc:
                state, reason, result = FAILED, f"diverged: {exc.reason}", exc.result
            except OutOfTime as exc:
                (state, reason), result = self.out_of_time(exc), exc.result
            except StopRequested as exc:
                state, reason, result = INTERRUPTED, f"stopped by {exc}; queued again", progress.result()
        if state == INTERRUPTED:
            queue_retry(self.study, trial)
        return state, reason, result

    def end(self, trial: optuna.Trial, record: dict, state: str, reason: str, optuna_state: TrialState,
            values: float | list[float] | None = None) -> str:
        """Store the record, tell Optuna, flush and log; returns ``state``."""
        record = record | {"state": state, "reason": reason}
        trial.set_user_attr(RECORD, record)
        if optuna_state == TrialState.COMPLETE:
            self.study.tell(trial, values)
        else:
            self.study.tell(trial, state=optuna_state)
        if self.plan.flush is not None and self.flushes(state):
            self.plan.flush()  # a power cut now can cost only what was free to redo
        line = self.log_line(trial.number, record)
        if line is not None and self.plan.log_path is not None:
            with open(self.plan.log_path, "a", encoding="utf-8") as handle:
                handle.write(f"{time.strftime('%Y-%m-%d %H:%M:%S')} {line}\n")
        return state
