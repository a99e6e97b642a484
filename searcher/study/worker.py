"""The search: propose a candidate, gate it on the budget, train the survivors, tell Optuna.

One worker runs :func:`work` on one study; ``--workers N`` starts N of them as processes
(see :mod:`searcher.study.processes`). Every trial is told to Optuna as soon as it ends, so a kill
loses at most the candidate in flight, and :mod:`searcher.study.liveness` re-queues that one.

How each proposal ends (the ``state`` column of trials.csv):

* ``rejected`` — breaks a cap by exact arithmetic; never built. Told to Optuna as COMPLETE with
  a plausible accuracy (chance level) and a positive constraint, so TPE and NSGA-II learn to
  avoid the region (a FAIL would be invisible to TPE).
* ``trained`` / ``stopped_early`` — trained; stopped early means it fell behind its peers at an
  epoch checkpoint (successive halving; a dominance rule in two-objective mode).
* ``failed`` — training diverged, or it ran past the per-candidate time limit.
* ``interrupted`` — a signal, the run's time limit or a crash ended it; queued again once.
* ``duplicate`` — another worker was training the same architecture at that moment.

A proposal of an architecture that was already trained, stopped early or failed takes that
outcome over (``repeat_of`` names the trial) and costs no training time.
"""

from __future__ import annotations

import logging
import math
import os
import signal
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import optuna
from optuna.trial import TrialState

from searcher.core.arch import Arch
from searcher.core.budget import Budget, Violation
from searcher.core.cost import cost, training_bytes
from searcher.study.liveness import Registry, claim, queue_retry, recover_stale
from searcher.results.records import (
    DUPLICATE, FAILED, HEARTBEAT, INTERRUPTED, NOT_STARTED, RECORD, REJECTED, SPENT, STOPPED, TRAINED,
    counts_of, describe, finished_state, record_of,
)
from searcher.core.space import Space
from searcher.study.storage import OBJECTIVES, pruning_epochs

log = logging.getLogger(__name__)

HEARTBEAT_SECONDS = 20.0  # how often a training worker says it is alive
MAX_IDLE_PROPOSALS = 300  # stop after this many proposals in a row that could not be trained
RECOVER_SECONDS = 30.0  # how often a running worker looks for trials that dead workers left running


class StopRequested(BaseException):
    """SIGINT or SIGTERM arrived during training."""

    def __init__(self, signum: int) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


class _Signals:
    """Turns SIGINT/SIGTERM into a flag, raised as StopRequested only while training runs.

    A second signal ends the process at once, as after a kill: whatever was completed is in the
    study already, and the next run recovers the candidate in flight.
    """

    def __init__(self) -> None:
        self.received: int | None = None
        self.raise_now = False

    def __call__(self, signum: int, frame: Any) -> None:
        if self.received is not None:
            exit_at_once(signum)
        self.received = signum
        if self.raise_now:
            self.raise_now = False
            raise StopRequested(signum)

    def install(self) -> None:
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGINT, self)
            signal.signal(signal.SIGTERM, self)


@dataclass(frozen=True)
class WorkerPlan:
    """What one worker needs beyond the study: limits and where to write its log."""

    trials: int  # candidates to train over the study's life (repeats of known results are free)
    deadline: float | None  # time.time() after which nothing new starts and training stops
    candidate_seconds: float | None  # per-candidate training time limit
    memory_cap: int  # bytes; candidates whose training-memory estimate exceeds it are rejected
    threads: int | None  # torch threads for this worker
    log_path: Path | None  # one line per candidate, appended
    seed: int = 0
    parent_pid: int | None = None  # stop when the parent process is gone
    run_folder: Path | None = None  # given when every worker of the study runs on this machine
    flush: Callable[[], None] | None = None  # puts what the store has committed on disk (study.disk_flush)


