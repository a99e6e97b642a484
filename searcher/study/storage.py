"""The Optuna study behind a run: storage, sampler, and the run's fixed configuration.

A run is one study. Its configuration (space, budget, data, objective) is stored in the study
itself, so a resumed run or another machine on the same PostgreSQL study can check that it is
searching the same thing.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import os
import random
import re
import sqlite3
import time
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, TypeVar

import optuna
import sqlalchemy

from searcher.errors import SearcherError, one_of, shown
from searcher.redact import redact
from searcher.runs import RUNS, run_folder
from searcher.study.optuna_private import journal_lock, seed_draws

log = logging.getLogger(__name__)
T = TypeVar("T")

# objective name -> cost column minimised beside accuracy (None: accuracy alone)
OBJECTIVES = {"accuracy": None, "params": "params", "macs": "macs", "activation": "peak_activation_bytes"}
SAMPLERS = ("tpe", "nsga2", "random")


def storage_url(storage: str | None, folder: Path) -> str:
    """The storage to use: the given URL or path, else SQLite in the run folder."""
    return storage or f"sqlite:///{folder / 'study.db'}"


def storage_kind(url: str) -> str:
    """"journal", "sqlite" or "postgresql" for a storage the program can open; else a clear error.

    Cheap, so a search checks a mistyped ``--storage`` before it spends time loading the data.
    """
    if url.endswith(".journal") and "://" not in url:
        return "journal"
    if url.startswith("sqlite:///"):
        return "sqlite"
    if url.startswith(("postgresql://", "postgres://", "postgresql+")):
        return "postgresql"
    raise SearcherError(
        f"`--storage` {redact(url)!r} must be a sqlite:/// or postgresql:// URL or a path ending in .journal",
        key="--storage",
    )


def open_storage(url: str, *, create: bool = True) -> optuna.storages.BaseStorage:
    """An Optuna storage for a URL (sqlite:///, postgresql://) or a ``.journal`` file path.

    ``create=False`` is for commands that only read (status, report, export): a store file that
    does not exist is refused instead of created, and nothing is repaired or converted.
    """
    kind = storage_kind(url)
    if not create and kind in ("sqlite", "journal"):
        path = Path(url.removeprefix("sqlite:///"))
        if not path.is_file():
            raise SearcherError(f"the run's store {path} does not exist (give --storage for a run kept elsewhere)",
                                key="--storage")
    try:
        if kind == "journal":
            if create:
                Path(url).parent.mkdir(parents=True, exist_ok=True)
                repair_journal(Path(url))
            backend = optuna.storages.journal.JournalFileBackend(url)
            return optuna.storages.JournalStorage(backend)
        if kind == "sqlite":
            path = Path(url.removeprefix("sqlite:///"))
            if not create:  # mode=rw: SQLite opens the file only if it exists, never makes a new one
                return _rdb_storage(f"sqlite:///file:{path}?mode=rw&uri=true", {"connect_args": {"timeout": 120}})
            path.parent.mkdir(parents=True, exist_ok=True)
            _retried(lambda: _write_ahead_log(path))
            return _commit_without_waiting_for_disk(_rdb_storage(url, {"connect_args": {"timeout": 120}}))
        if url.startswith(("postgresql://", "postgres://")):
            url = "postgresql+psycopg://" + url.split("://", 1)[1]
        return _rdb_storage(url, {"pool_pre_ping": True, "pool_size": 2})
    except ImportError as exc:
        raise SearcherError(f"`--storage` {redact(url)} needs a driver: {exc}; install with `pip install -e .[postgres]`",
                            key="--storage") from None
    except Exception as exc:  # connection refused, bad credentials, unreadable file ...
        raise SearcherError(f"cannot open `--storage` {redact(url)}: {redact(_first_line(exc))}", key="--storage") from None


def _write_ahead_log(path: Path) -> None:
    """Put a SQLite file in WAL mode, which lets readers (status, report) not block writers.

    The mode is kept in the file, so only a new file needs it set. Two searches started at once on
    a new file both set it, and SQLite answers one of them "database is locked" at once, without
    waiting out the busy timeout: :func:`_retried` makes that one look again.
    """
    with contextlib.closing(sqlite3.connect(path, timeout=120)) as connection:
        if connection.execute("PRAGMA journal_mode").fetchone()[0].lower() != "wal":
            connection.execute("PRAGMA journal_mode=WAL")


def repair_journal(path: Path) -> int:
    """Cut the damaged end a power cut can leave on a journal file; the number of bytes cut.

    Optuna fsyncs each append, so only the last one can be incomplete: a torn line, or one the
    file system filled with zeros. Optuna's reader skips such a last line but refuses the file
    once anything is appended after it. The cut is made under the journal's own lock, the one
    every append holds, so no writer is half-way through a line meanwhile.
    """
    if not path.exists() or path.stat().st_size == 0:
        return 0
    lock = journal_lock(str(path))
    lock.acquire()
    try:
        data = path.read_bytes()
        keep = len(data)
        while keep > 0:
            start = data.rfind(b"\n", 0, keep - 1) + 1
            if data[keep - 1:keep] == b"\n" and _is_json(data[start:keep]):
                break
            keep = start
        if keep < len(data):
            with open(path, "r+b") as handle:
                handle.truncate(keep)
                os.fsync(handle.fileno())
            log.warning("%s: cut %d bytes of an incomplete last write (a power cut?); the rest is intact",
                        path, len(data) - keep)
        return len(data) - keep
    finally:
        lock.release()


def _is_json(line: bytes) -> bool:
    try:
        json.loads(line)
    except ValueError:  # UnicodeDecodeError and JSONDecodeError both are
        return False
    return True


def _commit_without_waiting_for_disk(storage: optuna.storages.RDBStorage) -> optuna.storages.RDBStorage:
    """SQLite's synchronous=NORMAL on every connection: a commit no longer waits for the disk.

    Optuna commits once per suggested parameter, about fifteen times per proposal; waiting for the
    disk each time was most of the search loop's storage cost. In WAL mode this setting cannot
    corrupt the file; a power cut can only drop the commits since the last flush to disk, and
    :func:`disk_flush` is called after every candidate that cost training time.
    """
    def relax(connection: Any, _record: Any) -> None:
        connection.execute("PRAGMA synchronous=NORMAL")

    sqlalchemy.event.listen(storage.engine, "connect", relax)
    storage.engine.dispose()  # the connections opened while creating the tables did not have it
    return storage


def disk_flush(url: str) -> Callable[[], None] | None:
    """For a SQLite store: a call that puts everything committed so far on disk (fsync of its WAL).

    None for other stores, which make each commit durable themselves.
    """
    if storage_kind(url) != "sqlite":
        return None
    wal = url.removeprefix("sqlite:///") + "-wal"

    def flush() -> None:
        try:
            descriptor = os.open(wal, os.O_RDONLY)
        except FileNotFoundError:  # checkpointed away: the database file itself holds everything
            return
        try:
            os.fsync(descriptor)
        finally:
            os.close(descriptor)

    return flush


# what opening a new store says when another process is setting up the same store at that moment
# (creating its tables, or switching a SQLite file to WAL mode)
_CREATION_RACE = re.compile(r"already exists|unique|duplicate|database is locked", re.IGNORECASE)


def _retried(action: Callable[[], T], attempts: int = 60) -> T:
    """``action()``, tried again after a moment while another process is setting up the same new store."""
    for attempt in range(attempts):
        try:
            return action()
        except Exception as exc:
            if attempt == attempts - 1 or not _CREATION_RACE.search(str(exc)):
                raise
            log.debug("another process is setting up the store (%s); retrying", _first_line(exc))
            time.sleep(0.02 + 0.06 * random.random())
    raise AssertionError("unreachable")


def _rdb_storage(url: str, engine_kwargs: dict[str, Any]) -> optuna.storages.RDBStorage:
    """An RDB storage, retried while another worker is creating the same fresh database's tables."""
    return _retried(lambda: optuna.storages.RDBStorage(url, engine_kwargs=engine_kwargs))


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]


