"""Optuna's samplers as a run uses them: seeded per trial, so every trial's draw is its own and a lone
search repeats exactly."""

from __future__ import annotations

import warnings

import optuna

from searcher.errors import SearcherError, one_of
from searcher.run.config import OBJECTIVES
from searcher.study.optuna_private import seed_draws


SAMPLERS = ("tpe", "nsga2", "random")


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
