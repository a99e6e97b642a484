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

from searcher.core.stats import accuracy_se, credibly_ahead, paired_bootstrap, spearman
from searcher.core.pareto import COSTS, feasible_mask
from searcher.run.config import ConfirmSettings
from searcher.run.records import ACCURACY, METRICS, SCORED, TRAINED, Metric, distinct_rows

RELIABLE_SPEARMAN = 0.6  # below this the proxy's ranking is called unreliable
CONFIRMED_COLUMNS = ("trial", "arch", "seeds", *(c for m in METRICS.values() for c in (m.mean, m.sd, m.proxy)),
                     "accuracy_int8_mean", "params", "macs", "peak_activation_bytes", "weight_bytes", "latency_ms",
                     "chosen_because")


def cost_columns(caps: dict[str, float], objective_cost: str | None) -> list[str]:
    """The costs a candidate is judged against: parameters, the objective's cost and every capped cost."""
    wanted = ["params", *([objective_cost] if objective_cost else []), *caps]
    return [c for c in COSTS if c in wanted]


def select(frame: pd.DataFrame, caps: dict[str, float], columns: Sequence[str], val_images: int,
           settings: ConfirmSettings, seed: int, metric: Metric = ACCURACY,
           pick_cost: str = "params") -> list[tuple[int, str]]:
    """Trial numbers to confirm, most important first, each with why it was chosen.

    On or near a front: a fully trained candidate within the caps that no candidate costing no more
    (on any of ``columns``) beats by more than two standard errors of a validation accuracy at this
    validation size — the sampling noise every proxy score carries. Front members are taken before
    the nearest, up to ``settings.most``. Then ``settings.extra`` other trained candidates at random.

    The order serves the default pick when a time box cuts confirmation short: the most accurate
    first (the best the others are judged against), then the rest cheapest first by ``pick_cost``
    (the pick is the cheapest one as good as the best). Seen on the demo: most accurate first, a
    3.5-minute box confirmed only the two dearest, and the pick was a 16k-parameter net where a 2.8k
    one was as good.
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
    near = [i for i in order if gaps[i] <= 1.0][: settings.most]
    cost = trained[pick_cost].to_numpy(dtype=float)
    near = near[:1] + sorted(near[1:], key=lambda i: (cost[i], -acc[i]))
    chosen = [(int(trained.iloc[i]["trial"]), "on a front" if gaps[i] <= 0 else "within noise of a front") for i in near]
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
    table["chosen_because"] = jobs.groupby("trial")["reason"].first().reindex(table.index)  # finished ones only
    trials = frame.set_index("trial")
    proxies = {m.column: m.proxy for m in METRICS.values()}
    table = table.join(trials[["arch", *proxies, *(c for c in COSTS if c in trials)]].rename(columns=proxies))
    table = table.reset_index().rename(columns={"index": "trial"})
    table = table.reindex(columns=list(CONFIRMED_COLUMNS))  # latency_ms empty where the run has no target
    return table.sort_values("params", kind="stable").reset_index(drop=True)


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


@dataclass(frozen=True)
class Evidence:
    """The confirmed seeds' predicted class per validation image, and the labels: what a paired
    comparison of two candidates resamples."""

    labels: np.ndarray  # int, one per validation image
    predicted: dict[int, np.ndarray]  # the search's trial -> seeds × images

    @classmethod
    def of(cls, jobs: pd.DataFrame, labels: np.ndarray | None) -> Evidence | None:
        """From the confirmation jobs (their ``predicted`` column); None for runs that kept no predictions."""
        if labels is None or jobs.empty or "predicted" not in jobs.columns:
            return None
        done = jobs[(jobs["state"] == TRAINED) & jobs["predicted"].map(lambda p: p is not None and len(p) == len(labels))]
        return cls(np.asarray(labels), {int(t): np.stack(list(g["predicted"])) for t, g in done.groupby("trial")})


class Judge:
    """Is one confirmed candidate credibly below another? The one rule of the default pick, the summary,
    the report's steps and the choice of which candidates get further seeds.

    Credibly below: behind by more than ``tolerance`` when one is given; else, when both candidates'
    validation predictions are kept, the first is ahead in 97.5% of a paired bootstrap that resamples
    the validation images and the seeds (:func:`searcher.core.stats.paired_bootstrap`): the noise of
    the validation sample that every candidate shares, and the seed-to-seed noise, together. Runs
    from before predictions were kept fall back to two standard errors of the difference of the
    means, from the run's seed spread (:func:`seed_spread`).
    """

    def __init__(self, table: pd.DataFrame, metric: Metric = ACCURACY, tolerance: float | None = None,
                 evidence: Evidence | None = None) -> None:
        self.rows = table.set_index("trial")
        self.metric, self.tolerance, self.evidence = metric, tolerance, evidence
        self.spread = seed_spread(table, metric)
        self._verdicts: dict[tuple[int, int], bool] = {}

    @property
    def rule(self) -> str:
        """The rule in words, for the pick's reason and the report."""
        if self.tolerance is not None:
            return f"within {self.tolerance:.3f} of"
        if self.evidence is not None:
            return "within noise (a paired bootstrap over the validation images and the seeds) of"
        return f"within noise (2 standard errors, from a seed spread of {self.spread:.4f}) of"

    def below(self, better: int, other: int) -> bool:
        """True when trial ``other``'s confirmed mean is credibly below trial ``better``'s."""
        if (better, other) not in self._verdicts:
            self._verdicts[(better, other)] = self._below(better, other)
        return self._verdicts[(better, other)]

    def _below(self, better: int, other: int) -> bool:
        a, b = self.rows.loc[better], self.rows.loc[other]
        behind = a[self.metric.mean] - b[self.metric.mean]
        if self.tolerance is not None:
            return bool(behind > self.tolerance)
        known = self.evidence.predicted if self.evidence is not None else {}
        if better in known and other in known:
            differences = paired_bootstrap(self.evidence.labels, known[better], known[other],
                                           balanced=self.metric.name == "balanced_accuracy", seed=better * 100_003 + other)
            return credibly_ahead(differences)
        return bool(behind > difference_noise(a["seeds"], b["seeds"], self.spread))


