"""Pareto front, feasibility and accuracy-per-doubling arithmetic."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.errors import SearcherError
from searcher.core.pareto import accuracy_per_doubling, check_caps, feasible_mask, pareto_mask
from searcher.results.fronts import front, front_steps


def brute_force_mask(accuracy: list[float], costs: list[list[float]]) -> list[bool]:
    """Dominance checked pair by pair from the definition, O(n^2)."""
    keep = []
    for i, (a_i, c_i) in enumerate(zip(accuracy, costs)):
        if math.isnan(a_i) or any(math.isnan(v) for v in c_i):
            keep.append(False)
            continue
        dominated = False
        for j, (a_j, c_j) in enumerate(zip(accuracy, costs)):
            if j == i or math.isnan(a_j) or any(math.isnan(v) for v in c_j):
                continue
            no_worse = a_j >= a_i and all(x <= y for x, y in zip(c_j, c_i))
            better = a_j > a_i or any(x < y for x, y in zip(c_j, c_i))
            dominated |= no_worse and better
        keep.append(not dominated)
    return keep


def test_small_front_by_hand() -> None:
    # cost 1 acc .5 is the cheapest; cost 2 acc .7 is better; cost 3 acc .6 is beaten by it.
    acc = [0.5, 0.7, 0.6, 0.9]
    cost = [1, 2, 3, 8]
    assert pareto_mask(acc, cost).tolist() == [True, True, False, True]


def test_equal_points_are_both_kept_and_ties_resolved() -> None:
    acc = [0.8, 0.8, 0.7, 0.8]
    cost = [5, 5, 5, 6]  # two equal best points; a worse one at the same cost; a dearer twin
    assert pareto_mask(acc, cost).tolist() == [True, True, False, False]


def test_nan_accuracy_is_never_on_front_and_dominates_nothing() -> None:
    acc = [float("nan"), 0.5]
    cost = [1, 10]
    assert pareto_mask(acc, cost).tolist() == [False, True]
    assert pareto_mask([float("nan")] * 3, [1, 2, 3]).tolist() == [False, False, False]
    assert pareto_mask([], []).tolist() == []


def test_two_costs_keep_a_point_cheap_in_either() -> None:
    acc = [0.8, 0.8, 0.8]
    costs = [[1, 9], [9, 1], [9, 9]]  # the third is beaten by both others
    assert pareto_mask(acc, costs).tolist() == [True, True, False]


def test_shape_mistakes_raise() -> None:
    with pytest.raises(ValueError):
        pareto_mask([0.1, 0.2], [1.0])


finite = st.floats(min_value=0, max_value=1, allow_nan=False)
# Few distinct values so ties and equal points come up often.
coarse = st.sampled_from([0.0, 0.25, 0.5, 0.75, 1.0, float("nan")])


@settings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(coarse | finite, st.sampled_from([1.0, 2.0, 3.0, float("nan")]) | finite), max_size=30))
def test_single_cost_matches_brute_force(points: list[tuple[float, float]]) -> None:
    acc = [p[0] for p in points]
    cost = [p[1] for p in points]
    assert pareto_mask(acc, cost).tolist() == brute_force_mask(acc, [[c] for c in cost])


@settings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(coarse, st.sampled_from([1.0, 2.0, 3.0]), st.sampled_from([1.0, 2.0])), max_size=30))
def test_several_costs_match_brute_force(points: list[tuple[float, float, float]]) -> None:
    acc = [p[0] for p in points]
    costs = [[p[1], p[2]] for p in points]
    got = pareto_mask(acc, np.array(costs).reshape(len(points), 2))
    assert got.tolist() == brute_force_mask(acc, costs)


def test_many_costs_in_several_blocks_match_brute_force() -> None:
    rng = np.random.default_rng(7)
    acc = rng.integers(0, 20, 600) / 20
    costs = rng.integers(1, 30, (600, 2)).astype(float)
    assert pareto_mask(acc, costs).tolist() == brute_force_mask(acc.tolist(), costs.tolist())


def test_accuracy_per_doubling() -> None:
    # From cost 100 to 400 is two doublings for +0.1 accuracy: 0.05 a doubling.
    gain = accuracy_per_doubling([0.6, 0.7, 0.7], [100, 400, 400])
    assert math.isnan(gain[0]) and gain[1] == pytest.approx(0.05) and math.isnan(gain[2])
    assert accuracy_per_doubling([0.5], [10]).shape == (1,)
    assert math.isnan(accuracy_per_doubling([0.5, 0.6], [0, 10])[1])


def test_no_rate_per_doubling_from_a_tiny_step() -> None:
    """Regression (a new user's report): +0.44 points for ×1.01 cost read as "+30 pts per 2× cost" (a
    3048-point rate from a smaller step); a step under a quarter more cost gives no rate at all."""
    gain = accuracy_per_doubling([0.90, 0.9044, 0.93], [10_000, 10_100, 12_626])
    assert math.isnan(gain[1])  # ×1.01
    assert gain[2] == pytest.approx((0.93 - 0.9044) / math.log2(12_626 / 10_100))  # ×1.25: a rate


def test_front_steps_compare_each_row_with_the_one_before() -> None:
    rows = pd.DataFrame({"val_accuracy": [0.5, 0.6, 0.9], "params": [100, 200, 800]}, index=[7, 3, 9])
    steps = front_steps(rows, "params")
    assert steps.index.tolist() == [7, 3, 9] and steps.iloc[0].isna().all()
    assert steps["accuracy_step"].iloc[1:].tolist() == pytest.approx([0.1, 0.3])
    assert steps["cost_ratio"].iloc[1:].tolist() == pytest.approx([2.0, 4.0])
    assert steps["accuracy_per_doubling"].iloc[1:].tolist() == pytest.approx([0.1, 0.15])  # 0.3 over 2 doublings


def make_table() -> pd.DataFrame:
    return pd.DataFrame(
        {
            "state": ["trained", "trained", "stopped_early", "rejected", "failed", "trained"],
            "val_accuracy": [0.60, 0.70, 0.75, float("nan"), float("nan"), 0.99],
            "params": [100, 200, 400, 50, 60, 5000],
            "macs": [1000, 3000, 2000, 10, 10, 9000],
            "peak_activation_bytes": [10, 10, 10, 10, 10, 10],
            "weight_bytes": [400, 800, 1600, 200, 240, 20000],
        }
    )


def test_front_keeps_scored_feasible_rows_sorted_by_cost() -> None:
    table = make_table()
    by_params = front(table, "params", caps={"params": 1000})
    # The 0.99 row breaks the params cap; rejected and failed rows have no accuracy.
    assert by_params.index.tolist() == [0, 1, 2]
    by_macs = front(table, "macs", caps={"params": 1000})
    assert by_macs.index.tolist() == [0, 2]  # row 1 costs more MACs than row 2 for less accuracy
    assert front(table, "params").index.tolist() == [0, 1, 2, 5]
    assert front(table, ["params", "macs"]).index.tolist() == [0, 1, 2, 5]
    assert front(table.iloc[:0], "params").empty


def test_cap_equal_to_cost_fits() -> None:
    table = make_table()
    assert feasible_mask(table, {"params": 200}).tolist() == [True, True, False, True, True, False]
    assert feasible_mask(table, {}).all() and feasible_mask(table, None).all()


@pytest.mark.parametrize(
    ("caps", "words"),
    [({"parms": 10}, "did you mean 'params'"), ({"macs": -1}, "positive"), ({"macs": "2M"}, "positive")],
)
def test_bad_caps_are_user_mistakes(caps: dict, words: str) -> None:
    with pytest.raises(SearcherError, match=words):
        check_caps(caps)


def test_unknown_cost_column_is_a_user_mistake() -> None:
    with pytest.raises(SearcherError, match="did you mean 'macs'"):
        front(make_table(), "mac")
