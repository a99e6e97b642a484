"""A search run made ready: its settings, every input checked, the data loaded; nothing written yet.

:func:`searcher.study.search_run.run_search` runs what :func:`prepare` returns; each worker process
prepares the same way, so every worker checks and sees the same space, budget and data.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
from dataclasses import asdict, dataclass, replace
from pathlib import Path

from searcher.core.budget import CAP_KEYS, Budget, show_cost
from searcher.core.census_report import Census, CensusSettings, run_census
from searcher.core.cost import cost
from searcher.core.latency import parse_target
from searcher.core.space import Space
from searcher.core.space_file import load_space, read_space_text
from searcher.core.train_settings import TrainSettings
from searcher.data.load import (
    DataChanged, Dataset, check_source, Split, describe_data, describe_few_examples, few_examples, load_dataset,
    load_split, resize_images,
)
from searcher.errors import SearcherError, check_int, check_number, one_of, shown, spelled
from searcher.files import read_regular
from searcher.limits import (MAX_CAP, MAX_MINUTES, MAX_SEED, MAX_SPACE_FILE_BYTES, MAX_TRIALS, MAX_WORKERS,
                             available_memory)
from searcher.run.config import ConfirmSettings
from searcher.run.records import METRICS
from searcher.run.folders import RUNS, check_run_paths, run_folder
from searcher.run.config import OBJECTIVES, RunConfig
from searcher.study.samplers import SAMPLERS
from searcher.study.stores import storage_kind, storage_url
from searcher.study.studies import stored_config

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class SearchSettings:
    """One search run; every field has a command-line option of the same name."""

    name: str  # run folder runs/<name>/ and study name
    space: str  # space file path
    data: str = "demo"  # "demo", an .npz file, or a folder of class sub-folders
    trials: int = 30  # candidates to train over the study's life (resuming counts what is done)
    minutes: float | None = None  # wall-clock limit for this invocation
    objective: str = "params"  # the score against params (default) | macs | activation, or the score alone ("accuracy")
    metric: str = "accuracy"  # the score: accuracy, or balanced_accuracy (mean recall per class) for rare classes
    sampler: str = "tpe"  # tpe | nsga2 | random
    storage: str | None = None  # Optuna storage URL or .journal path; default SQLite in the run folder
    workers: int = 1  # worker processes on this machine
    seed: int = 0  # data split, sampler and per-candidate training seeds
    candidate_minutes: float | None = None  # per-candidate training limit
    memory_cap: int | None = None  # bytes for the training-memory guard; default half of free RAM
    skip_unreadable: bool = False  # skip (and count) images that cannot be decoded
    force: bool = False  # start afresh where the run's results exist but its study is gone (old files kept aside)
    confirm: ConfirmSettings = ConfirmSettings()  # retraining the front over several seeds once the proxy search ends
    target: str | None = None  # core@clock the latency is predicted on (cortex-m4@80MHz); overrides the space's [target]
    root: Path = RUNS  # where run folders live

    def check(self) -> None:
        """Refuse a bad option before anything is read or written, naming it as typed (``--trials``)."""
        if self.objective not in OBJECTIVES:
            raise SearcherError(f"`--objective` must be {one_of(self.objective, tuple(OBJECTIVES))}, "
                                f"got {shown(self.objective)}", key="--objective")
        if self.metric not in METRICS:
            raise SearcherError(f"`--metric` must be {one_of(self.metric, tuple(METRICS))}, got {shown(self.metric)}",
                                key="--metric")
        if self.sampler not in SAMPLERS:
            raise SearcherError(f"`--sampler` must be {one_of(self.sampler, SAMPLERS)}, got {shown(self.sampler)}",
                                key="--sampler")
        check_int(self.trials, "--trials", 1, MAX_TRIALS)
        check_int(self.workers, "--workers", 1, MAX_WORKERS, why="each worker is a process holding the data")
        check_int(self.seed, "--seed", 0, MAX_SEED)
        for key, value in (("--minutes", self.minutes), ("--candidate-minutes", self.candidate_minutes)):
            if value is not None:
                check_number(value, key, 0, MAX_MINUTES, low_open=True)
        if self.memory_cap is not None:
            check_int(self.memory_cap, "--max-train-memory", 1, MAX_CAP)
        if self.storage is not None:
            storage_kind(self.storage)
        self.confirm.check()
        if self.target is not None:
            parse_target(self.target, "--target")
        check_source(self.data)
        cores = os.cpu_count() or 1
        if self.workers > cores and multiprocessing.parent_process() is None:  # once, not again in each worker
            log.warning("--workers %d is more than this machine's %d CPU cores: the workers will share cores, "
                        "and each candidate trains slower", self.workers, cores)


class RunData:
    """The run's data at the largest input size, resized once per other size a candidate asks for."""

    def __init__(self, dataset: Dataset) -> None:
        self.dataset = dataset
        self.num_classes = dataset.num_classes
        self.train = dataset.train
        self._sizes: dict[tuple[int, int], Dataset] = {tuple(dataset.train.images.shape[-2:]): dataset}

    def at(self, input_shape: tuple[int, int, int]) -> Dataset:
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
    train: TrainSettings
    data: RunData
    config: RunConfig
    folder: Path
    url: str
    least_macs: int | None = None  # MACs of the space's cheapest candidate within the caps (from the census)


