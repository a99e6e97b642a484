"""`searcher search` as a library call: check every input, open the run, run the workers, write results.

>>> from searcher.study.run import SearchSettings, search   # doctest: +SKIP
>>> outcome = search(SearchSettings(name="demo", space="spaces/mcu.toml", trials=10))  # doctest: +SKIP
"""

from __future__ import annotations

import json
import logging
import math
import os
import signal
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from searcher.core.budget import Budget
from searcher.errors import SearcherError, one_of
from searcher.runs import RUNS, run_folder, write_atomic
from searcher.core.space import Space
from searcher.core.space_file import load_space
from searcher.study.storage import OBJECTIVES, SAMPLERS, RunConfig, disk_flush, open_study, redact, storage_kind, storage_url

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class SearchSettings:
    """One search run; every field has a command-line option of the same name."""

    name: str  # run folder runs/<name>/ and study name
    space: str  # space file path
    data: str = "demo"  # "demo", an .npz file, or a folder of class sub-folders
    trials: int = 30  # candidates to train over the study's life (resuming counts what is done)
    minutes: float | None = None  # wall-clock limit for this invocation
    objective: str = "accuracy"  # accuracy alone, or accuracy against params | macs | activation
    sampler: str = "tpe"  # tpe | nsga2 | random
    storage: str | None = None  # Optuna storage URL or .journal path; default SQLite in the run folder
    workers: int = 1  # worker processes on this machine
    seed: int = 0  # data split, sampler and per-candidate training seeds
    candidate_minutes: float | None = None  # per-candidate training limit
    memory_cap: int | None = None  # bytes for the training-memory guard; default half of free RAM
    skip_unreadable: bool = False  # skip (and count) images that cannot be decoded
    root: Path = RUNS  # where run folders live

    def check(self) -> None:
        if self.objective not in OBJECTIVES:
            raise SearcherError(f"`--objective` must be {one_of(self.objective, tuple(OBJECTIVES))}, got {self.objective!r}",
                                key="--objective")
        if self.sampler not in SAMPLERS:
            raise SearcherError(f"`--sampler` must be {one_of(self.sampler, SAMPLERS)}, got {self.sampler!r}", key="--sampler")
        for key, value, low in (("--trials", self.trials, 1), ("--workers", self.workers, 1)):
            if not isinstance(value, int) or value < low:
                raise SearcherError(f"`{key}` must be an integer ≥ {low}, got {value!r}", key=key)
        for key, value in (("--minutes", self.minutes), ("--candidate-minutes", self.candidate_minutes)):
            if value is not None and not value > 0:
                raise SearcherError(f"`{key}` must be a number of minutes > 0, got {value!r}", key=key)
        if self.storage is not None:
            storage_kind(self.storage)


@dataclass
class SearchOutcome:
    """What a search invocation did; ``exit_status`` is what the command returns."""

    folder: Path
    counts: dict[str, int]
    best: dict[str, Any] | None
    stopped_by: str
    exit_status: int = 0
    rejected_share: list[float] = field(default_factory=list)  # share rejected per block of proposals
    seconds: float = 0.0


class RunData:
    """The run's data at the largest input size, resized once per other size a candidate asks for."""

    def __init__(self, dataset: Any) -> None:
        self.dataset = dataset
        self.num_classes = dataset.num_classes
        self.train = dataset.train
        self._sizes: dict[tuple[int, int], Any] = {tuple(dataset.train.images.shape[-2:]): dataset}

    def at(self, input_shape: tuple[int, int, int]) -> Any:
        from dataclasses import replace

        from searcher.data.load import Split, resize_images

        size = tuple(input_shape[1:])
        if size not in self._sizes:
            parts = {p: Split(resize_images(getattr(self.dataset, p).images, *size), getattr(self.dataset, p).labels)
                     for p in ("train", "val", "test")}
            self._sizes[size] = replace(self.dataset, **parts)
        return self._sizes[size]


@dataclass
class PreparedRun:
    """Everything a worker needs, built and checked before anything is written."""

    settings: SearchSettings
    space: Space
    budget: Budget
    train: Any  # TrainSettings
    data: RunData
    config: RunConfig
    folder: Path
    url: str