def _usable(table: pd.DataFrame, caps: dict[str, float], metric: Metric) -> pd.DataFrame:
    """Confirmed candidates the pick may take: two seeds or more, a mean, within the caps."""
    usable = table[(table["seeds"] >= 2) & table[metric.mean].notna()]
    return usable[feasible_mask(usable, caps)]


def _best(usable: pd.DataFrame, cost: str, metric: Metric) -> pd.Series:
    return usable.sort_values([metric.mean, cost], ascending=[False, True]).iloc[0]


def contenders(table: pd.DataFrame, caps: dict[str, float], judge: Judge, cost: str = "params") -> list[int]:
    """Trials not credibly below the best confirmed candidate (the best included), cheapest first: the
    candidates the default pick chooses between."""
    usable = _usable(table, caps, judge.metric)
    if usable.empty:
        return []
    best = int(_best(usable, cost, judge.metric)["trial"])
    ordered = usable.sort_values([cost, judge.metric.mean], ascending=[True, False])
    return [int(t) for t in ordered["trial"] if int(t) == best or not judge.below(best, int(t))]


def default_pick(table: pd.DataFrame, caps: dict[str, float], cost: str, judge: Judge) -> Pick | None:
    """The cheapest confirmed candidate (by ``cost``) within the caps whose confirmed mean is not credibly
    below the best confirmed mean (see :class:`Judge`); None when no candidate has two confirmed seeds."""
    usable = _usable(table, caps, judge.metric)
    if usable.empty:
        return None
    metric = judge.metric
    best = _best(usable, cost, metric)
    row = usable.set_index("trial").loc[contenders(table, caps, judge, cost)[0]]
    trial = int(row.name)
    if trial == int(best["trial"]):
        reason = (f"trial {trial} has the best confirmed {metric.label} ({_mean(row, metric)}) and "
                  f"no cheaper candidate comes {judge.rule} it")
    else:
        reason = (f"trial {trial} is the cheapest candidate {judge.rule} the best: {_mean(row, metric)} "
                  f"{metric.label} at {int(row[cost]):,} {cost}, against trial {int(best['trial'])}'s "
                  f"{_mean(best, metric)} at {int(best[cost]):,} ({best[cost] / row[cost]:.1f}x the {cost})")
    return Pick(trial, str(row["arch"]), int(best["trial"]), reason)


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
    judge: Judge | None = None  # the noise rule the pick used
    within: tuple[int, ...] = ()  # trials not credibly below the best, cheapest first (the pick's choice)

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
            low, high = tied
            return (f"{words}, but the confirmed means all lie within noise of the best ({low:.4f} to {high:.4f}), "
                    f"so there is little ranking to agree with: the front is flat as far as the validation images "
                    f"and the seeds can tell")
        longer = ", ".join(f"{rho:.2f} after {e} epochs" for e, rho in sorted(self.early.items()) if math.isfinite(rho))
        return (f"{words}, below {RELIABLE_SPEARMAN}: the proxy is unreliable for this data; give it more epochs "
                f"(--epochs) or all of the training split (--train-fraction 1)"
                + (f"; the confirmation runs' own accuracy ranks at {longer}" if longer else ""))

    def tied(self) -> tuple[float, float] | None:
        """(lowest, highest) confirmed mean when every candidate with two seeds or more (at least 3 of them)
        is within noise of the best (see :class:`Judge`): a flat front; else None."""
        rows = self.table[(self.table["seeds"] >= 2) & self.table[self.metric.mean].notna()]
        if len(rows) < 3 or len(self.within) < len(rows):
            return None
        return float(rows[self.metric.mean].min()), float(rows[self.metric.mean].max())

    def noise_words(self) -> str:
        """Which confirmed candidates are within noise of the best, in one sentence (the summary and the card)."""
        if not self.within:
            return "no candidate has two confirmed seeds yet"
        if self.tied() is not None:
            return (f"every confirmed candidate is within noise of the best: the front is flat, and the cheapest "
                    f"(trial {self.within[0]}) is the honest pick")
        return (f"within noise of the best: trial{'s' if len(self.within) > 1 else ''} "
                f"{', '.join(map(str, self.within))} (cheapest first); the others are credibly below it")

    def summary(self) -> dict:
        return {"proxy_spearman": None if not math.isfinite(self.spearman) else round(self.spearman, 4),
                "proxy_reliable": self.reliable, "confirmed_within_noise": self.tied() is not None,
                "within_noise_of_best": list(self.within), "noise": self.noise_words(),
                "noise_rule": None if self.judge is None else self.judge.rule.removesuffix(" of"),
                "proxy_epochs": self.proxy_epochs,
                "ranking_after_epochs": {str(e): (None if not math.isfinite(r) else round(r, 4))
                                         for e, r in self.early.items()},
                "metric": self.metric.name,
                "confirmed": int((self.table["seeds"] > 0).sum()) if len(self.table) else 0,
                "jobs_waiting": self.queued,
                "pick": None if self.pick is None else {"trial": self.pick.trial, "arch": self.pick.arch,
                                                        "best_trial": self.pick.best_trial, "why": self.pick.reason}}


def confirmation(frame: pd.DataFrame, jobs: pd.DataFrame, caps: dict[str, float], cost: str, tolerance: float | None,
                 proxy_epochs: int, full_epochs: int, metric: Metric = ACCURACY,
                 labels: np.ndarray | None = None) -> Confirmation:
    """The confirmed table, the proxy's ranking quality, who is within noise of the best and the default
    pick, from the stored jobs (and the validation ``labels``, for the paired comparison)."""
    table = confirmed_table(jobs, frame)
    early = {e: ranking_after(jobs, table, e, metric) for e in sorted({proxy_epochs, 2 * proxy_epochs})
             if e < full_epochs}
    waiting = int(jobs["state"].isin(["queued", "running"]).sum()) if len(jobs) else 0
    judge = Judge(table, metric, tolerance, Evidence.of(jobs, labels))
    return Confirmation(table, proxy_spearman(table, metric), early, default_pick(table, caps, cost, judge),
                        waiting, proxy_epochs, metric, judge, tuple(contenders(table, caps, judge, cost)))