@dataclass
class WorkerTally:
    """What this worker did, for the progress line and the closing summary."""

    proposals: list[str] = field(default_factory=list)  # state of every proposal, in order
    mac_images: float = 0.0  # sum over trained candidates of MACs x training images seen
    train_seconds: float = 0.0
    started: float = field(default_factory=time.time)
    stopped_by: str = ""  # why the loop ended

    def seconds_per_mac_image(self) -> float | None:
        return self.train_seconds / self.mac_images if self.mac_images else None


def exit_at_once(signum: int) -> None:
    """End the process now with the shell's status for the signal (130 for SIGINT, 143 for SIGTERM)."""
    os.write(2, f"second {signal.Signals(signum).name}: stopping at once; completed candidates are kept "
                f"and the next run recovers the one in flight\n".encode())
    os._exit(128 + signum)


def constraint_value(violations: list[Violation], totals: dict[str, int], caps: dict[str, int]) -> float:
    """One number for Optuna: > 0 is the summed relative overshoot, ≤ 0 the tightest slack."""
    if violations:
        return sum(v.excess for v in violations)
    if not caps:
        return -1.0
    return max((totals[c] - limit) / limit for c, limit in caps.items())


class Search:
    """One worker's loop over a study; see the module docstring for the states."""

    def __init__(self, study: optuna.Study, space: Space, budget: Budget, train_settings: Any, data: Any,
                 objective: str, plan: WorkerPlan) -> None:
        self.study, self.space, self.budget = study, space, budget
        self.train_settings, self.data, self.objective, self.plan = train_settings, data, objective, plan
        self.tally = WorkerTally()
        self.signals = _Signals()
        self.classes = data.num_classes
        self.finished = FinishedTrials()
        self.on_proposal: Any = None  # called as on_proposal(state, tally, finished) after each proposal
        self._recovered_at = -math.inf  # time.monotonic() of the last look for dead workers' trials
        self.registry: Any = None  # this run's local worker registry, when its store is local

    # -- the loop --------------------------------------------------------------------------
    def run(self) -> WorkerTally:
        from contextlib import nullcontext

        self.signals.install()  # the first _should_stop recovers what dead workers left running
        with Registry(self.plan.run_folder) if self.plan.run_folder else nullcontext() as registry:
            self.registry = registry
            return self._loop()

    def _loop(self) -> WorkerTally:
        idle = 0
        while True:
            stop = self._should_stop(idle)
            if stop:
                self.tally.stopped_by = stop
                break
            state = self._one()
            self.tally.proposals.append(state)
            if self.on_proposal is not None:
                self.on_proposal(state, self.tally, self.finished)
            idle = idle + 1 if state in (REJECTED, DUPLICATE, "repeat") else 0
            if state in (NOT_STARTED, INTERRUPTED):  # say why (a signal sets the exit status), not just "interrupted"
                self.tally.stopped_by = self._should_stop(idle) or {
                    NOT_STARTED: "time limit near: the next candidate would not finish in time (queued for the next run)",
                    INTERRUPTED: "interrupted during training (queued for the next run)"}[state]
                break
        return self.tally

    def _should_stop(self, idle: int) -> str:
        if self.signals.received:
            return f"stopped by {signal.Signals(self.signals.received).name}"
        if self.plan.deadline is not None and time.time() >= self.plan.deadline:
            return "time limit reached"
        if self.plan.parent_pid is not None and _parent_gone(self.plan.parent_pid):
            return "parent process gone"
        if idle >= MAX_IDLE_PROPOSALS:
            return f"{idle} proposals in a row were over budget or already known; the space looks exhausted"
        if time.monotonic() - self._recovered_at >= RECOVER_SECONDS:
            # not only at start: a worker elsewhere may die later, and a trial a kill left unclaimed is
            # only called dead after a grace period; until recovered, both count as in flight below
            recover_stale(self.study, self.registry)
            self._recovered_at = time.monotonic()
        # other workers' candidates will count too; an unclaimed trial is a kill's leftover (or one that is
        # claimed a moment later), so it does not hold back the last candidate
        in_flight = sum("worker" in t.user_attrs for t in self.finished.update(self.study))
        if self.finished.spent + in_flight >= self.plan.trials:
            return f"{self.plan.trials} candidates trained"
        return ""

    def _one(self) -> str:
        trial = self.study.ask()
        claim(trial)
        arch = self.space.suggest(trial, self.classes)
        result_cost = cost(arch, self.budget.activation_precision)
        totals = self.budget.totals(result_cost)
        totals["training_bytes"] = training_bytes(result_cost, self.train_settings.batch_size)
        violations = self.budget.check(totals)
        if totals["training_bytes"] > self.plan.memory_cap:
            violations.append(Violation("training_bytes", totals["training_bytes"], self.plan.memory_cap))
        record = describe(arch, totals) | {"retry_of": trial.user_attrs.get("retry_of")}
        caps = self.budget.caps() | {"training_bytes": self.plan.memory_cap}
        trial.set_constraint("budget", constraint_value(violations, totals, caps))
        if violations:
            return self._finish(trial, record, REJECTED, "; ".join(map(str, violations)),
                                rejected_by="+".join(v.cap for v in violations))
        # Write the architecture on the trial before looking at the others: of two workers that draw
        # it at once, at least one then sees the other, so it is never trained twice (both may yield).
        # The look is one read of the study, after the write: a trial that drew the same architecture
        # is in it either still running or finished, and then its outcome is known.
        record = record | {"state": "training"}
        trial.set_user_attr(RECORD, record)
        running = self.finished.update(self.study)
        if any(t.number != trial.number and record_of(t).get("arch") == record["arch"] for t in running):
            return self._finish(trial, record, DUPLICATE, "another worker is training the same architecture",
                                optuna_state=TrialState.FAIL)
        known = self.finished.outcomes.get(record["arch"])
        if known is not None:
            return self._repeat(trial, record, known)
        left = None if self.plan.deadline is None else self.plan.deadline - time.time()
        predicted = self._predict_seconds(totals["macs"])
        if left is not None and predicted is not None and predicted > left:
            queue_retry(self.study, trial)
            return self._finish(trial, record, NOT_STARTED,
                                f"predicted {predicted:.0f} s of training but {left:.0f} s left; queued for the next run",
                                optuna_state=TrialState.FAIL)
        return self._train(trial, arch, totals, record)

    # -- training one candidate ---------------------------------------------------------------
    def _train(self, trial: optuna.Trial, arch: Arch, totals: dict, record: dict) -> str:
        from searcher.model.build import build
        from searcher.model.train import Diverged, OutOfTime, TrainProgress, train_candidate

        beat = _Heartbeat(self.study, trial._trial_id)
        progress = TrainProgress()
        run_deadline = self._monotonic(self.plan.deadline)
        limit = None if self.plan.candidate_seconds is None else time.monotonic() + self.plan.candidate_seconds
        deadline = min((d for d in (run_deadline, limit) if d is not None), default=None)
        split = self.data.at(arch.input_shape)
        seed = self.plan.seed * 1_000_003 + trial.number
        on_epoch = self._on_epoch(trial, totals)
        beat.start()
        self.signals.raise_now = True
        try:
            if self.signals.received:
                raise StopRequested(self.signals.received)
            model = build(arch)
            result = train_candidate(model, split.train.images, split.train.labels, split.val.images,
                                     split.val.labels, self.train_settings, seed=seed, on_epoch=on_epoch,
                                     deadline=deadline, threads=self.plan.threads, progress=progress)
            self.signals.raise_now = False
            state, reason = TRAINED, ""
        except optuna.TrialPruned:
            self.signals.raise_now = False
            state, reason, result = STOPPED, f"behind its peers after epoch {len(progress.history)}", progress.result()
        except Diverged as exc:
            self.signals.raise_now = False
            state, reason, result = FAILED, f"diverged: {exc.reason}", exc.result
        except OutOfTime as exc:
            self.signals.raise_now = False
            result = exc.result
            if limit is not None and (run_deadline is None or limit <= run_deadline):
                state, reason = FAILED, f"over the per-candidate limit of {self.plan.candidate_seconds:.3g} s"
            else:
                state, reason = INTERRUPTED, "the run's time limit was reached during training; queued again"
        except StopRequested as exc:
            self.signals.raise_now = False
            state, reason, result = INTERRUPTED, f"stopped by {exc}; queued again", progress.result()
        finally:
            self.signals.raise_now = False
            beat.stop()
        if state == INTERRUPTED:
            queue_retry(self.study, trial)
        if state in (TRAINED, STOPPED):
            self.tally.mac_images += totals["macs"] * max(progress.images_seen, 1)
            self.tally.train_seconds += result.seconds
        record.update(val_accuracy=_finite(result.val_accuracy), history=list(result.history),
                      train_seconds=round(result.seconds, 3), epochs=result.epochs)
        values = self._values(result.val_accuracy, totals)
        optuna_state = {TRAINED: TrialState.COMPLETE, STOPPED: TrialState.PRUNED}.get(state, TrialState.FAIL)
        if state == STOPPED:
            values = None
        self._finish(trial, record, state, reason, values=values, optuna_state=optuna_state)
        return state

    def _on_epoch(self, trial: optuna.Trial, totals: dict):
        """Stop poor candidates between epochs: Optuna's pruner, or dominance for two objectives."""
        cost_column = OBJECTIVES[self.objective]
        judged = pruning_epochs(self.train_settings.epochs)

        def on_epoch(epoch: int, accuracy: float) -> None:
            self.signals.raise_now = False
            try:
                if cost_column is None:
                    if epoch + 1 in judged:
                        trial.report(accuracy, epoch + 1)
                        if trial.should_prune():
                            raise optuna.TrialPruned()
                elif self._dominated(epoch, accuracy, totals[cost_column], cost_column):
                    raise optuna.TrialPruned()
            finally:
                self.signals.raise_now = self.signals.received is None
            if self.signals.received:
                raise StopRequested(self.signals.received)

        return on_epoch

    def _dominated(self, epoch: int, accuracy: float, own_cost: float, column: str, margin: float = 0.02) -> bool:
        """Two-objective early stop: some finished candidate no costlier was clearly better at this epoch."""
        if epoch + 1 >= self.train_settings.epochs:
            return False
        for t in self.study.get_trials(deepcopy=False, states=(TrialState.COMPLETE,)):
            r = record_of(t)
            history = r.get("history") or []
            if r.get("state") == TRAINED and len(history) > epoch and r.get(column, math.inf) <= own_cost:
                if history[epoch] >= accuracy + margin:
                    return True
        return False

    # -- bookkeeping ------------------------------------------------------------------------------
    def _values(self, accuracy: float, totals: dict) -> list[float]:
        column = OBJECTIVES[self.objective]
        accuracy = accuracy if math.isfinite(accuracy) else 0.0
        return [accuracy] if column is None else [accuracy, float(totals[column])]

    def _finish(self, trial: optuna.Trial, record: dict, state: str, reason: str, *, rejected_by: str = "",
                values: Any = None, optuna_state: TrialState = TrialState.COMPLETE) -> str:
        record = record | {"state": state, "reason": reason, "rejected_by": rejected_by}
        if state == REJECTED:
            values = self._values(1.0 / self.classes, record)  # chance level: plausible for GP, dull for TPE
            record["train_seconds"] = 0.0
        trial.set_user_attr(RECORD, record)
        if optuna_state == TrialState.COMPLETE:
            self.study.tell(trial, values)
        else:
            self.study.tell(trial, state=optuna_state)
        self.finished.add(trial.number, optuna_state, values if optuna_state == TrialState.COMPLETE else None, record)
        if self.plan.flush is not None and state not in (REJECTED, DUPLICATE):
            self.plan.flush()  # a power cut now can cost only rejections, which are free to redo
        self._log(trial.number, record)
        return state

    def _repeat(self, trial: optuna.Trial, record: dict, known: _Outcome) -> str:
        """Reuse the outcome of the same architecture trained before, whatever it was; no training time."""
        earlier = known.record
        record = record | {"repeat_of": known.number, "val_accuracy": earlier.get("val_accuracy"),
                           "history": earlier.get("history", []), "epochs": earlier.get("epochs"), "train_seconds": 0.0}
        reason = f"same architecture as trial {known.number}" + (f": {earlier['reason']}" if earlier.get("reason") else "")
        self._finish(trial, record, earlier["state"], reason, values=known.values, optuna_state=known.optuna_state)
        return "repeat"

    def _predict_seconds(self, macs: int) -> float | None:
        rate = self.tally.seconds_per_mac_image()
        if rate is None:
            return None
        images = self.train_settings.epochs * round(self.train_settings.train_fraction * len(self.data.train.labels))
        return rate * macs * images

    @staticmethod
    def _monotonic(wall: float | None) -> float | None:
        return None if wall is None else time.monotonic() + (wall - time.time())

    def _log(self, number: int, record: dict) -> None:
        acc = record.get("val_accuracy")
        line = (f"{time.strftime('%Y-%m-%d %H:%M:%S')} trial {number} {record['state']}"
                f" acc={'-' if acc is None else f'{acc:.4f}'} params={record['params']} macs={record['macs']}"
                f" seconds={record.get('train_seconds', 0):.1f} arch={record['arch']}"
                + (f" reason={record['reason']}" if record.get("reason") else ""))
        log.debug(line)
        if self.plan.log_path is not None:
            with open(self.plan.log_path, "a", encoding="utf-8") as handle:
                handle.write(line + "\n")


