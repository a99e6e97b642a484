"""One worker of a prepared run: its plan, its torch trainer and its progress lines.

The same call runs the lone worker of ``searcher search`` and each worker process of
``--workers N`` (:mod:`searcher.study.processes`).
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass, replace
from typing import Callable

import optuna
import pandas as pd
import torch

from searcher.core.arch import Arch
from searcher.core.train_settings import TrainSettings
from searcher.int8.check import int8_accuracy
from searcher.limits import MAX_CONFIRM_SEEDS
from searcher.model.build import build
from searcher.model.train import TrainProgress, TrainResult, train_candidate
from searcher.run.config import ConfirmSettings
from searcher.run.confirmation import cost_columns, select
from searcher.run.records import METRICS, REJECTED, SPENT, TRAINED
from searcher.study.confirm import (
    ConfirmPlan, ConfirmTally, Confirmer, keep_labels, open_confirm_study, plan, read_jobs,
)
from searcher.run.config import full_schedule
from searcher.study.cpu_share import CpuShare
from searcher.study.ending import Ending, Phases, StopReason
from searcher.study.ledger import Ledger
from searcher.study.run import PreparedRun, RunData, default_memory_cap
from searcher.run.config import OBJECTIVES
from searcher.study.stores import disk_flush, storage_kind
from searcher.study.timebox import Throughput
from searcher.study.worker import Trainer, Worker, WorkerPlan, WorkerTally

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class TorchTrainer:
    """The default :class:`searcher.study.worker.Trainer`: build the candidate and train it on the run's data.

    With ``int8``, a candidate that finished its schedule is also quantized and scored in integers
    on the validation split (:func:`searcher.int8.check.int8_accuracy`), so a budget in int8
    sees the accuracy of the model that will ship.
    """

    data: RunData
    settings: TrainSettings
    threads: int | None = None  # torch threads while training; None leaves torch's setting alone
    metric: str = "accuracy"  # the validation score reported each epoch
    int8: bool = False  # measure the int8 validation accuracy after training
    share: CpuShare | None = None  # when given, the threads of each candidate: the cores other programs leave free

    @classmethod
    def for_run(cls, run: PreparedRun, threads: int | None = None) -> TorchTrainer:
        """The run's trainer; each candidate trains with at most ``threads`` (default: torch's count), fewer
        while other programs keep cores busy (:mod:`searcher.study.cpu_share`)."""
        share = CpuShare(limit=threads or torch.get_num_threads())
        return cls(run.data, run.train, threads, run.settings.metric, run.budget.weight_precision == "int8", share)

    def __call__(self, arch: Arch, *, seed: int, on_epoch: Callable[[int, float], None], deadline: float | None,
                 progress: TrainProgress) -> TrainResult:
        split = self.data.at(arch.input_shape)
        model = build(arch)
        threads = progress.threads = self.share.threads() if self.share is not None else self.threads
        result = train_candidate(model, split.train.images, split.train.labels, split.val.images, split.val.labels,
                                 self.settings, seed=seed, on_epoch=on_epoch, deadline=deadline, threads=threads,
                                 progress=progress, metric=self.metric, classes=self.data.num_classes)
        if not self.int8:
            return result
        started = time.monotonic()
        accuracy = int8_accuracy(model, arch, split.train.images, split.val.images, split.val.labels)
        return replace(result, val_accuracy_int8=accuracy, int8_seconds=time.monotonic() - started)


TrainerFor = Callable[[PreparedRun, "int | None"], Trainer]  # (prepared run, torch threads) -> its trainer


def run_worker(run: PreparedRun, study: optuna.Study, deadline: float | None, index: int, *,
               threads: int | None = None, parent_pid: int | None = None,
               trainer_for: TrainerFor | None = None, confirm: ConfirmSettings | None = None,
               throughput: Throughput | None = None) -> WorkerTally:
    """One worker's loop over the study, with progress lines on the log.

    ``trainer_for(run, threads)`` makes the trainer in place of :class:`TorchTrainer` (a notebook's
    own training loop, or a test that records what was built). With ``confirm``, the time box keeps
    what the confirmation of the current front is predicted to need. ``throughput`` carries what
    earlier rounds measured, so predictions hold from the first candidate on.
    """
    s = run.settings
    local = _local(run)
    plan = WorkerPlan(
        trials=s.trials, deadline=deadline,
        candidate_seconds=None if s.candidate_minutes is None else s.candidate_minutes * 60,
        memory_cap=s.memory_cap or default_memory_cap(s.workers),
        images_per_epoch=max(2, round(run.train.train_fraction * len(run.data.train.labels))),
        log_path=run.folder / "search.log", seed=s.seed + index, parent_pid=parent_pid,
        run_folder=run.folder if local else None, flush=disk_flush(run.url),
        reserve=confirmation_reserve(run, confirm, deadline - time.time()) if confirm and confirm.on and deadline else None,
        least_macs=run.least_macs,
    )
    trainer = (trainer_for or TorchTrainer.for_run)(run, threads)
    worker = Worker(study, run.space, run.budget, run.train, s.objective, run.data.num_classes, plan, trainer,
                    METRICS[s.metric])
    if throughput is not None:
        worker.tally.throughput = throughput
    worker.on_proposal = progress_printer(deadline, prefix=f"[worker {index}] " if s.workers > 1 else "")
    return worker.run()


def _local(run: PreparedRun) -> bool:
    """A store on this machine: every worker of the run runs here."""
    return storage_kind(run.url) in ("sqlite", "journal")


CONFIRM_SHARE = 0.5  # at most this share of a time box is kept for confirmation: the proxy search gets the rest


def confirmation_reserve(run: PreparedRun, confirm: ConfirmSettings, box: float) -> Callable[[Ledger, Throughput], float]:
    """Seconds the confirmation of the current selection is predicted to take (this worker's share),
    at most CONFIRM_SHARE of the ``box`` seconds: what does not fit stays queued for the next run.

    Recomputed only when a candidate was added to the ledger, from the throughput measured so far;
    seeds already confirmed (in an earlier round or run) are not counted again.
    """
    caps = run.budget.caps()
    columns = cost_columns(caps, OBJECTIVES[run.settings.objective])
    epochs_images = full_schedule(run.train).epochs * len(run.data.train.labels)
    val_images = len(run.data.dataset.val.labels)
    metric = METRICS[run.settings.metric]
    seen: dict[str, float] = {"count": -1, "seconds": 0.0}

    def reserve(ledger: Ledger, throughput: Throughput) -> float:
        if len(ledger.trained) != seen["count"]:
            rows = [record | {"trial": number, "state": TRAINED} for number, record in ledger.trained.items()]
            frame = pd.DataFrame(rows) if rows else pd.DataFrame(columns=["trial", "state", metric.column, "params"])
            chosen = select(frame, caps, columns, val_images, confirm, run.settings.seed, metric,
                            OBJECTIVES[run.settings.objective] or "params") if rows else []
            jobs = read_jobs(run.settings.name, run.url) if chosen else None
            done = jobs[jobs["state"] == TRAINED]["trial"].value_counts().to_dict() if jobs is not None else {}
            wanted = sum((throughput.predict(ledger.trained[t]["macs"], epochs_images) or 0.0)
                         * max(0, confirm.seeds - done.get(t, 0)) for t, _ in chosen if t in ledger.trained)
            seen["count"] = len(ledger.trained)
            wanted /= run.settings.workers
            seen["seconds"] = min(wanted, CONFIRM_SHARE * box)
        return seen["seconds"]

    return reserve


def run_confirmation(run: PreparedRun, main: optuna.Study, deadline: float | None, confirm: ConfirmSettings,
                     throughput: Throughput, *, threads: int | None = None,
                     trainer_for: TrainerFor | None = None, more_seeds: int = 0) -> ConfirmTally:
    """Queue the jobs the current front calls for (if not queued yet; ``more_seeds`` further seeds for the
    candidates within noise of the best) and work through the queue."""
    study = open_confirm_study(run.settings.name, run.url)
    keep_labels(study, run.data.dataset.val.labels)
    queued = plan(study, main, run.budget, run.settings.objective, len(run.data.dataset.val.labels), confirm,
                  run.settings.seed, METRICS[run.settings.metric], more_seeds)
    log.info("confirmation: %d job(s) queued now; each candidate retrained %d times with the export's schedule",
             queued, confirm.seeds)
    full = replace(run, train=full_schedule(run.train))
    trainer = (trainer_for or TorchTrainer.for_run)(full, threads)
    settings = ConfirmPlan(deadline=deadline, run_seed=run.settings.seed, images=len(run.data.train.labels),
                           log_path=run.folder / "search.log", run_folder=run.folder if _local(run) else None,
                           flush=disk_flush(run.url))
    return Confirmer(study, main, full.train, settings, trainer, throughput).run()


def run_phases(run: PreparedRun, study: optuna.Study, deadline: float | None, *, index: int = 0,
               threads: int | None = None, parent_pid: int | None = None,
               trainer_for: TrainerFor | None = None) -> Phases:
    """One worker's proxy search, then its share of the confirmation, round after round until the box is spent.

    Confirmation follows a proxy phase that ended by itself (not by a signal or the time running
    out). Time the confirmation leaves goes back to work rather than idle: to the proxy search
    when it had stopped only to keep time for confirming, else to further seeds of the candidates
    the default pick must choose between. Without a time box there is one round.
    """
    confirm = run.settings.confirm
    throughput = Throughput()  # measured over every round: a later round predicts from the first candidate on
    phases = Phases(StopReason(Ending.DONE, ""), [])
    texts: list[str] = []
    more_seeds = 0  # seeds added beyond confirm.seeds for close calls
    while True:
        started = time.time()
        tally = run_worker(run, study, deadline, index, threads=threads, parent_pid=parent_pid,
                           trainer_for=trainer_for, confirm=confirm, throughput=throughput)
        phases.proposals += tally.proposals
        phases.proxy_seconds += time.time() - started
        searched = any(p in SPENT for p in tally.proposals)  # some candidate cost training time
        phases.stop = tally.stop
        texts.append(f"proxy search: {tally.stop.text}")
        if not confirm.on or tally.stop.kind not in (Ending.DONE, Ending.TIME_NEAR, Ending.EXHAUSTED):
            break
        started = time.time()
        confirmed = run_confirmation(run, study, deadline, confirm, throughput, threads=threads,
                                     trainer_for=trainer_for, more_seeds=more_seeds)
        phases.confirm_seconds += time.time() - started
        texts.append(f"confirmation: {confirmed.stop.text}")
        if confirmed.stop.kind is Ending.SIGNAL:
            phases.stop = confirmed.stop
            break
        if deadline is None or confirmed.stop.kind is not Ending.DONE or not _time_for_more(deadline, throughput, run):
            break
        if tally.stop.kind is Ending.TIME_NEAR and searched:  # it stopped to keep time for confirming: time is back
            log.info("%s of the time box left after the confirmation: back to the proxy search",
                     clock(deadline - time.time()))
            continue
        if (more_seeds and not confirmed.trained) or confirm.seeds + more_seeds >= MAX_CONFIRM_SEEDS:
            break  # the last round of further seeds found nothing to do, or the seeds are at their ceiling
        more_seeds += 1
        log.info("%s of the time box left: one more seed for the candidates the default pick chooses between",
                 clock(deadline - time.time()))
    phases.stop = StopReason(phases.stop.kind, "; ".join(_collapse(texts)), phases.stop.signum)
    return phases


def _time_for_more(deadline: float, throughput: Throughput, run: PreparedRun) -> bool:
    """Is there time for at least one more proxy training of the space's cheapest candidate?"""
    predicted = throughput.predict(run.least_macs, run.train.epochs * len(run.data.train.labels))
    return deadline - time.time() > (predicted or 0.0)


def _collapse(texts: list[str]) -> list[str]:
    """Repeated rounds say so once: 'proxy search: x (3 rounds)'."""
    counted: dict[str, int] = {}
    for text in texts:
        counted[text] = counted.get(text, 0) + 1
    return [text + (f" ({n} rounds)" if n > 1 else "") for text, n in counted.items()]


def progress_printer(deadline: float | None, prefix: str) -> Callable[[str, WorkerTally, Ledger], None]:
    """A progress line after each trained candidate and every 25 rejections.

    The counts are the worker's running ledger of the study (no extra read): its own trials at
    once, other workers' as of its last look.
    """
    started = time.time()
    rejections = 0

    def show(state: str, tally: WorkerTally, ledger: Ledger) -> None:
        nonlocal rejections
        if state == REJECTED:
            rejections += 1
            if rejections % 25:
                return
        c = ledger.counts()
        recent = tally.proposals[-50:]
        share = sum(p == REJECTED for p in recent) / max(1, len(recent))
        left = "" if deadline is None else f", {clock(max(0.0, deadline - time.time()))} left"
        log.info("%stried %d: rejected %d (%.0f%% of the last %d), trained %d, stopped early %d, failed %d, "
                 "interrupted %d | best %s | %s elapsed%s", prefix, c["tried"], c["rejected"], 100 * share,
                 len(recent), c["trained"], c["stopped_early"], c["failed"], c["interrupted"],
                 "-" if math.isnan(ledger.best) else f"{ledger.best:.4f}", clock(time.time() - started), left)

    return show


def clock(seconds: float) -> str:
    """Elapsed or remaining time as 1h02m03s or 2m03s."""
    minutes, secs = divmod(int(seconds), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours}h{minutes:02d}m{secs:02d}s" if hours else f"{minutes}m{secs:02d}s"