@dataclass(frozen=True)
class RunConfig:
    """What a run searches; fixed for the life of its study."""

    space_name: str
    space_text: str  # the space file's text, so every worker searches the same space
    budget: dict[str, Any]  # Budget fields
    train: dict[str, Any]  # TrainSettings fields
    data: str  # "demo" or the path given
    data_fingerprint: str
    classes: int
    class_names: tuple[str, ...]
    objective: str  # a key of OBJECTIVES
    seed: int
    metric: str = "accuracy"  # the score ranked, pruned, fronted and exported by (runs before --metric: accuracy)

    def digest(self) -> str:
        return hashlib.sha256(json.dumps(self.__dict__, sort_keys=True, default=list).encode()).hexdigest()[:12]

    def to_dict(self) -> dict:
        return {**self.__dict__, "class_names": list(self.class_names)}

    @classmethod
    def from_dict(cls, data: dict) -> RunConfig:
        return cls(**{**data, "class_names": tuple(data["class_names"])})


def trial_seed(seed: int, number: int) -> int:
    """The seed of trial ``number`` in a run seeded ``seed``: its sampler draws and its training."""
    return (seed * 1_000_003 + number) % 2**32


class _SeededPerTrial:
    """Mixin: a sampler whose random draws for trial n come from (seed, n).

    With one seed per process, searches that share a study with the same ``--seed`` (separate
    commands, other machines) drew the same candidates in lockstep: trials 0 and 1 alike, 2 and 3
    alike, and so on. Seeding from the trial number keeps a lone search reproducible and makes
    every trial's draw its own.
    """

    _trial_seed: int = 0

    def before_trial(self, study: optuna.Study, trial: optuna.trial.FrozenTrial) -> None:
        seed_draws(self, trial_seed(self._trial_seed, trial.number))
        super().before_trial(study, trial)