class FinishedTrials:
    """What the study's finished trials say, each read once (a finished trial never changes).

    Keeps the per-proposal bookkeeping flat as a study grows to thousands of trials; this
    worker's own trials are added as it tells them, other workers' at the next read.
    """

    def __init__(self) -> None:
        self.seen: set[int] = set()
        self.by_state: Counter[str] = Counter()  # searcher state -> finished trials (repeats included)
        self.repeats = 0
        self.spent = 0  # candidates that used training time (trained, stopped early, failed; repeats excluded)
        self.best = math.nan  # best validation accuracy of a trained candidate
        self.outcomes: dict[str, _Outcome] = {}  # arch text -> its first spent trial's outcome

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
        self.by_state[state] += 1
        if state == TRAINED and record.get("val_accuracy") is not None:
            self.best = max(record["val_accuracy"], self.best) if not math.isnan(self.best) else record["val_accuracy"]
        if record.get("repeat_of") is not None:
            self.repeats += 1
        elif state in SPENT:
            self.spent += 1
            self.outcomes.setdefault(record["arch"], _Outcome(number, optuna_state, values, record))

    def counts(self) -> dict[str, int]:
        """As :func:`searcher.results.records.counts` gives for the finished trials."""
        return counts_of(self.by_state, self.repeats)


@dataclass(frozen=True)
class _Outcome:
    """A spent trial's result, as a repeat of its architecture reuses it."""

    number: int
    optuna_state: TrialState
    values: list[float] | None
    record: dict


def _finite(value: float) -> float | None:
    return value if value is not None and math.isfinite(value) else None


def _parent_gone(pid: int) -> bool:
    import os

    return os.getppid() != pid


class _Heartbeat:
    """A thread that stamps the running trial every few seconds, so others can tell it is alive."""

    def __init__(self, study: optuna.Study, trial_id: int) -> None:
        self.study, self.trial_id = study, trial_id
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True, name="searcher-heartbeat")

    def _run(self) -> None:
        while not self._stop.wait(HEARTBEAT_SECONDS):
            try:
                self.study._storage.set_trial_user_attr(self.trial_id, HEARTBEAT, time.time())
            except Exception as exc:  # a failed stamp must not stop training; the next one retries
                log.debug("heartbeat failed: %s", exc)

    def start(self) -> None:
        self._thread.start()  # the first stamp after HEARTBEAT_SECONDS: until then the claim's time stands

    def stop(self) -> None:
        self._stop.set()
