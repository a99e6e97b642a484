"""Results of a run on disk: trials.csv, front.csv and report.html."""

from __future__ import annotations

from pathlib import Path
import pandas as pd

from searcher.core.budget import CAP_COLUMNS, Budget
from searcher.results.pareto import front
from searcher.results.records import distinct_rows
from searcher.results.report import write_report
from searcher.runs import write_atomic


def fronts(frame: pd.DataFrame, budget: Budget) -> pd.DataFrame:
    """The accuracy-vs-cost front for every cost, stacked, with a `cost` column naming it."""
    parts = []
    for column in CAP_COLUMNS:
        part = front(distinct_rows(frame), column, caps=budget.caps())
        parts.append(part.assign(cost=column))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def write_results(folder: Path, frame: pd.DataFrame, budget: Budget, *, title: str, notes: list[str]) -> list[Path]:
    """trials.csv, front.csv and report.html, each written whole or not at all."""
    folder.mkdir(parents=True, exist_ok=True)
    written = [write_atomic(folder / "trials.csv", frame.to_csv(index=False)),
               write_atomic(folder / "front.csv", fronts(frame, budget).to_csv(index=False))]
    notes = [f"budget: {budget.describe()}", *notes]
    written.append(write_report(frame, folder / "report.html", caps=budget.caps(), title=title, notes=notes))
    return written
