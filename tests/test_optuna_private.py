"""The one module that touches Optuna's private parts: each use checked against Optuna's own behaviour,
so a change in Optuna fails here, loudly, instead of quietly changing what a search does."""

from __future__ import annotations

from pathlib import Path

import optuna
import pytest

from searcher.study.optuna_private import (
    OptunaChanged, journal_lock, seed_draws, set_trial_attr, trial_id,
)
from searcher.study.samplers import make_sampler

optuna.logging.set_verbosity(optuna.logging.WARNING)


def _first_draws(sampler: optuna.samplers.BaseSampler, value: int) -> list[dict]:
    """The first three trials' parameters when every draw of the sampler is seeded with ``value``."""
    study = optuna.create_study(sampler=sampler)
    draws = []
    for _ in range(3):
        seed_draws(sampler, value)
        trial = study.ask()
        draws.append({"a": trial.suggest_int("a", 0, 10**6), "b": trial.suggest_float("b", 0, 1)})
        study.tell(trial, 0.0)
    return draws


SAMPLERS = {"tpe": optuna.samplers.TPESampler, "nsga2": optuna.samplers.NSGAIISampler,
            "random": optuna.samplers.RandomSampler}


@pytest.mark.parametrize("kind", SAMPLERS)
def test_seeding_the_draws_decides_what_the_sampler_proposes(kind: str) -> None:
    # two samplers built with different seeds propose the same when their draws are re-seeded alike
    make = SAMPLERS[kind]
    assert _first_draws(make(seed=1), 42) == _first_draws(make(seed=2), 42)
    assert _first_draws(make(seed=1), 42) != _first_draws(make(seed=1), 43)


@pytest.mark.parametrize("kind", SAMPLERS)
def test_separate_searches_with_one_seed_draw_per_trial_not_in_lockstep(kind: str) -> None:
    """Our samplers seed each trial's draws from (seed, trial number): two studies with one seed agree
    trial by trial (reproducible), and successive trials of one study differ."""
    def draws() -> list[int]:
        study = optuna.create_study(sampler=make_sampler(kind, "accuracy", 7))
        found = []
        for _ in range(4):
            trial = study.ask()
            found.append(trial.suggest_int("a", 0, 10**6))
            study.tell(trial, 0.0)
        return found

    first = draws()
    assert first == draws() and len(set(first)) == len(first)


def test_seeding_a_sampler_without_the_expected_generator_fails_loudly() -> None:
    class Renamed(optuna.samplers.RandomSampler):  # as if a later Optuna kept its generator elsewhere
        def __init__(self) -> None:
            super().__init__(seed=0)
            self._generator = self.__dict__.pop("_rng")

    with pytest.raises(OptunaChanged, match="_rng"):
        seed_draws(Renamed(), 0)


def test_a_trials_attribute_is_set_through_its_id_from_a_frozen_copy() -> None:
    study = optuna.create_study()
    trial = study.ask()
    frozen = study.get_trials(deepcopy=False)[0]
    assert trial_id(trial) == trial_id(frozen)
    set_trial_attr(study, frozen, "heartbeat", 12.5)
    assert study.trials[0].user_attrs["heartbeat"] == 12.5
    study.tell(trial, 1.0)
    with pytest.raises(optuna.exceptions.UpdateFinishedTrialError):  # what recovery expects of a finished trial
        set_trial_attr(study, frozen, "heartbeat", 13.0)


def test_our_journal_lock_is_the_lock_the_journal_backend_takes(tmp_path: Path) -> None:
    path = str(tmp_path / "study.journal")
    backend = optuna.storages.journal.JournalFileBackend(path)
    ours = journal_lock(path)
    assert type(ours) is type(backend._lock) and ours._lock_file == backend._lock._lock_file
    ours.acquire()
    try:  # held by us, the backend's lock cannot be taken: the same lock file
        assert Path(ours._lock_file).is_symlink()
    finally:
        ours.release()
    assert not Path(ours._lock_file).exists()
