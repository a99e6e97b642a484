"""The statistics the tool reports, checked against SciPy (a general reference library, test-only)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.core.stats import accuracy_se, ranks, spearman, wilson_interval

scipy_stats = pytest.importorskip("scipy.stats")


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 6), st.integers(0, 6)), min_size=3, max_size=40))
def test_spearman_equals_scipy_with_ties(pairs):
    x, y = zip(*pairs)
    ours = spearman(x, y)
    if len(set(x)) < 2 or len(set(y)) < 2:  # one side constant: no ranking (SciPy gives NaN too)
        assert math.isnan(ours)
        return
    # reference: scipy.stats.spearmanr (SciPy), ties given average ranks
    assert ours == pytest.approx(scipy_stats.spearmanr(x, y).statistic, abs=1e-12)


def test_ranks_average_ties_as_scipy_rankdata():
    values = [3.0, 1.0, 3.0, 2.0, 3.0, 0.5]
    # reference: scipy.stats.rankdata(method="average")
    assert list(ranks(values)) == list(scipy_stats.rankdata(values, method="average"))


def test_spearman_needs_three_pairs():
    assert math.isnan(spearman([1, 2], [2, 1]))


@pytest.mark.parametrize("k, n", [(0, 10), (1, 10), (5, 10), (10, 10), (430, 448), (13, 448), (1, 1)])
def test_wilson_interval_equals_scipy(k, n):
    # reference: scipy.stats.binomtest(k, n).proportion_ci(method="wilson") (SciPy)
    reference = scipy_stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    low, high = wilson_interval(k, n)
    assert low == pytest.approx(reference.low, abs=1e-6) and high == pytest.approx(reference.high, abs=1e-6)


def test_accuracy_standard_error_is_the_binomial_one():
    # sqrt(p(1-p)/n): at 448 test images and 94% accuracy about 1.1 points (the "about 1 point")
    assert accuracy_se(0.94, 448) == pytest.approx(math.sqrt(0.94 * 0.06 / 448))
    assert 0.010 < accuracy_se(0.94, 448) < 0.012
    # the spread of simulated accuracies matches it (numpy's binomial draws as the outside reference)
    draws = np.random.default_rng(0).binomial(448, 0.94, size=20_000) / 448
    assert draws.std() == pytest.approx(accuracy_se(0.94, 448), rel=0.03)
