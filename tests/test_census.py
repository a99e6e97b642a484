"""The vectorised census against the scalar cost, candidate by candidate, and against brute force."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest

from searcher.core.budget import CAP_COLUMNS, LATENCY, Budget, show_cost
from searcher.core.census import batch_costs, decode, enumerate_all, multiplicity, sample
from searcher.core.census_report import CensusSettings, run_census, summary_lines
from searcher.core.cost import cost
from searcher.core.latency import parse_target, predict
from searcher.core.space import Space
from searcher.core.space_file import load_space

from conftest import SHIPPED_SPACES


def assert_batch_equals_scalar(space: Space, batch: dict, budget: Budget, classes: int | None = None) -> None:
    fast = batch_costs(space, batch, budget, classes)
    for i in range(len(batch["stages"])):
        arch = decode(space, batch, i, classes)
        totals = budget.totals(cost(arch, budget.activation_precision))
        got = {column: int(fast[column][i]) for column in CAP_COLUMNS}
        assert got == totals, (i, arch)  # (the latency, with a target: test_census_latency_equals_the_prediction...)
        assert (fast["stages"][i], fast["last_width"][i]) == (arch.depth, arch.widths[-1])


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_batch_costs_equal_scalar_cost_on_samples(shipped, name):
    space = shipped[name]
    assert_batch_equals_scalar(space, sample(space, 2_000, seed=11), space.budget)


@pytest.mark.parametrize("name", ["mcu", "workstation"])
def test_batch_costs_follow_the_budget_precisions_and_classes(shipped, name):
    space = shipped[name]
    budget = Budget(weight_precision="int8", activation_precision="fp16")
    assert_batch_equals_scalar(space, sample(space, 300, seed=5), budget, classes=3)


def test_batch_costs_equal_scalar_cost_on_a_whole_enumeration(write_space):
    space = load_space(write_space())
    batch = enumerate_all(space)
    assert len(batch["stages"]) == space.size() // multiplicity(space)
    assert_batch_equals_scalar(space, batch, space.budget)
    # the cost classes are exactly the configurations with the cost-free decisions held fixed
    decoded = {decode(space, batch, i).to_text() for i in range(len(batch["stages"]))}
    plain = {a.to_text() for a in space.enumerate()
             if a.activation == space.activations[0] and a.head.dropout == space.dropouts[0]}
    assert decoded == plain


def brute_force(space: Space, budget: Budget) -> tuple[list, dict[str, int]]:
    """Every configuration, costed one at a time: the fitting ones, and each cost's minimum."""
    fitting, lowest = [], {}
    for arch in space.enumerate():
        totals = budget.totals(cost(arch, budget.activation_precision))
        for column, value in totals.items():
            lowest[column] = min(lowest.get(column, value), value)
        if not budget.check(totals):
            fitting.append(arch)
    return fitting, lowest


def test_exact_census_equals_brute_force_counting(write_space):
    space = load_space(write_space())
    census = run_census(space)
    fitting, lowest = brute_force(space, space.budget)
    assert census.exact and census.size == space.size()
    assert census.fraction == pytest.approx(len(fitting) / space.size(), abs=1e-12)
    assert 0 < len(fitting) < space.size()
    assert census.lowest == lowest
    table = census.depth_width()
    by_cell = Counter((a.depth, a.stages[0].convs[0].out_channels) for a in fitting)
    assert {(d, f): int(table.loc[d, f]) for d in table.index for f in table.columns if table.loc[d, f]} == by_cell
    assert cost(census.cheapest).macs == min(cost(a).macs for a in fitting)
    assert cost(census.largest).params == max(cost(a).params for a in fitting)


def test_nothing_fits_reports_the_smallest_reachable_values(write_space):
    space = load_space(write_space())
    budget = Budget(max_params=5, max_macs=100)
    census = run_census(space, budget)
    fitting, lowest = brute_force(space, budget)
    assert fitting == [] and not census.fits.any() and census.fraction == 0.0
    assert census.cheapest is None and census.largest is None
    assert census.lowest == lowest
    text = "\n".join(summary_lines(census))
    assert "nothing in this space fits" in text
    assert f"params: {lowest['params']}" in text  # the smallest parameter count, with its cap beside it


def test_sampled_census_is_seeded(shipped):
    space = shipped["workstation"]
    settings = CensusSettings(samples=5_000, seed=4)
    first, again = run_census(space, settings=settings), run_census(space, settings=settings)
    assert not first.exact and first.evaluated == 5_000
    assert first.fraction == again.fraction and np.array_equal(first.costs["macs"], again.costs["macs"])
    assert "95% interval" in "\n".join(summary_lines(first))
    low, high = first.interval
    assert low < first.fraction < high


