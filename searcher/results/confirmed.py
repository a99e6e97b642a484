"""Confirmed numbers: which candidates to retrain with the full schedule, what their seeds say, how
well the short proxy ranked them, and the candidate to ship by default.

Pure pandas and numpy over the trials table and the confirmation records, so the search, the
report, ``export`` and the tests all read the same rules.
"""

from __future__ import annotations

import math
import random
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from searcher.core.stats import accuracy_se, spearman
from searcher.errors import check_int, check_number
from searcher.limits import MAX_CONFIRM_CANDIDATES, MAX_CONFIRM_SEEDS
from searcher.results.pareto import COST_COLUMNS, feasible_mask
from searcher.results.records import ACCURACY, METRICS, SCORED, TRAINED, Metric, distinct_rows

RELIABLE_SPEARMAN = 0.6  # below this the proxy's ranking is called unreliable
CONFIRMED_COLUMNS = ("trial", "arch", "seeds", *(c for m in METRICS.values() for c in (m.mean, m.sd, m.proxy)),
                     "accuracy_int8_mean", "params", "macs", "peak_activation_bytes", "weight_bytes", "chosen_because")


@dataclass(frozen=True)
class ConfirmSettings:
    """How the front is confirmed after the proxy search; the search command's --confirm options."""

    seeds: int = 3  # full-schedule trainings per confirmed candidate, each with its own seed; 0: no confirmation
    most: int = 8  # at most this many candidates from on or near the fronts
    extra: int = 2  # plus this many trained candidates from elsewhere, drawn at random (checks the ranking lower down)
    tolerance: float | None = None  # accuracy the default pick may give up against the best; None: 2 standard errors

    @property
    def on(self) -> bool:
        return self.seeds > 0

    def check(self) -> None:
        """Each option within its bounds, named as the command line spells it."""
        check_int(self.seeds, "--confirm", 0, MAX_CONFIRM_SEEDS)
        check_int(self.most, "--confirm-candidates", 1, MAX_CONFIRM_CANDIDATES)
        check_int(self.extra, "--confirm-random", 0, MAX_CONFIRM_CANDIDATES)
        if self.tolerance is not None:
            check_tolerance(self.tolerance)


def check_tolerance(value: object) -> float:
    """An accuracy difference the default pick may give up: a number in [0, 1) (0.01 is one point)."""
    return check_number(value, "--tolerance", 0, 1, high_open=True)


def cost_columns(caps: dict[str, float], objective_cost: str | None) -> list[str]:
    """The costs a candidate is judged against: parameters, the objective's cost and every capped cost."""
    wanted = ["params", *([objective_cost] if objective_cost else []), *caps]
    return [c for c in COST_COLUMNS if c in wanted]


def select(frame: pd.DataFrame, caps: dict[str, float], columns: Sequence[str], val_images: int,
           settings: ConfirmSettings, seed: int, metric: Metric = ACCURACY) -> list[tuple[int, str]]:
    """Trial numbers to confirm, most important first, each with why it was chosen.

    On or near a front: a fully trained candidate within the caps that no candidate costing no more
    (on any of ``columns``) beats by more than two standard errors of a validation accuracy at this
    validation size — the sampling noise every proxy score carries. Front members come first (most
    accurate first), then the nearest. Then ``settings.extra`` other trained candidates at random.
    """
    rows = distinct_rows(frame)
    trained = rows[(rows["state"] == TRAINED) & rows[metric.column].notna()]
    trained = trained[feasible_mask(trained, caps)]
    gaps = np.full(len(trained), -np.inf)
    acc = trained[metric.column].to_numpy(dtype=float)
    noise = np.array([2 * accuracy_se(a, val_images) for a in acc])
    for column in columns:
        cost = trained[column].to_numpy(dtype=float)
        for i in range(len(trained)):
            cheaper = cost <= cost[i]
            gaps[i] = max(gaps[i], (acc[cheaper].max() - acc[i]) / max(noise[i], 1e-9))
    order = sorted(range(len(trained)), key=lambda i: (gaps[i] > 0, gaps[i] if gaps[i] > 0 else -acc[i]))
    chosen = [(int(trained.iloc[i]["trial"]), "on a front" if gaps[i] <= 0 else "within noise of a front")
              for i in order if gaps[i] <= 1.0][: settings.most]
    taken = {t for t, _ in chosen}
    others = sorted(int(t) for t in rows.loc[rows["state"].isin(SCORED) & rows[metric.column].notna(), "trial"]
                    if int(t) not in taken)
    chosen += [(t, "drawn at random") for t in random.Random(seed).sample(others, min(settings.extra, len(others)))]
    return chosen


