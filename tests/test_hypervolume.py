"""The hypervolume of an accuracy-against-cost front, checked against Optuna's own computation and a
brute-force count of grid cells."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.core.pareto import hypervolume, reference_cost


def optuna_share(accuracy: list[float], cost: list[float], chance: float, reference: float) -> float:
    """Optuna's private hypervolume (``optuna._hypervolume.compute_hypervolume``, Optuna 5.0): losses
    (cost, -accuracy) against the reference point (reference, -chance), divided by the square.

    Optuna refuses points beyond the reference point, so each point is first moved onto the square's
    edge (cost at most the reference, accuracy at least chance), where it dominates no area; NaN
    points are left out, as they dominate nothing."""
    from optuna._hypervolume import compute_hypervolume

    points = [(min(c, reference), -max(a, chance)) for a, c in zip(accuracy, cost) if not np.isnan(a) and not np.isnan(c)]
    losses = np.array(points, dtype=float).reshape(-1, 2)
    area = compute_hypervolume(losses, np.array([reference, -chance]))
    return area / (reference * (1 - chance))


def grid_share(accuracy: list[int], cost: list[int], chance: int, reference: int, steps: int) -> float:
    """Brute force from the definition on integer points: accuracy in steps of 1/``steps``, cost in units.

    A unit cell [x, x+1] × [y, y+1] is dominated when some point costs at most x and scores at least
    y + 1; the share is the count of such cells over the cells of the square."""
    covered = 0
    for x in range(reference):
        for y in range(chance, steps):
            covered += any(c <= x and a >= y + 1 for a, c in zip(accuracy, cost))
    return covered / (reference * (steps - chance))


def test_one_point_by_hand() -> None:
    # cost 2,500 of 10,000 at 0.8 over a chance of 0.2: 0.75 of the width times 0.75 of the height
    assert hypervolume([0.8], [2_500], chance=0.2, reference_cost=10_000) == pytest.approx(0.5625)


def test_nothing_above_chance_or_below_the_reference_is_zero() -> None:
    assert hypervolume([], [], chance=0.1, reference_cost=5) == 0.0
    assert hypervolume([0.1, 0.05, float("nan")], [1, 2, 3], chance=0.1, reference_cost=5) == 0.0
    assert hypervolume([0.9, 0.99], [5, 7], chance=0.1, reference_cost=5) == 0.0  # at or beyond the reference


def test_dominated_points_and_duplicates_change_nothing() -> None:
    front_only = hypervolume([0.6, 0.9], [100, 400], chance=0.125, reference_cost=1_000)
    with_more = hypervolume([0.6, 0.9, 0.5, 0.9, 0.6, 0.85], [100, 400, 300, 400, 100, 900], chance=0.125,
                            reference_cost=1_000)
    assert with_more == pytest.approx(front_only)


def test_bad_arguments_raise() -> None:
    with pytest.raises(ValueError):
        hypervolume([0.5], [1, 2], chance=0.1, reference_cost=3)
    with pytest.raises(ValueError):
        hypervolume([0.5], [1], chance=1.0, reference_cost=3)
    with pytest.raises(ValueError):
        hypervolume([0.5], [1], chance=0.1, reference_cost=0)


def test_reference_is_the_cap_else_the_largest_fitting_cost() -> None:
    assert reference_cost({"params": 32_000, "macs": 3e6}, "params", [10, 20]) == 32_000
    assert reference_cost({"macs": 3e6}, "params", [10, 30, 20]) == 30
    with pytest.raises(ValueError):
        reference_cost(None, "params", [])


accuracies = st.floats(min_value=0, max_value=1, allow_nan=False) | st.just(float("nan"))
costs = st.floats(min_value=0, max_value=2_000, allow_nan=False)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(accuracies, costs), max_size=12), st.sampled_from([0.0, 0.1, 0.125, 0.5]),
       st.sampled_from([500.0, 1_000.0, 1_500.0]))
def test_matches_optunas_hypervolume(points: list[tuple[float, float]], chance: float, reference: float) -> None:
    acc, cost = [p[0] for p in points], [p[1] for p in points]
    # source: optuna._hypervolume.compute_hypervolume (Optuna 5.0's private module, its 2-D sweep)
    assert hypervolume(acc, cost, chance=chance, reference_cost=reference) == pytest.approx(
        optuna_share(acc, cost, chance, reference), abs=1e-12)


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 10), st.integers(0, 14)), max_size=8), st.integers(0, 5),
       st.integers(1, 12))
def test_matches_a_brute_force_grid(points: list[tuple[int, int]], chance: int, reference: int) -> None:
    steps = 10  # accuracy in tenths
    acc, cost = [p[0] for p in points], [p[1] for p in points]
    share = hypervolume([a / steps for a in acc], cost, chance=chance / steps, reference_cost=reference)
    # source: the definition (the area of the union of dominated rectangles), counted cell by cell
    assert share == pytest.approx(grid_share(acc, cost, chance, reference, steps), abs=1e-12)
