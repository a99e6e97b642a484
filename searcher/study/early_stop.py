"""Stopping poor candidates between epochs: successive halving among candidates of similar cost.

Successive halving (Jamieson and Talwalkar, AISTATS 2016) judges candidates at a few epochs
("rungs") and keeps the better 1/η of those that reached each one. Judged against every candidate,
it is blind to cost: small networks learn more slowly in their first epochs, so at the rung they
trail larger ones and are stopped, while the default pick looks for the cheapest candidate as good
as the best. Seen on a 5,000-image set: every candidate under 5.3k parameters was stopped at epoch
6 of 12, and one of them, trained in full, beat the exported 9.6k-parameter net on held-out data.

So a candidate is judged only against its *cost neighbours*: the candidates that reached the same
rung whose cost (the run's objective cost, else parameters) is nearest to its own on a log scale.
It continues when its score is in the better ⌊n/η⌋ (at least one) of those n, itself included:
the rule of Optuna's SuccessiveHalvingPruner, which ``tests/test_pruning.py`` checks it against. Judging happens
as each candidate reaches the rung, against those that reached it before (the asynchronous form of
Li et al., "A System for Massively Parallel Hyperparameter Tuning", MLSys 2020), so workers never
wait for each other; with fewer than η peers a candidate continues. Every cost range keeps the same
share of full trainings, and the savings of halving stay: about half the candidates stop at the rung.

A policy is called after each epoch with (epoch index from 0, validation score) and answers
whether to stop. It is never asked after the last epoch: stopping a candidate that finished its
schedule saves nothing and would hide a complete result.
"""

from __future__ import annotations

import math
from typing import Callable, Protocol

ETA = 2  # reduction factor: the better half continues at each rung
NEIGHBOURS = 8  # a candidate is judged among this many candidates of nearest cost, itself included


class EarlyStop(Protocol):
    def __call__(self, epoch: int, score: float) -> bool:
        """True: stop this candidate now."""


def rung_epochs(epochs: int, eta: int = ETA) -> set[int]:
    """The epochs (counted from 1) after which candidates are judged: halfway, then ×η, the last left out.

    Earlier checks stop the wrong candidates: in the warm-up of a one-cycle schedule every
    candidate is still near chance. Measured on the digits benchmark (benchmarks/bench_search.py, 3
    seeds), a first check after epoch 2 keeping a third missed the plain loop's best on one seed;
    halfway keeping half reached it on all three, in 9–24% of the plain loop's time.
    """
    first = max(1, epochs // 2)
    rungs, rung = set(), first
    while rung < epochs:
        rungs.add(rung)
        rung *= eta
    return rungs


def keeps(score: float, peers: list[float], eta: int = ETA) -> bool:
    """Successive halving's rule at one rung: is ``score`` among the better ⌊n/η⌋ (at least one) of the n
    scores judged there, ``peers`` plus itself? Ties are kept."""
    ahead = sum(p > score for p in peers)
    return ahead < max(1, (len(peers) + 1) // eta)


def nearest_in_cost(cost: float, reached: list[tuple[float, float]], count: int) -> list[float]:
    """Scores of the ``count`` candidates whose cost is nearest to ``cost`` on a log scale.

    ``reached`` holds (cost, score) of every candidate judged at the rung before this one.
    """
    own = math.log(max(cost, 1.0))
    by_distance = sorted(reached, key=lambda pair: abs(math.log(max(pair[0], 1.0)) - own))
    return [score for _, score in by_distance[:count]]


class CostAwareHalving:
    """Successive halving among the candidate's cost neighbours (see the module docstring).

    ``reached(rung)`` gives (cost, score at that rung) of every candidate that reached it before,
    from the ledger, so no rung re-reads the study. ``report(score, rung)``, when given, tells Optuna
    the score at the rung (single-objective studies: TPE ranks stopped candidates by it).
    """

    def __init__(self, reached: Callable[[int], list[tuple[float, float]]], own_cost: float, epochs: int, *,
                 eta: int = ETA, neighbours: int = NEIGHBOURS,
                 report: Callable[[float, int], None] | None = None) -> None:
        self.reached, self.own_cost, self.rungs = reached, own_cost, rung_epochs(epochs, eta)
        self.eta, self.neighbours, self.report = eta, neighbours, report

    def __call__(self, epoch: int, score: float) -> bool:
        rung = epoch + 1
        if rung not in self.rungs:
            return False
        if self.report is not None:
            self.report(score, rung)
        peers = nearest_in_cost(self.own_cost, self.reached(rung), self.neighbours - 1)
        return not keeps(score if math.isfinite(score) else -math.inf, peers, self.eta)