def prepare(settings: SearchSettings, budget: dict | None = None, train: dict | None = None) -> PreparedRun:
    """Check every input (space, budget, data, storage) and load the data; writes nothing.

    ``budget`` and ``train`` override keys of the space file's [budget] and [train] tables.
    """
    from searcher.data.load import load_dataset, load_split
    from searcher.core.train_settings import TrainSettings

    settings.check()
    space = load_space(settings.space)
    budget = space.budget.updated(budget or {}, prefix="--")
    train_settings = TrainSettings.from_dict({**space.train, **(train or {})}, file=space.file)
    folder = run_folder(settings.name, settings.root)
    largest = max(space.resolutions, key=lambda r: r[0] * r[1])
    split_file = folder / "split.npz"
    stored, known = load_split(split_file) if split_file.exists() else (None, None)
    dataset = load_dataset(settings.data, (space.channels, *largest), seed=settings.seed,
                           skip_unreadable=settings.skip_unreadable, split=stored, fingerprint=known, cache=folder)
    if dataset.skipped:
        log.warning("skipped %d unreadable image file(s) in %s", dataset.skipped, settings.data)
    _check_something_fits(space, budget, dataset.num_classes)
    config = RunConfig(
        space_name=space.name, space_text=Path(space.file).read_text(encoding="utf-8"),
        budget=asdict(budget), train=asdict(train_settings), data=settings.data,
        data_fingerprint=dataset.fingerprint, classes=dataset.num_classes, class_names=tuple(dataset.class_names),
        objective=settings.objective, seed=settings.seed,
    )
    url = storage_url(settings.storage, folder)
    return PreparedRun(settings, space, budget, train_settings, RunData(dataset), config, folder, url)


def _check_something_fits(space: Space, budget: Budget, classes: int) -> None:
    """Refuse a search in which nothing can fit, and say how far off the caps are."""
    from searcher.core.census_report import CensusSettings, run_census

    census = run_census(space, budget, CensusSettings(samples=20_000, exact_limit=50_000, classes=classes))
    if not census.fits.any():
        from searcher.core.budget import show_cost

        lowest = "; ".join(f"{c} ≥ {show_cost(c, census.lowest[c])} (cap {show_cost(c, v)})"
                           for c, v in budget.caps().items())
        raise SearcherError(f"no candidate of space {space.name!r} fits the budget: {lowest}; "
                            f"loosen the caps or allow smaller networks", file=space.file, key="budget")


def default_memory_cap(workers: int) -> int:
    """Half of this machine's available memory, shared among the workers."""
    try:
        with open("/proc/meminfo") as handle:
            info = {line.split(":")[0]: int(line.split()[1]) * 1024 for line in handle}
        available = info.get("MemAvailable", info["MemTotal"])
    except (OSError, KeyError, ValueError):
        available = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    return int(available * 0.5 / workers)


def search(settings: SearchSettings, budget: dict | None = None, train: dict | None = None) -> SearchOutcome:
    """Run (or continue) the search ``settings.name`` and write its results."""
    run = prepare(settings, budget, train)
    study, _ = open_study(settings.name, run.url, run.config, settings.sampler)
    from searcher.data.load import save_decoded, save_split

    run.folder.mkdir(parents=True, exist_ok=True)
    save_split(run.folder / "split.npz", run.data.dataset.indices, run.data.dataset.fingerprint)
    save_decoded(run.folder, run.data.dataset)  # resume and export read these bytes instead of decoding again
    write_atomic(run.folder / "run.json", json.dumps(
        {"settings": {k: str(v) if isinstance(v, Path) else v for k, v in asdict(settings).items()}
         | {"storage": redact(run.url)}, "config": run.config.to_dict()}, indent=2))
    started = time.time()
    deadline = None if settings.minutes is None else started + settings.minutes * 60
    log.info("run %s: space %s, budget %s, %d classes, data %s; storage %s", settings.name, run.space.name,
             run.budget.describe(), run.config.classes, settings.data, redact(run.url))
    if settings.workers == 1:
        tally = run_worker(run, study, deadline, index=0)
        stopped_by, status, proposals = tally.stopped_by, _status(tally.stopped_by), tally.proposals
    else:
        from searcher.study.processes import run_workers

        stopped_by, status, proposals = run_workers(run, deadline)
    return finish(run, study, stopped_by, status, proposals, time.time() - started)


