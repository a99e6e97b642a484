"""Confirmation: after the proxy search, the candidates on or near the front (and a few others) are
retrained with the export's full schedule over several seeds and scored on the validation split.

Each (candidate, seed) is a *job*: a trial of a second study, ``<run>.confirm``, in the run's own
storage, queued with the parameters ``trial`` (the candidate's trial in the search) and
``seed_index``. Optuna hands each queued trial to one worker only, so workers and machines on one
PostgreSQL study share the jobs; the claim, heartbeat and recovery of :mod:`searcher.study.liveness`
apply as in the search, so a killed run resumes without redoing a finished seed. The test split is
never touched.
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass

import numpy as np
import optuna
import pandas as pd
from optuna.trial import TrialState

from searcher.core.arch import Arch, parse_arch
from searcher.core.budget import Budget
from searcher.core.cost import cost
from searcher.core.train_settings import TrainSettings
from searcher.model.train import TrainProgress
from searcher.run.config import ConfirmSettings
from searcher.run.confirmation import confirmation, cost_columns, select
from searcher.run.records import (
    ACCURACY, DUPLICATE, FAILED, INTERRUPTED, NOT_STARTED, RECORD, TRAINED, TRAINING, Metric, pack_classes, record_of, trials_frame, unpack_classes,
)
from searcher.study.ending import Ending, StopReason
from searcher.study.liveness import claim, queue_retry
from searcher.study.loop import LoopPlan, TrialLoop
from searcher.study.optuna_private import queued_params
from searcher.run.config import OBJECTIVES
from searcher.study.stores import open_storage
from searcher.study.samplers import trial_seed
from searcher.study.timebox import Throughput
from searcher.study.worker import Trainer, scores_of

log = logging.getLogger(__name__)

EMPTY = "empty"  # a trial asked when another worker had just taken the last queued job: nothing to do
SCORES = ("val_accuracy", "val_balanced_accuracy", "val_accuracy_int8")  # each job's scores, as confirmed.csv reads them
VAL_LABELS = "val_labels"  # the confirmation study's attribute holding the validation labels


def confirm_name(name: str) -> str:
    return f"{name}.confirm"


def job_seed(run_seed: int, trial: int, seed_index: int) -> int:
    """The training seed of one job: its own for each seed, and none equal to the proxy's for that trial."""
    return trial_seed(run_seed, (seed_index + 1) * 10**7 + trial)


def open_confirm_study(name: str, url: str) -> optuna.Study:
    """The run's confirmation study, created on first use in the run's own storage."""
    storage = open_storage(url)
    return optuna.create_study(study_name=confirm_name(name), storage=storage, direction="maximize",
                               load_if_exists=True, sampler=optuna.samplers.RandomSampler(seed=0))


def read_jobs(name: str, url: str) -> pd.DataFrame:
    """The confirmation jobs of run ``name`` as :func:`jobs_frame` gives them; empty when there are none.
    Reads only: never creates the store or the study."""
    storage = open_storage(url, create=False)
    if confirm_name(name) not in {s.study_name for s in optuna.get_all_study_summaries(storage)}:
        return jobs_frame(None)
    return jobs_frame(optuna.load_study(study_name=confirm_name(name), storage=storage))


def jobs_frame(study: optuna.Study | None) -> pd.DataFrame:
    """One row per job trial: its candidate, seed, state and accuracy (what confirmed_table reads)."""
    rows = []
    for t in study.get_trials(deepcopy=False) if study is not None else []:
        record = record_of(t)
        if "trial" not in record:
            continue
        state = "running" if t.state == TrialState.RUNNING else "queued" if t.state == TrialState.WAITING \
            else record.get("state", FAILED)
        scores = {key: (record.get(key) if state == TRAINED else None) for key in SCORES}
        predicted = record.get("val_predicted") if state == TRAINED else None
        rows.append({"job": t.number, "trial": record["trial"], "seed_index": record["seed_index"], "state": state,
                     **{key: math.nan if value is None else value for key, value in scores.items()},
                     "reason": record.get("chosen", ""), "train_seconds": record.get("train_seconds", 0.0),
                     "history": record.get("history", []),
                     "predicted": None if predicted is None else unpack_classes(predicted)})
    return pd.DataFrame(rows, columns=["job", "trial", "seed_index", "state", *SCORES, "reason", "train_seconds",
                                       "history", "predicted"])


