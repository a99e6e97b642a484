"""Early stopping of poor candidates: when the pruner judges, and what it may never stop.

Reference: successive halving keeps the better 1/reduction_factor of the candidates at each rung
(Jamieson and Talwalkar, "Non-stochastic Best Arm Identification and Hyperparameter
Optimization", AISTATS 2016); Optuna's SuccessiveHalvingPruner implements it.
"""

from __future__ import annotations

from pathlib import Path

import optuna
import pytest

from searchkit import memory_worker
from searcher.study.storage import make_pruner, pruning_epochs


def _study() -> optuna.Study:
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    return optuna.create_study(direction="maximize", pruner=make_pruner(6),
                               sampler=optuna.samplers.RandomSampler(seed=0))


def _peer(study: optuna.Study, on_epoch_of, history: list[float]) -> None:
    """A candidate that goes through every epoch (not stopped) and is told its last accuracy."""
    trial = study.ask()
    on_epoch = on_epoch_of(trial)
    for epoch, accuracy in enumerate(history):
        on_epoch(epoch, accuracy)
    study.tell(trial, history[-1])


def test_judged_halfway_only_and_stopped_when_in_the_worse_half(tmp_path: Path) -> None:
    study = _study()
    worker = memory_worker(tmp_path, study=study, epochs=6)
    on_epoch_of = lambda trial: worker._on_epoch(trial, {})  # noqa: E731
    _peer(study, on_epoch_of, [0.3, 0.5, 0.8, 0.8, 0.8, 0.8])
    _peer(study, on_epoch_of, [0.3, 0.5, 0.9, 0.9, 0.9, 0.9])
    assert [t.intermediate_values for t in study.trials] == [{3: 0.8}, {3: 0.9}]  # one report each, at epoch 3

    poor = study.ask()
    on_epoch = on_epoch_of(poor)
    on_epoch(0, 0.1)
    on_epoch(1, 0.1)  # before the halfway point nothing is judged
    with pytest.raises(optuna.TrialPruned):  # 0.1 is in the worse half of (0.8, 0.9, 0.1) at epoch 3
        on_epoch(2, 0.1)


def test_a_candidate_that_finished_its_schedule_is_never_stopped(tmp_path: Path) -> None:
    """Stopping after the last epoch saves nothing and would drop a complete result from the front."""
    study = _study()
    worker = memory_worker(tmp_path, study=study, epochs=6)
    on_epoch_of = lambda trial: worker._on_epoch(trial, {})  # noqa: E731
    _peer(study, on_epoch_of, [0.5, 0.6, 0.7, 0.8, 0.9, 0.95])
    late = study.ask()
    on_epoch = on_epoch_of(late)
    for epoch, accuracy in enumerate([0.3, 0.5, 0.71, 0.6, 0.4, 0.0]):  # kept at epoch 3, then falls to 0
        on_epoch(epoch, accuracy)  # raises nothing, even at the last epoch


@pytest.mark.parametrize("epochs", range(1, 33))
def test_judging_epochs_are_the_pruners_rungs_before_the_last_epoch(epochs: int) -> None:
    # rungs of successive halving: min_resource * reduction_factor**k (Optuna's SuccessiveHalvingPruner docs)
    pruner = make_pruner(epochs)
    rungs = {pruner._min_resource * pruner._reduction_factor**k for k in range(8)}
    assert pruning_epochs(epochs) == {r for r in rungs if r < epochs}
