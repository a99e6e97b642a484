"""Early stopping: successive halving among candidates of similar cost.

References: successive halving keeps the better share of the candidates at each rung (Jamieson and
Talwalkar, "Non-stochastic Best Arm Identification and Hyperparameter Optimization", AISTATS 2016);
Optuna's ``SuccessiveHalvingPruner`` implements it (asynchronously, as Li et al., MLSys 2020) and is
the outside reference for the rule at one rung and for where the rungs lie.
"""

from __future__ import annotations

import random

import optuna
import pytest

from searcher.study.early_stop import CostAwareHalving, keeps, nearest_in_cost, rung_epochs
from searcher.study.ledger import Ledger

optuna.logging.set_verbosity(optuna.logging.WARNING)


@pytest.mark.parametrize("epochs", range(1, 33))
def test_rungs_are_where_optunas_successive_halving_judges(epochs: int) -> None:
    """Optuna's pruner with min_resource = epochs // 2 and reduction factor 2 judges exactly at our rungs."""
    first = max(1, epochs // 2)
    pruner = optuna.pruners.SuccessiveHalvingPruner(min_resource=first, reduction_factor=2)
    study = optuna.create_study(direction="maximize", pruner=pruner)
    good = study.ask()
    for step in range(1, epochs + 1):
        good.report(1.0, step)
        good.should_prune()  # records the rung standing where it judges
    study.tell(good, 1.0)
    poor = study.ask()
    judged = set()
    for step in range(1, epochs + 1):
        poor.report(0.0, step)
        if poor.should_prune():
            judged.add(step)
    # the pruner stops a worse candidate at each of its rungs; ours leave out the last epoch (see below)
    assert rung_epochs(epochs) == {s for s in judged if s < epochs}


@pytest.mark.parametrize("seed", range(20))
def test_one_cost_neighbourhood_decides_as_optunas_pruner(seed: int) -> None:
    """With every candidate in one neighbourhood, our rule at the rung gives Optuna's pruner's decision,
    candidate by candidate, for random scores arriving in random order (ties included)."""
    rng = random.Random(seed)
    epochs, eta = 8, rng.choice([2, 3])
    pruner = optuna.pruners.SuccessiveHalvingPruner(min_resource=epochs // 2, reduction_factor=eta)
    study = optuna.create_study(direction="maximize", pruner=pruner)
    reached: list[tuple[float, float]] = []
    for _ in range(rng.randint(1, 25)):
        score = rng.choice([0.1, 0.2, 0.3, 0.4]) if rng.random() < 0.3 else rng.random()
        trial = study.ask()
        theirs = False
        for step in range(1, epochs // 2 + 1):
            trial.report(score, step)
            theirs = trial.should_prune()
        ours = CostAwareHalving(lambda rung: list(reached), 1000.0, epochs, eta=eta, neighbours=100)
        assert ours(epochs // 2 - 1, score) == theirs
        reached.append((1000.0, score))
        study.tell(trial, state=optuna.trial.TrialState.PRUNED) if theirs else study.tell(trial, score)


def test_half_of_a_synchronous_rung_continues() -> None:
    """Judged all at once, n candidates of equal cost keep ⌊n/2⌋ (Optuna's SuccessiveHalvingPruner rule)."""
    for n in range(2, 40):
        rng = random.Random(n)
        scores = [rng.random() for _ in range(n)]
        kept = sum(keeps(s, scores[:i] + scores[i + 1:]) for i, s in enumerate(scores))
        assert kept == n // 2


def test_cheap_candidates_are_judged_against_cheap_ones() -> None:
    """Six dear candidates score 0.9 at the rung and six cheap ones 0.5-0.7: a cheap candidate at 0.65 is
    in the better half of its cost neighbours and continues; judged against all twelve, it would stop."""
    dear = [(20_000.0 + 1000 * i, 0.9) for i in range(6)]
    cheap = [(2_000.0 + 100 * i, s) for i, s in enumerate([0.5, 0.55, 0.6, 0.62, 0.68, 0.7])]
    policy = CostAwareHalving(lambda rung: dear + cheap, 2_250.0, 12, neighbours=6)
    assert not policy(5, 0.65)
    assert policy(5, 0.52)  # in the worse half of the cheap ones
    assert not keeps(0.65, [s for _, s in dear + cheap])  # what plain halving would have done
    assert sorted(nearest_in_cost(2_250.0, dear + cheap, 3)) == [0.6, 0.62, 0.68]  # 2,200, 2,300 and 2,400


def test_only_rungs_are_judged_and_never_the_last_epoch() -> None:
    """Stopping after the last epoch saves nothing and would drop a complete result from the front."""
    reached = [(100.0, 0.9)] * 10
    asked = []
    policy = CostAwareHalving(lambda rung: asked.append(rung) or reached, 100.0, 6,
                              report=lambda score, rung: asked.append(("told", rung)))
    assert [policy(e, 0.0) for e in range(6)] == [False, False, True, False, False, False]
    assert asked == [("told", 3), 3]  # Optuna is told the score at the rung only


def test_the_ledger_gives_rung_scores_of_trained_and_stopped_candidates() -> None:
    ledger = Ledger()
    done = optuna.trial.TrialState.COMPLETE
    ledger.add(0, done, [0.9], {"arch": "a", "state": "trained", "params": 500, "history": [0.5, 0.7, 0.9]})
    ledger.add(1, optuna.trial.TrialState.PRUNED, None, {"arch": "b", "state": "stopped_early", "params": 50,
                                                         "history": [0.2, 0.3]})
    ledger.add(2, done, [0.1], {"arch": "c", "state": "rejected", "params": 9, "history": []})
    ledger.add(3, done, [0.9], {"arch": "a", "state": "trained", "params": 500, "history": [0.5, 0.7, 0.9],
                                "repeat_of": 0})
    assert sorted(ledger.reached(2, "params")) == [(50, 0.3), (500, 0.7)]
    assert ledger.reached(3, "params") == [(500, 0.9)]
