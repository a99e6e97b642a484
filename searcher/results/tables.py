"""Results of a run on disk: trials.csv, front.csv, confirmed.csv, summary.json and report.html.

:func:`gather` reads everything a run has stored (its trials and its confirmation jobs) and
:func:`write_results` writes every result file from that, each whole or not at all, so the search,
``searcher report`` and ``export`` all see the same numbers.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import optuna
import pandas as pd

from searcher.core.budget import CAP_COLUMNS, Budget, show_cost
from searcher.core.census_report import CensusSettings, run_census
from searcher.core.space_file import read_space_text
from searcher.core.stats import accuracy_se
from searcher.core.train_settings import TrainSettings
from searcher.data.load import load_split
from searcher.run.confirmation import Confirmation, confirmation
from searcher.results.fronts import front
from searcher.run.records import METRICS, STOPPED, TRAINED, Metric, best_row, counts, distinct_rows, trials_frame
from searcher.results.report import write_report
from searcher.files import write_atomic
from searcher.run.config import full_schedule
from searcher.study.confirm import read_jobs, read_labels
from searcher.run.config import OBJECTIVES, RunConfig


@dataclass(frozen=True)
class RunResults:
    """What a run has found so far, read from its store."""

    name: str
    config: RunConfig
    frame: pd.DataFrame  # the trials table
    confirmation: Confirmation | None  # None before any job was queued
    sizes: dict[str, int]  # images in the train, val and test splits (empty when unknown)
    fitting_medians: dict[str, float] = field(default_factory=dict)  # each cost's median over the fitting candidates

    def spread(self) -> dict | None:
        """How the candidates trained in full and those stopped early spread over the run's cost: how many
        lie below and above the median cost of the space's candidates within the caps (the census's)."""
        median = self.fitting_medians.get(self.cost)
        if median is None:
            return None
        rows = distinct_rows(self.frame)
        out: dict = {"cost": self.cost, "fitting_median": median}
        for state, name in ((TRAINED, "trained"), (STOPPED, "stopped_early")):
            values = rows.loc[rows["state"] == state, self.cost].astype(float)
            out[f"{name}_below"], out[f"{name}_above"] = int((values < median).sum()), int((values >= median).sum())
        return out

    def spread_words(self) -> str:
        """The spread in one line, for the command's summary."""
        spread = self.spread()
        if spread is None:
            return ""
        return (f"trained in full: {spread['trained_below']} below the median {self.cost} of the fitting candidates "
                f"({show_cost(self.cost, spread['fitting_median'])}), {spread['trained_above']} above; stopped early: "
                f"{spread['stopped_early_below']} below, {spread['stopped_early_above']} above")

    @property
    def budget(self) -> Budget:
        return Budget(**self.config.budget)

    @property
    def metric(self) -> Metric:
        return METRICS[self.config.metric]

    @property
    def cost(self) -> str:
        """The cost the default pick is cheapest in: the objective's, or parameters."""
        return OBJECTIVES[self.config.objective] or "params"


def gather(name: str, study: optuna.Study, url: str, config: RunConfig, folder: Path,
           tolerance: float | None = None) -> RunResults:
    """Read the run's trials and confirmation jobs; nothing is written."""
    frame = trials_frame(study)
    jobs = read_jobs(name, url)
    proxy = TrainSettings(**config.train)
    confirmed = None if jobs.empty else confirmation(frame, jobs, Budget(**config.budget).caps(),
                                                     OBJECTIVES[config.objective] or "params", tolerance,
                                                     proxy.epochs, full_schedule(proxy).epochs, METRICS[config.metric],
                                                     read_labels(name, url))
    split = folder / "split.npz"
    sizes = {part: len(indices) for part, indices in load_split(split)[0].items()} if split.exists() else {}
    return RunResults(name, config, frame, confirmed, sizes, fitting_medians(config))


def fitting_medians(config: RunConfig) -> dict[str, float]:
    """Each cost's median over the candidates of the run's space within its caps (a census of 20,000)."""
    space = read_space_text(config.space_text, f"<space of run {config.space_name}>")
    census = run_census(space, Budget(**config.budget), CensusSettings(samples=20_000, exact_limit=50_000,
                                                                      classes=config.classes))
    if not census.fits.any():
        return {}
    return {c: float(np.median(census.costs[c][census.fits])) for c in CAP_COLUMNS if c in census.costs}


def fronts(frame: pd.DataFrame, budget: Budget) -> pd.DataFrame:
    """The accuracy-vs-cost front for every cost, stacked, with a `cost` column naming it."""
    parts = []
    for column in budget.columns:
        part = front(distinct_rows(frame), column, caps=budget.caps())
        parts.append(part.assign(cost=column))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def summary(results: RunResults, extra: dict | None = None) -> dict:
    """summary.json: counts, the best proxy candidate, the split sizes with the noise of an accuracy on
    each, and what confirmation found (``proxy_spearman`` is null below 3 confirmed candidates)."""
    best = best_row(results.frame, results.budget.caps(), results.metric)
    noise = {part: {"images": n, "accuracy_se_at_0.9": round(accuracy_se(0.9, n), 4)} for part, n in results.sizes.items()}
    data = {"run": results.name, "metric": results.metric.name, "counts": counts(results.frame),
            "spread_over_cost": results.spread(),
            "best_proxy": None if best is None else {"trial": int(best["trial"]), "arch": best["arch"],
                                                     results.metric.column: float(best[results.metric.column])},
            "splits": noise, "proxy_spearman": None}
    if results.confirmation is not None:
        data |= results.confirmation.summary()
    return data | (extra or {})


RESULT_FILES = ("trials.csv", "front.csv", "confirmed.csv", "summary.json", "report.html")  # what write_results writes


def write_results(folder: Path, results: RunResults, *, title: str, notes: list[str],
                  extra: dict | None = None) -> list[Path]:
    """trials.csv, front.csv, confirmed.csv (once confirmation began), summary.json and report.html."""
    folder.mkdir(parents=True, exist_ok=True)
    frame, budget = results.frame, results.budget
    written = [write_atomic(folder / "trials.csv", frame.to_csv(index=False)),
               write_atomic(folder / "front.csv", fronts(frame, budget).to_csv(index=False))]
    if results.confirmation is not None:
        written.append(write_atomic(folder / "confirmed.csv", results.confirmation.table.to_csv(index=False)))
    written.append(write_atomic(folder / "summary.json", json.dumps(_plain(summary(results, extra)), indent=2)))
    notes = [f"budget: {budget.describe()}", *notes]
    written.append(write_report(frame, folder / "report.html", caps=budget.caps(), title=title, notes=notes,
                                confirmation=results.confirmation, sizes=results.sizes, metric=results.metric,
                                class_names=tuple(results.config.class_names)))
    return written


def _plain(value):
    """JSON-ready: numpy numbers as Python ones, NaN as null."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value
