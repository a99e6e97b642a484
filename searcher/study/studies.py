"""A run's study in its store: created with the run's configuration, or opened and checked against it;
read back by every later command on the run."""

from __future__ import annotations

import os
from pathlib import Path

import optuna

from searcher.errors import SearcherError
from searcher.redact import redact
from searcher.run.config import OBJECTIVES, RunConfig, config_changes
from searcher.run.folders import RUNS, run_folder, why_unwritable
from searcher.study.samplers import make_sampler
from searcher.study.stores import NoStore, open_storage, storage_kind, storage_url


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


def study_exists(name: str, url: str) -> bool:
    """Is there a study ``name`` in the store at ``url``? Never creates the store."""
    try:
        storage = open_storage(url, create=False)
    except NoStore:
        return False
    return name in {s.study_name for s in optuna.get_all_study_summaries(storage)}


def stored_config(name: str, url: str) -> RunConfig | None:
    """The configuration run ``name`` was started with, None before it exists; never creates the store.

    What a run was started with (its data, ``--skip-unreadable``) is read from here by every later
    command on it, so that a resumed search or an export reads the data as the search did.
    """
    try:
        storage = open_storage(url, create=False)
    except NoStore:
        return None
    found = {s.study_name: s for s in optuna.get_all_study_summaries(storage)}
    stored = found[name].user_attrs.get("config") if name in found else None
    return None if stored is None else RunConfig.from_dict(stored)


def open_run(name: str, storage: str | None = None, root: Path | None = None) -> tuple[Path, optuna.Study, RunConfig]:
    """A stored run for reading (report, status, export): its folder, study and configuration; writes nothing."""
    folder = run_folder(name, root or RUNS)
    if storage is not None:
        storage_kind(storage)  # an empty or mistyped --storage is refused, not taken for the default
    if storage is None and not os.path.lexists(folder / "study.db"):
        why = why_unwritable(folder)
        raise SearcherError(f"no run {name!r}: {folder / 'study.db'} does not exist"
                            + (f" ({why})" if why and "read-only" not in why else "")
                            + " (give --storage for a run kept elsewhere)", key="--name")
    study, config = open_study(name, storage_url(storage, folder), None)
    return folder, study, config
