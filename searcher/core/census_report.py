"""Summing up a census: share that fits, cost spread, depth x width table (no files: see searcher.results.census_files)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from searcher.core.arch import Arch
from searcher.core.budget import LATENCY, Budget, show_cost
from searcher.core.census import batch_costs, decode, enumerate_all, multiplicity, sample
from searcher.core.space import Space
from searcher.core.stats import wilson_interval
from searcher.errors import check_int
from searcher.limits import MAX_CLASSES, MAX_SAMPLES, MAX_SEED


@dataclass(frozen=True)
class CensusSettings:
    """How a census counts; fields are named like the `census` options, and checked on creation."""

    samples: int = 200_000  # candidates drawn when the space is too large to enumerate
    seed: int = 0  # seed of the draw
    exact_limit: int = 2_000_000  # enumerate when the space has at most this many cost classes (of ≤ 10 convs)
    classes: int | None = None  # output classes; the space's `input.classes` when None

    def __post_init__(self) -> None:
        check_int(self.samples, "--samples", 1, MAX_SAMPLES, why="the census holds every draw in memory")
        check_int(self.seed, "--seed", 0, MAX_SEED)
        check_int(self.exact_limit, "exact_limit", 0, 2 * MAX_SAMPLES)  # 0: always sample
        if self.classes is not None:
            check_int(self.classes, "--classes", 2, MAX_CLASSES)


@dataclass
class Census:
    """Everything the census found; plain data for printing, CSV and tests."""

    space: Space
    budget: Budget
    size: int  # configurations in the space
    exact: bool  # True: every cost class enumerated; False: a uniform sample
    evaluated: int  # candidates (cost classes or samples) looked at
    fits: np.ndarray  # bool per evaluated candidate
    costs: dict[str, np.ndarray]
    cheapest: Arch | None  # fitting candidate with the fewest MACs
    largest: Arch | None  # fitting candidate with the most parameters
    lowest: dict[str, int] = field(default_factory=dict)  # smallest value of each cost seen

    @property
    def fraction(self) -> float:
        return float(self.fits.mean()) if self.evaluated else 0.0

    @property
    def interval(self) -> tuple[float, float]:
        """95% Wilson score interval of the fraction (a point when exact)."""
        if self.exact:
            return self.fraction, self.fraction
        return wilson_interval(int(self.fits.sum()), self.evaluated)

    def spread(self) -> pd.DataFrame:
        """Quantiles of every cost over the fitting candidates."""
        rows = {}
        for column in self.budget.columns:
            values = self.costs[column][self.fits]
            if len(values):
                q = np.quantile(values, [0, 0.1, 0.5, 0.9, 1.0])
                q = q.round(3) if column == LATENCY else q.round().astype(np.int64)  # milliseconds keep 3 decimals
                rows[column] = dict(zip(["min", "p10", "median", "p90", "max"], q))
        return pd.DataFrame(rows, dtype=object).T  # counts stay whole, milliseconds keep their decimals

    def depth_width(self) -> pd.DataFrame:
        """Fitting candidates by depth (rows) and first-stage width (columns)."""
        frame = pd.DataFrame({"stages": self.costs["stages"], "first_width": self.costs["first_width"], "fits": self.fits})
        table = frame[frame.fits].pivot_table(index="stages", columns="first_width", values="fits", aggfunc="size",
                                              fill_value=0)
        full = frame.pivot_table(index="stages", columns="first_width", values="fits", aggfunc="size", fill_value=0)
        table = table.reindex(index=full.index, columns=full.columns, fill_value=0)
        return table * (multiplicity(self.space, self.budget.target is not None) if self.exact else 1)


def run_census(space: Space, budget: Budget | None = None, settings: CensusSettings = CensusSettings()) -> Census:
    """Count what fits, exactly for small spaces and by a seeded sample otherwise.

    >>> from searcher.core.space_file import load_space, builtin_space
    >>> census = run_census(load_space(builtin_space("classic")))
    >>> census.exact, census.size
    (True, 96)
    """
    budget = budget or space.budget
    classes, timed = settings.classes, budget.target is not None
    exact = _work(space, space.size() // multiplicity(space, timed)) <= _work(space, settings.exact_limit, convs=10)
    batch = enumerate_all(space, timed) if exact else sample(space, settings.samples, settings.seed, timed)
    costs = batch_costs(space, batch, budget, classes)
    fits = np.ones(len(batch["stages"]), dtype=bool)
    for column, limit in budget.caps().items():
        fits &= costs[column] <= limit
    index = np.flatnonzero(fits)
    cheapest = largest = None
    if len(index):
        cheapest = decode(space, batch, int(index[np.argmin(costs["macs"][index])]), classes)
        largest = decode(space, batch, int(index[np.argmax(costs["params"][index])]), classes)
    lowest = {column: costs[column].min().item() for column in budget.columns}
    return Census(space, budget, space.size(), exact, len(fits), fits, costs, cheapest, largest, lowest)


def _work(space: Space, rows: int, convs: int | None = None) -> int:
    """Rows times conv layers: what the census's time and memory grow with (a deep space enumerates fewer rows)."""
    layers = convs or sum(space.stage_convs(i)[1] for i in range(space.stage_count[1]))
    return rows * max(layers, 10)


def summary_lines(census: Census) -> list[str]:
    """The census in words, for the terminal."""
    how = "exact, every configuration counted" if census.exact else (
        f"estimated from {census.evaluated:,} uniform random draws, 95% interval")
    low, high = census.interval
    lines = [
        f"space {census.space.name}: {census.size:,} configurations",
        f"budget: {census.budget.describe()}",
        f"fits: {census.fraction:.3%}" + ("" if census.exact else f" [{low:.3%}, {high:.3%}]") + f" ({how})",
    ]
    if not census.fits.any():
        lines.append("nothing in this space fits the budget. Smallest value each cost reaches"
                     + (":" if census.exact else f" in {census.evaluated:,} draws:"))
        for column, limit in census.budget.caps().items():
            lines.append(f"  {column}: {show_cost(column, census.lowest[column])} (cap {show_cost(column, limit)})")
        return lines
    lines.append("cost over the fitting candidates:")
    lines += ["  " + line for line in census.spread().to_string().splitlines()]
    lines.append("fitting candidates by depth (rows) and first-stage width (columns):")
    lines += ["  " + line for line in census.depth_width().to_string().splitlines()]
    lines.append(f"cheapest fitting (fewest MACs): {census.cheapest}")
    lines.append(f"largest fitting (most parameters): {census.largest}")
    return lines


