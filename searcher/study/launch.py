"""One worker of a prepared run: its plan, its torch trainer and its progress lines.

The same call runs the lone worker of ``searcher search`` and each worker process of
``--workers N`` (:mod:`searcher.study.processes`).
"""

from __future__ import annotations

import logging
import math
import time
from dataclasses import dataclass
from typing import Callable

import optuna

from searcher.core.arch import Arch
from searcher.core.train_settings import TrainSettings
from searcher.model.build import build
from searcher.model.train import TrainProgress, TrainResult, train_candidate
from searcher.results.records import REJECTED
from searcher.study.ledger import Ledger
from searcher.study.run import PreparedRun, RunData, default_memory_cap
from searcher.study.storage import disk_flush, storage_kind
from searcher.study.worker import Trainer, Worker, WorkerPlan, WorkerTally

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class TorchTrainer:
    """The default :class:`searcher.study.worker.Trainer`: build the candidate and train it on the run's data."""

    data: RunData
    settings: TrainSettings
    threads: int | None = None  # torch threads while training; None leaves torch's setting alone

    @classmethod
    def for_run(cls, run: PreparedRun, threads: int | None = None) -> TorchTrainer:
        return cls(run.data, run.train, threads)

    def __call__(self, arch: Arch, *, seed: int, on_epoch: Callable[[int, float], None], deadline: float | None,
                 progress: TrainProgress) -> TrainResult:
        split = self.data.at(arch.input_shape)
        return train_candidate(build(arch), split.train.images, split.train.labels, split.val.images,
                               split.val.labels, self.settings, seed=seed, on_epoch=on_epoch, deadline=deadline,
                               threads=self.threads, progress=progress)


TrainerFor = Callable[[PreparedRun, "int | None"], Trainer]  # (prepared run, torch threads) -> its trainer


def run_worker(run: PreparedRun, study: optuna.Study, deadline: float | None, index: int, *,
               threads: int | None = None, parent_pid: int | None = None,
               trainer_for: TrainerFor | None = None) -> WorkerTally:
    """One worker's loop over the study, with progress lines on the log.

    ``trainer_for(run, threads)`` makes the trainer in place of :class:`TorchTrainer` (a notebook's
    own training loop, or a test that records what was built).
    """
    s = run.settings
    local = storage_kind(run.url) in ("sqlite", "journal")  # a store on this machine: every worker runs here
    plan = WorkerPlan(
        trials=s.trials, deadline=deadline,
        candidate_seconds=None if s.candidate_minutes is None else s.candidate_minutes * 60,
        memory_cap=s.memory_cap or default_memory_cap(s.workers),
        images_per_epoch=max(2, round(run.train.train_fraction * len(run.data.train.labels))),
        log_path=run.folder / "search.log", seed=s.seed + index, parent_pid=parent_pid,
        run_folder=run.folder if local else None, flush=disk_flush(run.url),
    )
    trainer = (trainer_for or TorchTrainer.for_run)(run, threads)
    worker = Worker(study, run.space, run.budget, run.train, s.objective, run.data.num_classes, plan, trainer)
    worker.on_proposal = progress_printer(deadline, prefix=f"[worker {index}] " if s.workers > 1 else "")
    return worker.run()


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