def keep_labels(study: optuna.Study, labels: np.ndarray) -> None:
    """Store the validation labels on the confirmation study once: with each job's predictions, what
    the paired comparison of two candidates needs, on any machine that reads the store."""
    if VAL_LABELS not in study.user_attrs:
        study.set_user_attr(VAL_LABELS, pack_classes(labels))


def read_labels(name: str, url: str) -> np.ndarray | None:
    """The validation labels :func:`keep_labels` stored for run ``name``; None before any (or for older runs)."""
    storage = open_storage(url, create=False)
    if confirm_name(name) not in {s.study_name for s in optuna.get_all_study_summaries(storage)}:
        return None
    packed = optuna.load_study(study_name=confirm_name(name), storage=storage).user_attrs.get(VAL_LABELS)
    return None if packed is None else unpack_classes(packed)


def plan(study: optuna.Study, main: optuna.Study, budget: Budget, objective: str, val_images: int,
         settings: ConfirmSettings, seed: int, metric: Metric = ACCURACY, more_seeds: int = 0) -> int:
    """Queue every job of the current selection that has no trial yet; the number queued.

    The order serves a time box that cuts confirmation short: the first two seeds of each candidate
    together, most important candidate first (two seeds give a spread, and the default pick needs
    them), then the further seeds round by round. With ``more_seeds``, the candidates the default
    pick chooses between (those not credibly below the best) get that many seeds beyond
    ``settings.seeds``: time a box has left sharpens the pick.
    """
    frame = trials_frame(main)
    chosen = select(frame, budget.caps(), cost_columns(budget.caps(), OBJECTIVES[objective]), val_images,
                    settings, seed, metric, OBJECTIVES[objective] or "params")
    have = set()
    for t in study.get_trials(deepcopy=False):
        params = t.params or queued_params(t) or {}
        if "trial" in params and not (t.state == TrialState.FAIL and record_of(t).get("state") in (INTERRUPTED, NOT_STARTED)):
            have.add((params["trial"], params["seed_index"]))
    order = [(trial, why, index) for trial, why in chosen for index in range(min(2, settings.seeds))]
    order += [(trial, why, index) for index in range(2, settings.seeds) for trial, why in chosen]
    if more_seeds:
        jobs = jobs_frame(study)
        packed = study.user_attrs.get(VAL_LABELS)
        found = confirmation(frame, jobs, budget.caps(), OBJECTIVES[objective] or "params", settings.tolerance, 1, 2,
                             metric, None if packed is None else unpack_classes(packed))
        order += [(trial, "within noise of the best", index)
                  for index in range(settings.seeds, settings.seeds + more_seeds) for trial in found.within]
    queued = 0
    for trial, why, index in order:
        if (trial, index) not in have:
            study.enqueue_trial({"trial": trial, "seed_index": index}, user_attrs={"chosen": why})
            have.add((trial, index))
            queued += 1
    return queued


@dataclass
class ConfirmTally:
    trained: int = 0  # jobs this worker trained
    seconds: float = 0.0  # wall time of this worker's confirmation
    stop: StopReason | None = None


@dataclass(frozen=True, kw_only=True)
class ConfirmPlan(LoopPlan):
    """What a confirming worker needs beyond the studies."""

    run_seed: int
    images: int  # training images a job sees per epoch