def confirmed_table(jobs: pd.DataFrame, frame: pd.DataFrame) -> pd.DataFrame:
    """One row per confirmed candidate: its seeds' mean and sd of every score, beside its proxy's scores
    and its costs (confirmed.csv).

    ``jobs`` has one row per finished confirmation training: ``trial``, ``seed_index``, a column per
    score (``val_accuracy``, ``val_balanced_accuracy``, ``val_accuracy_int8``) and ``reason`` (why
    it was chosen); a failed seed has NaN scores and is left out of the means.
    """
    if jobs.empty:
        return pd.DataFrame(columns=list(CONFIRMED_COLUMNS))
    done = jobs[jobs["val_accuracy"].notna()]
    grouped = done.groupby("trial")
    table = pd.DataFrame({"seeds": grouped.size()})
    for m in METRICS.values():
        table[m.mean], table[m.sd] = grouped[m.column].mean(), grouped[m.column].std(ddof=1)
    table["accuracy_int8_mean"] = grouped["val_accuracy_int8"].mean()
    table["chosen_because"] = jobs.groupby("trial")["reason"].first()
    trials = frame.set_index("trial")
    proxies = {m.column: m.proxy for m in METRICS.values()}
    table = table.join(trials[["arch", *proxies, *COST_COLUMNS]].rename(columns=proxies))
    table = table.reset_index().rename(columns={"index": "trial"})
    return table[list(CONFIRMED_COLUMNS)].sort_values("params", kind="stable").reset_index(drop=True)


def proxy_spearman(table: pd.DataFrame, metric: Metric = ACCURACY) -> float:
    """Spearman's rho between the proxy's score and the confirmed mean over the confirmed set (NaN below 3)."""
    usable = table[table[metric.mean].notna() & table[metric.proxy].notna()]
    return spearman(usable[metric.proxy], usable[metric.mean]) if len(usable) >= 3 else math.nan


@dataclass(frozen=True)
class Pick:
    """The candidate export takes by default, and why, in one sentence."""

    trial: int
    arch: str
    best_trial: int  # the most accurate confirmed candidate
    reason: str


def seed_spread(table: pd.DataFrame, metric: Metric = ACCURACY) -> float:
    """The run's seed-to-seed standard deviation: the median over candidates with two or more seeds.

    One candidate's own sd, from two or three seeds, is itself very uncertain; judged by its own
    spread, the least steady candidate would pass as good as the best (seen: 0.94 ± 0.08 over two
    seeds taken over 0.99 ± 0.005 at the same cost). The median of all of them is steadier.
    """
    sds = table.loc[table["seeds"] >= 2, metric.sd].dropna()
    return float(sds.median()) if len(sds) else 0.0


def difference_noise(seeds: int, other_seeds: int, spread: float) -> float:
    """Two standard errors of the difference of two confirmed means, with the run's seed spread."""
    return 2 * spread * math.sqrt(1 / seeds + 1 / other_seeds)


def within_noise(best: pd.Series, other: pd.Series, tolerance: float | None, spread: float,
                 metric: Metric = ACCURACY) -> bool:
    """Is ``other``'s confirmed mean not credibly below ``best``'s?

    Credibly below: behind by more than ``tolerance``, or without one, by more than two standard
    errors of the difference of the two means, from the run's seed spread (:func:`seed_spread`).
    """
    behind = best[metric.mean] - other[metric.mean]
    if tolerance is not None:
        return behind <= tolerance
    return behind <= difference_noise(best["seeds"], other["seeds"], spread)


def default_pick(table: pd.DataFrame, caps: dict[str, float], cost: str, tolerance: float | None,
                 metric: Metric = ACCURACY) -> Pick | None:
    """The cheapest confirmed candidate (by ``cost``) within the caps whose confirmed mean is not credibly
    below the best confirmed mean; None when no candidate has two confirmed seeds."""
    usable = table[(table["seeds"] >= 2) & table[metric.mean].notna()]
    usable = usable[feasible_mask(usable, caps)]
    if usable.empty:
        return None
    best = usable.sort_values([metric.mean, cost], ascending=[False, True]).iloc[0]
    spread = seed_spread(usable, metric)
    for _, row in usable.sort_values([cost, metric.mean], ascending=[True, False]).iterrows():
        if within_noise(best, row, tolerance, spread, metric):
            break
    rule = (f"within {tolerance:.3f} of" if tolerance is not None else
            f"within noise (2 standard errors, from a seed spread of {spread:.4f}) of")
    if int(row["trial"]) == int(best["trial"]):
        reason = (f"trial {int(row['trial'])} has the best confirmed {metric.label} ({_mean(row, metric)}) and "
                  f"no cheaper candidate comes {rule} it")
    else:
        reason = (f"trial {int(row['trial'])} is the cheapest candidate {rule} the best: {_mean(row, metric)} "
                  f"{metric.label} at {int(row[cost]):,} {cost}, against trial {int(best['trial'])}'s "
                  f"{_mean(best, metric)} at {int(best[cost]):,} ({best[cost] / row[cost]:.1f}x the {cost})")
    return Pick(int(row["trial"]), str(row["arch"]), int(best["trial"]), reason)