def run_worker(run: PreparedRun, study: Any, deadline: float | None, index: int,
               threads: int | None = None, parent_pid: int | None = None) -> Any:
    """One worker's loop over the study, with progress lines on the log."""
    from searcher.study.worker import Search, WorkerPlan

    s = run.settings
    plan = WorkerPlan(
        trials=s.trials, deadline=deadline,
        candidate_seconds=None if s.candidate_minutes is None else s.candidate_minutes * 60,
        memory_cap=s.memory_cap or default_memory_cap(s.workers), threads=threads,
        log_path=run.folder / "search.log", seed=s.seed + index, parent_pid=parent_pid,
        run_folder=run.folder if _local_store(run.url) else None, flush=disk_flush(run.url),
    )
    worker = Search(study, run.space, run.budget, run.train, run.data, s.objective, plan)
    worker.on_proposal = _progress_printer(deadline, prefix=f"[worker {index}] " if s.workers > 1 else "")
    return worker.run()


def _local_store(url: str) -> bool:
    """A store in a file on this machine: every worker of its study runs here."""
    return storage_kind(url) in ("sqlite", "journal")


def _progress_printer(deadline: float | None, prefix: str):
    """A progress line after each trained candidate and every 25 rejections.

    The counts are the worker's running digest of the study (no extra read): its own trials at
    once, other workers' as of its last look.
    """
    started = time.time()
    seen = {"rejected": 0}

    def show(state: str, tally: Any, finished: Any) -> None:
        if state == "rejected":
            seen["rejected"] += 1
            if seen["rejected"] % 25:
                return
        c = finished.counts()
        recent = tally.proposals[-50:]
        share = sum(p == "rejected" for p in recent) / max(1, len(recent))
        elapsed = time.time() - started
        left = "" if deadline is None else f", {_clock(max(0.0, deadline - time.time()))} left"
        log.info("%stried %d: rejected %d (%.0f%% of the last %d), trained %d, stopped early %d, failed %d, "
                 "interrupted %d | best %s | %s elapsed%s", prefix, c["tried"], c["rejected"], 100 * share,
                 len(recent), c["trained"], c["stopped_early"], c["failed"], c["interrupted"],
                 "-" if math.isnan(finished.best) else f"{finished.best:.4f}", _clock(elapsed), left)

    return show


def _clock(seconds: float) -> str:
    minutes, secs = divmod(int(seconds), 60)
    hours, minutes = divmod(minutes, 60)
    return f"{hours}h{minutes:02d}m{secs:02d}s" if hours else f"{minutes}m{secs:02d}s"


def _status(stopped_by: str) -> int:
    """Exit status: 0 when the search ended normally, 128 + signal number when a signal stopped it."""
    for sig in (signal.SIGINT, signal.SIGTERM):
        if sig.name in stopped_by:
            return 128 + sig.value
    return 0


def finish(run: PreparedRun, study: Any, stopped_by: str, status: int, proposals: list[str],
           seconds: float) -> SearchOutcome:
    """Write trials.csv and report.html and sum the run up."""
    from searcher.results.records import counts, trials_frame
    from searcher.results.tables import best_row, write_results

    frame = trials_frame(study)
    write_results(run.folder, frame, run.budget, title=f"searcher run {run.settings.name}",
                  notes=[f"space {run.space.name}; data {run.settings.data}; objective {run.settings.objective}",
                         f"stopped: {stopped_by or 'done'}"])
    blocks = [proposals[i:i + 50] for i in range(0, len(proposals), 50)]
    share = [sum(p == "rejected" for p in b) / len(b) for b in blocks if b]
    return SearchOutcome(run.folder, counts(frame), best_row(frame, run.budget), stopped_by, status, share, seconds)