class Confirmer(TrialLoop):
    """Takes queued jobs one at a time and trains each with the full schedule until none is left."""

    def __init__(self, study: optuna.Study, main: optuna.Study, settings: TrainSettings, plan: ConfirmPlan,
                 trainer: Trainer, throughput: Throughput) -> None:
        super().__init__(study, plan)
        self.main, self.settings = main, settings
        self.archs: dict[int, Arch] = {}  # the search's trial number -> its candidate, read as jobs need them
        self.trainer, self.throughput = trainer, throughput
        self.tally = ConfirmTally()

    def run(self) -> ConfirmTally:
        """Work through the queued jobs until none is left, the time is up or a signal came (a job predicted
        not to finish is put back at the end of the queue once)."""
        started = time.time()
        stop = super().run()
        self.tally.stop, self.tally.seconds = stop, time.time() - started
        return self.tally

    def done(self) -> StopReason | None:
        if not self.study.get_trials(deepcopy=False, states=(TrialState.WAITING,)):
            return StopReason(Ending.DONE, "confirmation done")
        return None

    def step(self) -> str:
        """Take one queued job and settle it; its state."""
        trial = self.study.ask()
        claim(trial)
        if queued_params(trial) is None:  # another worker took the last queued job meanwhile
            return self.end(trial, {}, EMPTY, "no queued job left", TrialState.FAIL)
        source, index = trial.suggest_int("trial", 0, 2**31 - 1), trial.suggest_int("seed_index", 0, 10**6)
        arch = self.arch_of(source)
        record = {"trial": source, "seed_index": index, "arch": arch.to_text(), "chosen": trial.user_attrs.get("chosen", ""),
                  "retry_of": trial.user_attrs.get("retry_of"), "state": TRAINING}
        trial.set_user_attr(RECORD, record)
        for other in self.study.get_trials(deepcopy=False):  # one read after the write, as in the search
            r = record_of(other)
            if other.number != trial.number and (r.get("trial"), r.get("seed_index")) == (source, index) and (
                    other.state == TrialState.RUNNING or r.get("state") in (TRAINED, FAILED)):
                return self.end(trial, record, DUPLICATE, f"job done or running as trial {other.number}", TrialState.FAIL)
        images = self.settings.epochs * self.plan.images
        predicted = self.throughput.predict(self._macs(arch), images)
        left = None if self.plan.deadline is None else self.plan.deadline - time.time()
        if left is not None and predicted is not None and predicted > left:
            queue_retry(self.study, trial)
            return self.end(trial, record, NOT_STARTED, f"predicted {predicted:.0f} s but {left:.0f} s left",
                            TrialState.FAIL)
        return self._train(trial, arch, record, job_seed(self.plan.run_seed, source, index))

    def arch_of(self, number: int) -> Arch:
        """The candidate of the search's trial ``number``; the search study is read again when another
        worker queued a job for a candidate this one had not seen."""
        if number not in self.archs:
            for t in self.main.get_trials(deepcopy=False):
                text = record_of(t).get("arch")
                if text:
                    self.archs[t.number] = parse_arch(text)
        return self.archs[number]

    def _macs(self, arch: Arch) -> int:
        return cost(arch).macs

    def _train(self, trial: optuna.Trial, arch: Arch, record: dict, seed: int) -> str:
        progress = TrainProgress()
        deadline = None if self.plan.deadline is None else time.monotonic() + (self.plan.deadline - time.time())
        state, reason, result = self.train(trial, lambda p: self.trainer(arch, seed=seed, on_epoch=_ignore,
                                                                         deadline=deadline, progress=p), progress)
        if state != INTERRUPTED:
            self.throughput.add(self._macs(arch), progress.images_seen, result.seconds)
            self.tally.trained += state == TRAINED
        record |= scores_of(result) | {"history": list(result.history), "train_seconds": round(result.seconds, 3),
                                       "epochs": result.epochs, "seed": seed}
        if state == TRAINED and result.val_predicted is not None:  # what the paired comparison resamples
            record["val_predicted"] = pack_classes(result.val_predicted)
        score = result.history[-1] if result.history else math.nan  # the run's metric, as the search told it
        record["score"] = score if math.isfinite(score) else None
        return self.end(trial, record, state, reason, TrialState.COMPLETE if state == TRAINED and record["score"]
                        is not None else TrialState.FAIL, record["score"])

    def log_line(self, number: int, record: dict) -> str | None:
        if record["state"] == EMPTY:
            return None
        acc = record.get("val_accuracy")
        return (f"confirm trial {record.get('trial')} seed {record.get('seed_index')} {record['state']} "
                f"acc={'-' if acc is None else f'{acc:.4f}'} seconds={record.get('train_seconds', 0):.1f}"
                + (f" reason={record['reason']}" if record.get("reason") else ""))


def _ignore(epoch: int, accuracy: float) -> None:
    """Confirmation never stops a candidate early: every seed runs the whole schedule."""

