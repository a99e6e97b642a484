"""The fronts of a trials table: the scored candidates within the caps that no other beats, and what
each step along a front buys. Table-level: the arithmetic is searcher.core.pareto's."""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
import pandas as pd

from searcher.core.pareto import COSTS, accuracy_per_doubling, feasible_mask, pareto_mask
from searcher.errors import SearcherError, one_of
from searcher.run.records import SCORED


def front(
    trials: pd.DataFrame,
    cost_column: str | Sequence[str],
    *,
    caps: Mapping[str, float | None] | None = None,
    score: str = "val_accuracy",
) -> pd.DataFrame:
    """The scored, feasible rows on the score-vs-cost front, cheapest first (``score``: the column ranked).

    Only trained and stopped-early rows count, and only those meeting every cap:
    a candidate over budget is no answer however accurate. Several cost columns give
    the front over all of them at once (sorted by the first).
    """
    columns = [cost_column] if isinstance(cost_column, str) else list(cost_column)
    if not columns:
        raise SearcherError("a front needs at least one cost column, got none")
    for column in columns:
        if column not in COSTS:
            raise SearcherError(f"cost {column!r} is not a cost column; use {one_of(column, COSTS)}")
    scored = trials["state"].isin(SCORED).to_numpy() & feasible_mask(trials, caps)
    pool = trials[scored]
    on_front = pareto_mask(pool[score].to_numpy(dtype=float), pool[columns].to_numpy(dtype=float))
    chosen = pool[on_front]
    return chosen.sort_values([columns[0], score], ascending=[True, False], kind="stable")


def front_steps(front_rows: pd.DataFrame, cost_column: str, score: str = "val_accuracy") -> pd.DataFrame:
    """For each front row after the first: accuracy gained, cost multiplied, gain per doubling.

    ``front_rows`` is a front sorted by ``cost_column`` (what :func:`front` returns); the
    first row has NaN in every column, having no cheaper neighbour to compare with.
    """
    acc = front_rows[score].to_numpy(dtype=float)
    costs = front_rows[cost_column].to_numpy(dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = costs / np.r_[np.nan, costs[:-1]]
    return pd.DataFrame(
        {
            "accuracy_step": np.diff(acc, prepend=np.nan),
            "cost_ratio": ratio,
            "accuracy_per_doubling": accuracy_per_doubling(acc, costs),
        },
        index=front_rows.index,
    )
