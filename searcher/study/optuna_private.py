"""Every use of Optuna's private parts, in one place, each checked by ``tests/test_optuna_private.py``.

Optuna offers no public way to do these three things, and each matters:

* seed a sampler's random draws per trial, so separate processes that share a study with one
  ``--seed`` do not draw the same candidates in lockstep;
* write a user attribute on a trial by its id, from a thread that holds no ``Trial`` object
  (the heartbeat) or for a trial another process left running (recovery);
* hold the lock a journal file's writers hold, to repair a power cut's torn last line.

Nothing here swallows errors: if a future Optuna renames what these rely on, they raise
``OptunaChanged`` and the tests fail, instead of the search quietly doing the wrong thing.
The supported range is pinned in pyproject.toml (``optuna>=5.0,<6``).
"""

from __future__ import annotations

from typing import Any

import optuna


class OptunaChanged(RuntimeError):
    """An Optuna internal this module relies on is not where it was; a bug to fix here, not user input."""


def seed_draws(sampler: optuna.samplers.BaseSampler, value: int) -> None:
    """Re-seed the generators behind ``sampler``'s random draws (and its inner random sampler's).

    TPE, NSGA-II and the random sampler keep a ``LazyRandomState`` in ``_rng``; TPE and NSGA-II
    also hold a ``RandomSampler`` in ``_random_sampler`` for their start-up draws.
    """
    inner = getattr(sampler, "_random_sampler", None)
    for owner in (sampler, inner) if inner is not None else (sampler,):
        state = getattr(owner, "_rng", None)
        if state is None or not hasattr(state, "rng"):
            raise OptunaChanged(f"{type(owner).__name__} keeps no `_rng.rng` generator any more; "
                                "searcher.study.optuna_private.seed_draws needs updating")
        state.rng.seed(value)


def trial_id(trial: optuna.Trial | optuna.trial.FrozenTrial) -> int:
    """The storage's id of a trial (not its number within the study)."""
    try:
        return trial._trial_id
    except AttributeError:
        raise OptunaChanged(f"{type(trial).__name__} has no `_trial_id` any more") from None


def set_trial_attr(study: optuna.Study, trial: optuna.Trial | optuna.trial.FrozenTrial, key: str,
                   value: Any) -> None:
    """Set a user attribute on any trial of ``study``, whether or not this process asked for it."""
    storage = getattr(study, "_storage", None)
    if storage is None:
        raise OptunaChanged("optuna.Study has no `_storage` any more")
    storage.set_trial_user_attr(trial_id(trial), key, value)


def journal_lock(path: str) -> optuna.storages.journal.BaseJournalFileLock:
    """The lock that ``JournalFileBackend(path)`` takes around every append (its default lock)."""
    return optuna.storages.journal.JournalFileSymlinkLock(path)


def queued_params(trial: optuna.Trial | optuna.trial.FrozenTrial) -> dict[str, Any] | None:
    """The parameters a trial was queued with (``study.enqueue_trial``), or None for a sampled trial.

    Optuna keeps them in the trial's system attribute ``fixed_params``; a live ``Trial`` shows them
    through its cached frozen copy.
    """
    frozen = trial if isinstance(trial, optuna.trial.FrozenTrial) else getattr(trial, "_cached_frozen_trial", None)
    if frozen is None:
        raise OptunaChanged("optuna.Trial keeps no `_cached_frozen_trial` any more")
    return frozen.system_attrs.get("fixed_params")
