"""The pieces of benchmarks/bench_quality.py: the sweep's choice of candidates, the job order, the resume
file and the table arithmetic. (A whole row, a search and an export, takes about a minute even in a
tiny box, so the benchmark's own --quick run is what exercises it end to end.)"""

from __future__ import annotations

import importlib.util
import random
import statistics
import sys
from pathlib import Path

import numpy as np
import optuna
import pandas as pd
import pytest

import searcher
from searcher.core.census_report import CensusSettings, run_census

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def bench():
    spec = importlib.util.spec_from_file_location("bench_quality", ROOT / "benchmarks" / "bench_quality.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules["bench_quality"] = module  # dataclasses look their module up by name
    spec.loader.exec_module(module)
    yield module
    del sys.modules["bench_quality"]


def test_spread_order_is_van_der_corputs_sequence(bench) -> None:
    from scipy.stats import qmc

    # source: SciPy's unscrambled one-dimensional Halton sequence is van der Corput's in base 2 (its
    # first point is 0, which the sweep skips: the cheapest candidate is no quantile of interest)
    expected = qmc.Halton(d=1, scramble=False).random(65)[1:, 0]
    assert bench.spread_order(64) == pytest.approx(expected.tolist())
    # every prefix of 2^k - 1 levels is the even grid j / 2^k
    assert sorted(bench.spread_order(7)) == [j / 8 for j in range(1, 8)]


@pytest.mark.parametrize("space_file", ["stamp_inspection.toml", "lot_codes.toml"])
def test_sweep_queues_fitting_candidates_at_the_quantiles_of_cost(bench, space_file: str) -> None:
    space = searcher.load_space(ROOT / "examples" / space_file)
    settings = CensusSettings(classes=space.classes)
    census = run_census(space, space.budget, settings)
    params = bench.sweep_params(space, census, settings, 15, seed=3)
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    study = optuna.create_study(sampler=optuna.samplers.RandomSampler(0))
    for p in params:
        study.enqueue_trial(p)
    fitting = census.costs["params"][census.fits].astype(float)
    levels = bench.spread_order(15)
    archs = []
    for level, queued in zip(levels, params):
        arch = space.suggest(study.ask(), space.classes)  # what the search's worker does with a queued trial
        assert arch == space.replay(queued, space.classes)
        # source: torch's own count of the built network's parameters
        built = sum(p.numel() for p in searcher.build(arch).parameters())
        assert built <= space.budget.max_params
        assert not space.budget.check(space.budget.totals(searcher.cost(arch, space.budget.activation_precision)))
        # source: NumPy's quantile (nearest rank) of the fitting candidates' parameters from the census
        assert built == np.quantile(fitting, level, method="nearest")
        archs.append(arch.to_text())
    assert len(set(archs)) == len(archs)


def test_pick_levels_takes_distinct_candidates_nearest_the_quantile(bench) -> None:
    costs = np.array([5, 1, 2, 8, 3], dtype=float)  # sorted: 1 2 3 5 8
    picked = bench.pick_levels(costs, [0.5, 0.5, 0.5, 0.0, 1.0, 0.5], random.Random(0))
    # 0.5 is sorted place 2; taken, the next 0.5 moves outward (cheaper side first), then to the dearer side
    assert costs[picked].tolist() == [3, 2, 5, 1, 8]  # never one twice, and no more than there are
    tied = np.array([1, 1, 1, 1, 2], dtype=float)
    firsts = {bench.pick_levels(tied, [0.25], random.Random(seed))[0] for seed in range(20)}
    assert len(firsts) > 1 and firsts <= {0, 1, 2, 3}  # among equal costs the draw decides


def test_jobs_interleave_methods_and_turn_their_order(bench) -> None:
    jobs = bench.jobs_in_order(["demo"], [2.0], [0, 1, 2], ["default", "random", "sweep"])
    assert [j.method for j in jobs] == ["default", "random", "sweep", "random", "sweep", "default",
                                        "sweep", "default", "random"]
    pairs = {frozenset((a.method, b.method)) for a, b in zip(jobs[::2], jobs[1::2])}
    assert len(pairs) == 3  # two at a time, each method meets each other one
    assert len({j.key for j in jobs}) == 9


def test_rows_resume_from_the_file_and_a_torn_line_is_ignored(bench, tmp_path: Path) -> None:
    out = tmp_path / "rows.jsonl"
    bench.append_row(out, {"key": "demo/2/0/default", "hv": 0.5})
    bench.append_row(out, {"key": "demo/2/0/random", "hv": 0.4})
    with open(out, "a") as handle:
        handle.write('{"key": "demo/2/0/swe')  # a kill in the middle of a write
    assert [r["key"] for r in bench.read_rows(out)] == ["demo/2/0/default", "demo/2/0/random"]
    assert bench.read_rows(tmp_path / "none.jsonl") == []


def test_spread_over_cost_counts_distinct_full_trainings(bench) -> None:
    frame = pd.DataFrame({
        "state": ["trained", "trained", "stopped_early", "trained", "rejected", "trained", "queued"],
        "params": [100, 900, 50, 500, 10, 100, np.nan],
        "repeat_of": [np.nan, np.nan, np.nan, np.nan, np.nan, 0, np.nan],
    })
    assert bench.spread_over_cost(frame, 500.0) == {"trained": 3, "below": 1, "above": 2, "median": 500.0}


def test_confirmed_hypervolume_uses_confirmed_means_within_the_caps(bench) -> None:
    table = pd.DataFrame({"seeds": [3, 2, 0, 3], "accuracy_mean": [0.8, 0.9, 0.99, 0.95],
                          "params": [1_000, 4_000, 500, 3_000], "macs": [10, 10, 10, 99]})
    # the unconfirmed 0.99 and the 0.95 over the MACs cap drop out; chance 0.5, reference 8,000:
    # (4,000 - 1,000) × 0.3 + (8,000 - 4,000) × 0.4 = 2,500 of 8,000 × 0.5
    got = bench.confirmed_hypervolume(table, {"macs": 50}, "accuracy_mean", 0.5, 8_000)
    assert got == pytest.approx(2_500 / 4_000)
    assert bench.confirmed_hypervolume(pd.DataFrame(), {}, "accuracy_mean", 0.5, 8_000) == 0.0


def test_summary_means_spreads_and_ratios(bench) -> None:
    rows = []
    for method, hv, test in (("default", [0.5, 0.7], [0.9, 0.8]), ("random", [0.4, 0.5], [0.85, 0.85])):
        for seed in (0, 1):
            rows.append({"data": "demo", "minutes": 2.0, "seed": seed, "method": method, "hv": hv[seed],
                         "test": test[seed], "params": 1000 * (seed + 1), "macs": 10, "trained": 4 + seed,
                         "below": 1, "above": 3 + seed, "used": 0.97})
    table = bench.summarise(rows)
    default, other = table.loc[("demo", 2.0, "default")], table.loc[("demo", 2.0, "random")]
    # source: Python's statistics module (sample standard deviation)
    assert default["hv"] == pytest.approx(statistics.mean([0.5, 0.7]))
    assert default["hv_sd"] == pytest.approx(statistics.stdev([0.5, 0.7]))
    assert other["hv_ratio"] == pytest.approx(0.45 / 0.6) and default["hv_ratio"] == pytest.approx(1.0)
    assert other["test_ratio"] == pytest.approx(0.85 / 0.85)
    assert int(default["seeds"]) == 2
    text = bench.show(table)
    assert "0.6000 ± 0.1414" in text and "0.75" in text