def _mean(row: pd.Series, metric: Metric) -> str:
    mean, sd = row[metric.mean], row[metric.sd]
    return f"{mean:.4f} ± {sd:.4f} over {int(row['seeds'])} seeds" if math.isfinite(sd) else f"{mean:.4f} (1 seed)"


def ranking_after(jobs: pd.DataFrame, table: pd.DataFrame, epochs: int, metric: Metric = ACCURACY) -> float:
    """How the confirmation runs' own score after ``epochs`` epochs (their per-epoch history is the run's
    metric) ranks the candidates, against their final confirmed means (Spearman's rho): what a proxy of
    that length on this schedule would give."""
    done = jobs[jobs["val_accuracy"].notna()]
    early = done.assign(early=[h[epochs - 1] if len(h) >= epochs else math.nan for h in done["history"]])
    means = early.groupby("trial")["early"].mean()
    joined = table.set_index("trial")[[metric.mean]].join(means, how="inner").dropna()
    return spearman(joined["early"], joined[metric.mean]) if len(joined) >= 3 else math.nan


@dataclass(frozen=True)
class Confirmation:
    """Everything confirmation found, for the summary, the report, summary.json and export."""

    table: pd.DataFrame  # confirmed.csv
    spearman: float  # proxy accuracy against confirmed mean, over the confirmed set
    early: dict[int, float]  # epochs of the full schedule -> Spearman of the runs' accuracy then
    pick: Pick | None
    queued: int  # jobs still waiting (a time box cut them) or running
    proxy_epochs: int
    metric: Metric = ACCURACY  # the score ranked

    @property
    def reliable(self) -> bool:
        return not math.isfinite(self.spearman) or self.spearman >= RELIABLE_SPEARMAN

    def advice(self) -> str:
        """One plain sentence on the proxy's ranking, with what to change when it is poor."""
        if not math.isfinite(self.spearman):
            return "proxy ranking not measured: fewer than 3 candidates were confirmed"
        words = f"the proxy's ranking agrees with the confirmed one at Spearman's rho {self.spearman:.2f}"
        if self.reliable:
            return words
        tied = self.tied()
        if tied is not None:
            low, high, noise = tied
            return (f"{words}, but the confirmed means all lie within noise of each other ({low:.4f} to {high:.4f}, "
                    f"two standard errors {noise:.4f}), so there is little ranking to agree with: these candidates "
                    f"are as good as each other as far as the seeds can tell; more seeds (--confirm) would separate them")
        longer = ", ".join(f"{rho:.2f} after {e} epochs" for e, rho in sorted(self.early.items()) if math.isfinite(rho))
        return (f"{words}, below {RELIABLE_SPEARMAN}: the proxy is unreliable for this data; give it more epochs "
                f"(--epochs) or all of the training split (--train-fraction 1)"
                + (f"; the confirmation runs' own accuracy ranks at {longer}" if longer else ""))

    def tied(self) -> tuple[float, float, float] | None:
        """(lowest, highest, noise) when every confirmed mean (two seeds or more) is within two standard
        errors of every other, with the run's seed spread and the fewest seeds; else None."""
        rows = self.table[self.table["seeds"] >= 2]
        means = rows[self.metric.mean].dropna()
        if len(means) < 3:
            return None
        seeds = int(rows["seeds"].min())
        noise = difference_noise(seeds, seeds, seed_spread(rows, self.metric))
        low, high = float(means.min()), float(means.max())
        return (low, high, noise) if high - low <= noise else None

    def summary(self) -> dict:
        return {"proxy_spearman": None if not math.isfinite(self.spearman) else round(self.spearman, 4),
                "proxy_reliable": self.reliable, "confirmed_within_noise": self.tied() is not None,
                "proxy_epochs": self.proxy_epochs,
                "ranking_after_epochs": {str(e): (None if not math.isfinite(r) else round(r, 4))
                                         for e, r in self.early.items()},
                "metric": self.metric.name,
                "confirmed": int((self.table["seeds"] > 0).sum()) if len(self.table) else 0,
                "jobs_waiting": self.queued,
                "pick": None if self.pick is None else {"trial": self.pick.trial, "arch": self.pick.arch,
                                                        "best_trial": self.pick.best_trial, "why": self.pick.reason}}


def confirmation(frame: pd.DataFrame, jobs: pd.DataFrame, caps: dict[str, float], cost: str, tolerance: float | None,
                 proxy_epochs: int, full_epochs: int, metric: Metric = ACCURACY) -> Confirmation:
    """The confirmed table, the proxy's ranking quality and the default pick, from the stored jobs."""
    table = confirmed_table(jobs, frame)
    early = {e: ranking_after(jobs, table, e, metric) for e in sorted({proxy_epochs, 2 * proxy_epochs})
             if e < full_epochs}
    waiting = int(jobs["state"].isin(["queued", "running"]).sum()) if len(jobs) else 0
    return Confirmation(table, proxy_spearman(table, metric), early, default_pick(table, caps, cost, tolerance, metric),
                        waiting, proxy_epochs, metric)
