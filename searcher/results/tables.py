"""Results of a run on disk: trials.csv, the fronts, report.html; and the best candidate."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import pandas as pd

from searcher.core.budget import CAP_COLUMNS, Budget
from searcher.results.records import TRAINED, distinct_rows
from searcher.runs import write_atomic


def best_row(frame: pd.DataFrame, budget: Budget) -> dict[str, Any] | None:
    """The fully trained candidate with the best validation accuracy that meets every cap."""
    rows = distinct_rows(frame)
    rows = rows[(rows["state"] == TRAINED) & rows["val_accuracy"].notna()]
    for column, limit in budget.caps().items():
        rows = rows[rows[column] <= limit]
    if rows.empty:
        return None
    return rows.sort_values(["val_accuracy", "params"], ascending=[False, True]).iloc[0].to_dict()


def fronts(frame: pd.DataFrame, budget: Budget) -> pd.DataFrame:
    """The accuracy-vs-cost front for every cost, stacked, with a `cost` column naming it."""
    from searcher.results.pareto import front

    parts = []
    for column in CAP_COLUMNS:
        part = front(distinct_rows(frame), column, caps=budget.caps())
        parts.append(part.assign(cost=column))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def write_results(folder: Path, frame: pd.DataFrame, budget: Budget, *, title: str, notes: list[str]) -> list[Path]:
    """trials.csv, front.csv and report.html, each written whole or not at all."""
    from searcher.results.report import write_report

    folder.mkdir(parents=True, exist_ok=True)
    written = [write_atomic(folder / "trials.csv", frame.to_csv(index=False)),
               write_atomic(folder / "front.csv", fronts(frame, budget).to_csv(index=False))]
    notes = [f"budget: {budget.describe()}", *notes]
    written.append(write_report(frame, folder / "report.html", caps=budget.caps(), title=title, notes=notes))
    return written