class _TPE(_SeededPerTrial, optuna.samplers.TPESampler):
    pass


class _NSGAII(_SeededPerTrial, optuna.samplers.NSGAIISampler):
    pass


class _Random(_SeededPerTrial, optuna.samplers.RandomSampler):
    pass


def make_sampler(kind: str, objective: str, seed: int) -> optuna.samplers.BaseSampler:
    """TPE by default: it reads constraints, and constant_liar keeps workers apart."""
    if kind == "tpe":
        single = OBJECTIVES[objective] is None
        with warnings.catch_warnings():  # `group` is marked experimental; it suits our conditional space
            warnings.simplefilter("ignore", optuna.exceptions.ExperimentalWarning)
            sampler = _TPE(seed=seed, multivariate=single, group=single, constant_liar=True)
    elif kind == "nsga2":
        sampler = _NSGAII(seed=seed)
    elif kind == "random":
        sampler = _Random(seed=seed)
    else:
        raise SearcherError(f"`--sampler` must be {one_of(kind, SAMPLERS)}, got {kind!r}", key="--sampler")
    sampler._trial_seed = seed
    return sampler


def open_study(name: str, url: str, config: RunConfig | None, sampler: str = "tpe",
               worker: int = 0) -> tuple[optuna.Study, RunConfig]:
    """Create the run's study or load it; refuse to continue a study that searched something else.

    ``config`` None means read-only use (report, status, export): the stored one is returned, and a
    store that does not exist is refused rather than created.
    """
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    storage = open_storage(url, create=config is not None)
    existing = {s.study_name: s for s in optuna.get_all_study_summaries(storage)}
    # another worker may have created the study a moment ago and not yet stored its configuration
    stored_config = existing[name].user_attrs.get("config") if name in existing else None
    if config is None:
        if stored_config is None and name in existing:
            raise SearcherError(f"run {name!r} in {redact(url)} is just being created; try again in a moment",
                                key="--name")
        if name not in existing:
            found = ", ".join(sorted(existing)) or "none"
            raise SearcherError(f"no run {name!r} in {redact(url)} (runs there: {found})", key="--name")
        stored = RunConfig.from_dict(stored_config)
        study = optuna.load_study(study_name=name, storage=storage,
                                  sampler=make_sampler(sampler, stored.objective, stored.seed + worker))
        return study, stored
    directions = ["maximize"] + (["minimize"] if OBJECTIVES[config.objective] else [])
    if stored_config is not None:
        stored = RunConfig.from_dict(stored_config)
        if stored.digest() != config.digest():
            changes = "; ".join(config_changes(stored, config))
            raise SearcherError(
                f"run {name!r} was started with other settings ({changes}); continue it with the same "
                f"settings, or start a new run with another --name", key="--name")
    study = optuna.create_study(study_name=name, storage=storage, directions=directions, load_if_exists=True,
                                sampler=make_sampler(sampler, config.objective, config.seed + worker),
                                pruner=optuna.pruners.NopPruner())  # searcher.study.early_stop decides
    if stored_config is None:
        study.set_user_attr("config", config.to_dict())
    return study, config


def config_changes(old: RunConfig, new: RunConfig) -> list[str]:
    """What differs between a run's stored configuration and the one asked for, as 'key: old -> new'."""
    changes = []
    for key in old.__dict__:
        before, after = getattr(old, key), getattr(new, key)
        if before == after:
            continue
        if isinstance(before, dict):
            keys = sorted(set(before) | set(after), key=str)
            changes += [f"{key}.{k}: {before.get(k)!r} -> {after.get(k)!r}" for k in keys if before.get(k) != after.get(k)]
        elif key == "space_text":
            changes.append("the space file's text")
        else:
            changes.append(f"{key}: {shown(before)} -> {shown(after)}")
    return changes


def study_exists(name: str, url: str) -> bool:
    """Is there a study ``name`` in the store at ``url``? Never creates the store."""
    try:
        storage = open_storage(url, create=False)
    except SearcherError:
        return False
    return name in {s.study_name for s in optuna.get_all_study_summaries(storage)}


def open_run(name: str, storage: str | None = None, root: Path | None = None) -> tuple[Path, optuna.Study, RunConfig]:
    """A stored run for reading (report, status, export): its folder, study and configuration; writes nothing."""
    folder = run_folder(name, root or RUNS)
    if storage is not None:
        storage_kind(storage)  # an empty or mistyped --storage is refused, not taken for the default
    if storage is None and not (folder / "study.db").exists():
        raise SearcherError(f"no run {name!r}: {folder / 'study.db'} does not exist "
                            f"(give --storage for a run kept elsewhere)", key="--name")
    study, config = open_study(name, storage_url(storage, folder), None)
    return folder, study, config
