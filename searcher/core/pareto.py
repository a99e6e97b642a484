"""Pareto front arithmetic over the trials table: which candidates are worth keeping.

Accuracy is maximised and every cost is minimised. A point is on the front when no
other point is at least as accurate and at most as costly with one of those strictly
better. Pure numpy and pandas, so the report and the search can both use it cheaply.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from searcher.core.budget import LATENCY
from searcher.errors import SearcherError, one_of

# The analytic cost columns of the trials table, in the order the report shows them; with a target, the
# predicted latency (LATENCY) too.
COST_COLUMNS: tuple[str, ...] = ("params", "macs", "peak_activation_bytes", "weight_bytes")
COSTS = (*COST_COLUMNS, LATENCY)  # every cost a front or a cap may name


def present_costs(trials: pd.DataFrame) -> tuple[str, ...]:
    """The costs this table has: the four analytic ones, and the predicted latency when the run has a target."""
    timed = LATENCY in trials and trials[LATENCY].notna().any()
    return COST_COLUMNS + ((LATENCY,) if timed else ())


def pareto_mask(accuracy: Sequence[float] | np.ndarray, cost: Sequence[float] | np.ndarray) -> np.ndarray:
    """True for the points no other point dominates (maximise accuracy, minimise cost).

    ``cost`` is one value per point, or an (n, k) array of k costs per point. Equal
    points are both kept. A point with NaN accuracy or a NaN cost is never on the front
    and dominates nothing, so unfinished trials cannot hide finished ones.
    """
    acc = np.asarray(accuracy, dtype=float)
    costs = np.asarray(cost, dtype=float)
    if acc.ndim != 1:
        raise ValueError(f"accuracy must be one-dimensional, got shape {acc.shape}")
    if costs.ndim == 1:
        costs = costs[:, None]
    if costs.ndim != 2 or costs.shape[0] != acc.shape[0]:
        raise ValueError(f"cost must have {acc.shape[0]} rows, got shape {costs.shape}")
    valid = ~np.isnan(acc) & ~np.isnan(costs).any(axis=1)
    mask = np.zeros(acc.shape[0], dtype=bool)
    index = np.flatnonzero(valid)
    if index.size == 0:
        return mask
    if costs.shape[1] == 1:
        mask[index] = _front_one_cost(acc[index], costs[index, 0])
    else:
        mask[index] = _front_many_costs(np.column_stack([-acc[index], costs[index]]))
    return mask


def _front_one_cost(acc: np.ndarray, cost: np.ndarray) -> np.ndarray:
    """Sweep in order of cost: O(n log n) for the common single-cost case."""
    order = np.lexsort((-acc, cost))  # cheapest first, most accurate first within a cost
    a, c = acc[order], cost[order]
    positions = np.arange(a.size)
    starts = np.maximum.accumulate(np.where(np.r_[True, c[1:] != c[:-1]], positions, 0))
    best_so_far = np.maximum.accumulate(a)
    best_cheaper = np.where(starts > 0, best_so_far[np.maximum(starts - 1, 0)], -np.inf)
    on_front = (a == a[starts]) & (a > best_cheaper)
    result = np.empty_like(on_front)
    result[order] = on_front
    return result


def _front_many_costs(losses: np.ndarray, block: int = 256) -> np.ndarray:
    """Pairwise dominance in blocks, for fronts over several costs at once (all minimised)."""
    dominated = np.zeros(losses.shape[0], dtype=bool)
    for start in range(0, losses.shape[0], block):
        rows = losses[start : start + block, None, :]
        no_worse = (losses[None, :, :] <= rows).all(axis=2)
        better = (losses[None, :, :] < rows).any(axis=2)
        dominated[start : start + block] = (no_worse & better).any(axis=1)
    return ~dominated


def check_caps(caps: Mapping[str, float | None] | None) -> dict[str, float]:
    """The set caps as plain floats, after checking each names a cost and is positive."""
    checked: dict[str, float] = {}
    for key, limit in (caps or {}).items():
        if key not in COSTS:
            raise SearcherError(f"cap {key!r} is not a cost; a cap must be {one_of(key, COSTS)}", key=key)
        if limit is None:
            continue
        if isinstance(limit, bool) or not isinstance(limit, (int, float, np.number)) or not limit > 0:
            raise SearcherError(f"cap {key!r} must be a positive number, got {limit!r}", key=key)
        checked[key] = float(limit)
    return checked


def feasible_mask(trials: pd.DataFrame, caps: Mapping[str, float | None] | None) -> np.ndarray:
    """True for the rows whose costs meet every set cap (a cost equal to its cap fits)."""
    ok = np.ones(len(trials), dtype=bool)
    for key, limit in check_caps(caps).items():
        ok &= trials[key].to_numpy(dtype=float) <= limit
    return ok


MIN_RATE_RATIO = 1.25  # a step must raise the cost by a quarter (a third of a doubling) to give a rate per doubling


def accuracy_per_doubling(accuracy: Sequence[float] | np.ndarray, cost: Sequence[float] | np.ndarray) -> np.ndarray:
    """Accuracy gained per doubling of cost from each front point to the next.

    Element i compares point i with point i-1 of the front sorted by cost (element 0 is
    NaN): what each step up in budget buys. NaN where the cost does not grow or is not
    positive, since no doubling happens there, and where it grows by less than
    MIN_RATE_RATIO: a rate per doubling read off a small step is mostly noise blown up (a
    half-point step at ×1.01 cost reads as +30 points per doubling).
    """
    acc = np.asarray(accuracy, dtype=float)
    costs = np.asarray(cost, dtype=float)
    if acc.shape != costs.shape or acc.ndim != 1:
        raise ValueError(f"accuracy and cost must be matching 1-D arrays, got {acc.shape} and {costs.shape}")
    gain = np.full(acc.shape, np.nan)
    if acc.size < 2:
        return gain
    with np.errstate(divide="ignore", invalid="ignore"):
        doublings = np.log2(costs[1:] / costs[:-1])
        steps = np.diff(acc) / doublings
    usable = (costs[:-1] > 0) & (costs[1:] > 0) & (doublings >= np.log2(MIN_RATE_RATIO))
    gain[1:] = np.where(usable, steps, np.nan)
    return gain


def hypervolume(accuracy: Sequence[float] | np.ndarray, cost: Sequence[float] | np.ndarray, *,
                chance: float, reference_cost: float) -> float:
    """Share of the accuracy-against-cost square that a set of candidates dominates: one number for a front.

    The square runs from cost 0 to ``reference_cost`` and from accuracy ``chance`` to 1. A candidate of
    cost c and accuracy a dominates the rectangle [c, reference_cost] × [chance, a]: every budget from
    c up to the reference buys at least a. The union of those rectangles, as a share of the square, is
    the hypervolume: 1 would be a perfect classifier at no cost, 0 nothing better than guessing. It
    grows when the front is found cheaper or more accurate anywhere along it, so a search that
    starves the cheap end scores lower than one that covers it at the same best accuracy.

    The reference point, and why:

    * accuracy ``chance`` — the score of guessing (1 / classes for balanced classes; for imbalanced
      ones the majority class's share): a candidate no better than that buys nothing;
    * cost ``reference_cost`` — the budget's own cap on that cost (what the user said they can
      afford), or without a cap the largest cost among the space's fitting candidates
      (:func:`reference_cost`); a candidate at or beyond it adds nothing.

    Normalising by the square makes runs on one space and budget comparable whatever the units;
    across spaces or budgets the figures do not compare. Cost is on a linear scale, starting at
    zero. Points with NaN, at or below chance, or at or above the reference cost add nothing;
    callers drop candidates over any other cap first (:func:`feasible_mask`).

    >>> # 1,500 × 0.1 from cost 500 to 2,000, then 8,000 × 0.4 up to the reference: 3,350 of 10,000 × 0.5
    >>> round(hypervolume([0.9, 0.6], [2_000, 500], chance=0.5, reference_cost=10_000), 4)
    0.67
    """
    acc = np.asarray(accuracy, dtype=float)
    costs = np.asarray(cost, dtype=float)
    if acc.shape != costs.shape or acc.ndim != 1:
        raise ValueError(f"accuracy and cost must be matching 1-D arrays, got {acc.shape} and {costs.shape}")
    if not 0 <= chance < 1:
        raise ValueError(f"chance must be in [0, 1), got {chance}")
    if not reference_cost > 0:
        raise ValueError(f"reference_cost must be positive, got {reference_cost}")
    keep = np.isfinite(acc) & np.isfinite(costs) & (acc > chance) & (costs < reference_cost)
    order = np.argsort(costs[keep], kind="stable")
    a, c = np.minimum(acc[keep][order], 1.0), np.maximum(costs[keep][order], 0.0)
    best_up_to = np.maximum.accumulate(a) if a.size else a  # the best accuracy any budget from c[i] buys
    widths = np.diff(np.r_[c, reference_cost])  # zero within a run of equal costs: only its last counts
    return float(np.sum(widths * (best_up_to - chance)) / (reference_cost * (1 - chance)))


def reference_cost(caps: Mapping[str, float | None] | None, column: str, fitting_costs: Sequence[float] | np.ndarray) -> float:
    """The hypervolume's cost reference: the cap on ``column`` when the budget sets one, else the largest
    ``column`` among the space's fitting candidates (a census's costs where it fits)."""
    checked = check_caps(caps)
    if column in checked:
        return checked[column]
    values = np.asarray(fitting_costs, dtype=float)
    if values.size == 0:
        raise ValueError(f"no cap on {column!r} and no fitting candidates to take the largest {column} from")
    return float(values.max())