def prepare(settings: SearchSettings, budget: dict | None = None, train: dict | None = None) -> PreparedRun:
    """Check every input (space, budget, data, storage) and load the data; writes nothing.

    ``budget`` and ``train`` override keys of the space file's [budget] and [train] tables.
    """
    settings.check()
    space = load_space(settings.space)
    budget_overrides = budget
    budget = space.budget.updated(budget or {}, prefix="--")
    budget = budget.targeted(None if settings.target is None else parse_target(settings.target, "--target"))
    budget.check_target("--max-latency")
    TrainSettings.from_dict(train or {}, prefix="--")  # an override's mistake is the option's, not the file's
    train_settings = TrainSettings.from_dict({**space.train, **(train or {})}, file=space.file)
    folder = run_folder(settings.name, settings.root)
    check_run_paths(folder)  # before the data is loaded: a folder that cannot take the run costs no waiting
    _check_memory_cap(settings.memory_cap, space, train_settings.batch_size)
    url = storage_url(settings.storage, folder)
    started = stored_config(settings.name, url)  # what the run was started with, if it was
    skip_unreadable = settings.skip_unreadable or (started is not None and started.skip_unreadable)
    split_file = folder / "split.npz"
    stored, known = load_split(split_file) if split_file.exists() else (None, None)
    try:
        dataset = load_dataset(settings.data, space.data_shape, seed=settings.seed, skip_unreadable=skip_unreadable,
                               split=stored, fingerprint=known, cache=folder)
    except DataChanged as exc:
        raise _changed(settings, started, stored, space, exc) from None
    if dataset.skipped:
        log.warning("skipped %d unreadable image file(s) in %s", dataset.skipped, settings.data)
    if found := few_examples(dataset):
        log.warning("%s", describe_few_examples(found))
    census = _check_something_fits(space, budget, dataset.num_classes, given=budget_given(budget_overrides or {}))
    config = RunConfig(
        space_name=space.name, space_text=_text_of(space),
        budget=asdict(budget), train=asdict(train_settings), data=settings.data,
        data_fingerprint=dataset.fingerprint, classes=dataset.num_classes, class_names=tuple(dataset.class_names),
        objective=settings.objective, seed=settings.seed, metric=settings.metric, skip_unreadable=skip_unreadable,
    )
    return PreparedRun(settings, space, budget, train_settings, RunData(dataset), config, folder, url,
                       cost(census.cheapest).macs)


def _text_of(space: Space) -> str:
    """The space file's text as stored with the run (a byte-order mark kept, as runs before kept it)."""
    return read_regular(space.file, MAX_SPACE_FILE_BYTES, "space file").decode("utf-8")


def _changed(settings: SearchSettings, started: RunConfig | None, split: dict | None, space: Space,
             exc: DataChanged) -> SearcherError:
    """A resumed run whose data is not the data it searched: what it was and what it is now, in words."""
    if started is None or split is None:
        return exc
    before = describe_data(sum(len(i) for i in split.values()), started.classes,
                           read_space_text(started.space_text, "<stored space>").data_shape)
    source = f"--data {shown(settings.data)}" + (" (the same path)" if settings.data == started.data else "")
    space_note = "" if started.space_text == _text_of(space) else "; the space file changed too"
    return SearcherError(f"run {settings.name!r} was started on {shown(started.data)}: {before}; {source} now gives "
                         f"{exc.now}{space_note}. Continue the run with the data it searched, or start a new run with "
                         "another --name", key="--data")


def budget_given(overrides: dict) -> dict[str, str]:
    """Cost column -> the command-line option that set its cap, for messages about caps."""
    return {CAP_KEYS[k][1]: spelled("--", k) for k, v in overrides.items() if k in CAP_KEYS and v is not None}


def _check_memory_cap(cap: int | None, space: Space, batch_size: int) -> None:
    """Refuse a --max-train-memory below what any candidate's training takes: its input batch alone, in fp32.

    Otherwise every proposal would be rejected, and the search would end saying the space looks exhausted."""
    if cap is None:
        return
    smallest = min(h * w for h, w in space.resolutions)
    floor = 4 * batch_size * space.channels * smallest
    if cap < floor:
        raise SearcherError(f"`--max-train-memory` {show_cost('training_bytes', cap)} is less than training any "
                            f"candidate takes: its batch of {batch_size} input images alone holds "
                            f"{show_cost('training_bytes', floor)} in fp32; give more (the default is half of this "
                            "machine's free memory), or a smaller --batch-size", key="--max-train-memory")


def _check_something_fits(space: Space, budget: Budget, classes: int, given: dict[str, str] | None = None) -> Census:
    """Refuse a search in which nothing can fit, and say how far off the caps are (naming the option that set
    a cap, when one did: ``given`` maps cost columns to options); the census otherwise."""
    given = given or {}
    census = run_census(space, budget, CensusSettings(samples=20_000, exact_limit=50_000, classes=classes))
    if not census.fits.any():
        lowest = "; ".join(f"{c} ≥ {show_cost(c, census.lowest[c])} (cap {show_cost(c, v)}"
                           + (f", from {given[c]})" if c in given else ")") for c, v in budget.caps().items())
        options = " ".join(sorted(given.values()))
        raise SearcherError(f"no candidate of space {space.name!r} fits the budget: {lowest}; "
                            f"loosen the caps" + (f" ({options})" if options else "") + " or allow smaller networks",
                            file=space.file, key=next(iter(given.values()), "budget"))
    return census


def default_memory_cap(workers: int) -> int:
    """Half of this machine's available memory, shared among the workers."""
    return int(available_memory() * 0.5 / workers)