@pytest.mark.slow
def test_monte_carlo_interval_contains_the_exact_fraction(shipped):
    """mcu has about 1.1M cost classes: small enough to enumerate, so sampling can be checked.

    A 95% interval misses the truth one time in twenty, so ten seeded draws are checked: most
    intervals must hold the exact fraction and their mean must sit close to it.
    """
    space = shipped["mcu"]
    exact = run_census(space)
    assert exact.exact and exact.evaluated == space.size() // multiplicity(space)
    runs = [run_census(space, settings=CensusSettings(exact_limit=0, samples=50_000, seed=seed)) for seed in range(10)]
    assert not any(run.exact for run in runs)
    held = sum(run.interval[0] <= exact.fraction <= run.interval[1] for run in runs)
    assert held >= 8, held  # binomial(10, 0.95): fewer than 8 happens about 1% of the time
    assert runs[0].interval[0] <= exact.fraction <= runs[0].interval[1]  # the default seed
    se = (exact.fraction * (1 - exact.fraction) / 50_000 / len(runs)) ** 0.5
    assert abs(np.mean([run.fraction for run in runs]) - exact.fraction) < 3 * se
    assert all(run.interval[1] - run.interval[0] < 0.01 for run in runs)
    # the fitting candidates of a sample spread over depths as the exact census counts them
    exact_depth = exact.depth_width().sum(axis=1) / exact.depth_width().values.sum()
    sampled_depth = runs[0].depth_width().sum(axis=1) / runs[0].depth_width().values.sum()
    assert np.allclose(exact_depth.values, sampled_depth.reindex(exact_depth.index).values, atol=0.02)


def test_a_new_decision_is_counted_everywhere_or_refused_loudly(write_space):
    """The space's decisions are written once (Space.decisions): size, enumeration, random draws and the
    census all read that list, so a new cost-free decision multiplies each alike, and a new costing one
    the census cannot count yet stops it instead of giving wrong shares."""
    import dataclasses
    import functools

    from searcher.core.space import Decision

    base = load_space(write_space())

    @dataclasses.dataclass(frozen=True)
    class Extra(Space):
        costs_extra: bool = False

        @functools.cached_property
        def decisions(self):
            return (*Space.decisions.func(self), Decision("extra", (1, 2, 3), costs=self.costs_extra))

    free = Extra(**{f.name: getattr(base, f.name) for f in dataclasses.fields(Space)})
    assert free.size() == 3 * base.size()
    assert sum(1 for _ in free.enumerate()) == free.size()
    assert multiplicity(free) == 3 * multiplicity(base)
    assert run_census(free).size == free.size() and run_census(free).fraction == run_census(base).fraction
    costing = dataclasses.replace(free, costs_extra=True)
    with pytest.raises(NotImplementedError, match="extra"):
        run_census(costing)


# Every ceiling of searcher.limits at once: the largest network a space file can describe.
AT_THE_CEILINGS = "\n".join([
    "input = { sizes = [[1024, 1024], [1024, 1023]], classes = 100000 }",
    "stages = { count = [9, 10], convs = [9, 10], first_width = [4096, 4095], max_width = 4096 }",
    'conv = { kernel = [31, 29] }',
    'pool = { kind = "none" }',
    'head = { features = "flatten", hidden = [2, 2], hidden_width = [4096] }',
])


def test_census_at_every_ceiling_stays_exact(write_space):
    """No 64-bit overflow: the largest costs a space file can reach equal Python's exact integers.

    (Before the ceilings, a width or size beyond 64 bits raised OverflowError in numpy, and large
    ones silently wrapped around.)
    """
    space = load_space(write_space(AT_THE_CEILINGS))
    batch = sample(space, 40, seed=3)
    assert_batch_equals_scalar(space, batch, space.budget)
    assert int(batch_costs(space, batch, space.budget)["macs"].max()) > 10**18  # near 2^63, and still exact


M4 = parse_target("cortex-m4@80MHz")


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_census_latency_equals_the_prediction_candidate_by_candidate(shipped, name):
    """The census applies searcher.core.latency's formulas to arrays; each entry equals predict() on its candidate."""
    space = shipped[name]
    budget = space.budget.targeted(M4)
    batch = sample(space, 400, seed=3, timed=True)
    fast = batch_costs(space, batch, budget)
    for i in range(len(batch["stages"])):
        arch = decode(space, batch, i)
        assert fast[LATENCY][i] == pytest.approx(predict(arch, M4).seconds * 1e3, rel=1e-9), arch
    assert_batch_equals_scalar(space, batch, budget)


def test_exact_census_with_a_latency_cap_equals_brute_force_counting(write_space):
    space = load_space(write_space())  # relu and tanh: the activation now changes a cost (tanh is a table lookup)
    budget = space.budget.targeted(M4)
    median = float(np.median([budget.totals(cost(a), a)[LATENCY] for a in space.enumerate()]))
    budget = budget.updated({"max_latency": f"{median}ms"})
    census = run_census(space, budget)
    fitting = [a for a in space.enumerate() if not budget.check(budget.totals(cost(a), a))]
    assert census.exact and 0 < len(fitting) < space.size()
    assert census.fraction == pytest.approx(len(fitting) / space.size(), abs=1e-12)
    assert multiplicity(space, timed=True) * len(space.activations) == multiplicity(space)
    assert census.lowest[LATENCY] == pytest.approx(min(budget.totals(cost(a), a)[LATENCY] for a in space.enumerate()))
    assert f"latency_ms ≤ {show_cost(LATENCY, budget.max_latency_ms)}" in "\n".join(summary_lines(census))
