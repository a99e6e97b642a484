"""Early stopping of poor candidates: when the pruner judges, and what it may never stop.

Reference: successive halving keeps the better 1/reduction_factor of the candidates at each rung
(Jamieson and Talwalkar, "Non-stochastic Best Arm Identification and Hyperparameter
Optimization", AISTATS 2016); Optuna's SuccessiveHalvingPruner implements it.
"""

from __future__ import annotations

import optuna
import pytest

from searcher.study.early_stop import Dominance, Halving, make_pruner, pruning_epochs


def _study() -> optuna.Study:
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    return optuna.create_study(direction="maximize", pruner=make_pruner(6),
                               sampler=optuna.samplers.RandomSampler(seed=0))


def _peer(study: optuna.Study, history: list[float]) -> None:
    """A candidate that goes through every epoch (never stopped) and is told its last accuracy."""
    trial = study.ask()
    policy = Halving(trial, 6)
    assert not any(policy(epoch, accuracy) for epoch, accuracy in enumerate(history))
    study.tell(trial, history[-1])


def test_judged_halfway_only_and_stopped_when_in_the_worse_half() -> None:
    study = _study()
    _peer(study, [0.3, 0.5, 0.8, 0.8, 0.8, 0.8])
    _peer(study, [0.3, 0.5, 0.9, 0.9, 0.9, 0.9])
    assert [t.intermediate_values for t in study.trials] == [{3: 0.8}, {3: 0.9}]  # one report each, at epoch 3

    policy = Halving(study.ask(), 6)
    assert not policy(0, 0.1) and not policy(1, 0.1)  # before the halfway point nothing is judged
    assert policy(2, 0.1)  # 0.1 is in the worse half of (0.8, 0.9, 0.1) at epoch 3


def test_a_candidate_that_finished_its_schedule_is_never_stopped() -> None:
    """Stopping after the last epoch saves nothing and would drop a complete result from the front."""
    study = _study()
    _peer(study, [0.5, 0.6, 0.7, 0.8, 0.9, 0.95])
    policy = Halving(study.ask(), 6)
    for epoch, accuracy in enumerate([0.3, 0.5, 0.71, 0.6, 0.4, 0.0]):  # kept at epoch 3, then falls to 0
        assert not policy(epoch, accuracy)  # not stopped, even at the last epoch


def test_dominance_stops_only_behind_a_no_costlier_finished_candidate() -> None:
    """Two-objective early stop: some finished candidate costing no more was ahead by the margin."""
    finished = {100: (0.5, 0.8, 0.9), 300: (0.7, 0.95, 0.97)}  # cost -> per-epoch accuracy

    def histories(limit: float) -> list[tuple[float, ...]]:
        return [h for cost, h in finished.items() if cost <= limit]

    cheap = Dominance(histories, own_cost=100, epochs=3)
    assert cheap(1, 0.7)  # the cheap peer had 0.8 at this epoch: ahead by more than 0.02
    assert not cheap(1, 0.79)  # ahead by less than the margin
    dear = Dominance(histories, own_cost=300, epochs=3)
    assert dear(1, 0.9) and not dear(1, 0.94)  # the dearer peer (0.95) counts too; 0.94 is within the margin
    assert not dear(2, 0.0)  # the last epoch is never judged


@pytest.mark.parametrize("epochs", range(1, 33))
def test_judging_epochs_are_the_pruners_rungs_before_the_last_epoch(epochs: int) -> None:
    # rungs of successive halving: min_resource * reduction_factor**k (Optuna's SuccessiveHalvingPruner docs)
    first = max(1, epochs // 2)  # the min_resource make_pruner passes
    rungs = {first * 2**k for k in range(8)}  # reduction_factor 2
    assert isinstance(make_pruner(epochs), optuna.pruners.SuccessiveHalvingPruner)
    assert pruning_epochs(epochs) == {r for r in rungs if r < epochs}
