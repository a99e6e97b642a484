"""The statistics the tool reports, checked against SciPy (a general reference library, test-only)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.core.stats import (
    accuracy_se, credibly_ahead, paired_bootstrap, ranks, resampled_scores, spearman, wilson_interval,
)

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


def _discordant(both_wrong: int, first_only_wrong: int, second_only_wrong: int, images: int = 600):
    """One seed each on `images` images of one class: the images each gets wrong, with the given overlaps."""
    truth = np.zeros(images, int)
    first, second = np.zeros((1, images), int), np.zeros((1, images), int)
    first[0, :first_only_wrong] = 1
    second[0, first_only_wrong:first_only_wrong + second_only_wrong] = 1
    shared = slice(first_only_wrong + second_only_wrong, first_only_wrong + second_only_wrong + both_wrong)
    first[0, shared] = second[0, shared] = 1
    return truth, first, second


@pytest.mark.parametrize("ahead, behind", [(10, 2), (20, 10), (30, 15), (15, 15), (8, 2), (40, 20), (25, 10), (12, 4)])
def test_paired_bootstrap_agrees_with_mcnemars_exact_test(ahead: int, behind: int) -> None:
    """With one seed each, only the discordant images decide: the bootstrap's chance that the first is not
    ahead (ties counted half) is McNemar's exact one-sided mid-p value (the binomial test on the discordant
    pairs, SciPy's binom; Lancaster's mid-p splits the observed count's mass the same way) within 0.01,
    and the verdict at 2.5% one-sided is that of SciPy's exact binomtest wherever its p-value is not
    within (0.01, 0.05)."""
    from scipy.stats import binom, binomtest

    truth, first, second = _discordant(50, behind, ahead)  # the first is right on `ahead` images the second misses
    differences = paired_bootstrap(truth, first, second, replicates=20_000, seed=1)
    pairs = ahead + behind
    mid_p = binom.sf(ahead, pairs, 0.5) + 0.5 * binom.pmf(ahead, pairs, 0.5)
    assert abs((differences < 0).mean() + 0.5 * (differences == 0).mean() - mid_p) <= 0.01
    exact = binomtest(ahead, pairs, 0.5, alternative="greater").pvalue  # SciPy: McNemar's exact test
    if not 0.01 < exact < 0.05:
        assert credibly_ahead(differences) == (exact < 0.025)
    # the images both get wrong change neither: the test is paired
    assert np.allclose(np.sort(paired_bootstrap(*_discordant(0, behind, ahead), replicates=2000, seed=1)).mean(),
                       differences.mean(), atol=0.003)


def test_resampled_scores_equal_scikit_learn_with_sample_weights() -> None:
    """Accuracy and balanced accuracy of a weighted resample equal scikit-learn's accuracy_score and
    balanced_accuracy_score given the draw counts as sample_weight."""
    from sklearn.metrics import accuracy_score, balanced_accuracy_score

    rng = np.random.default_rng(4)
    truth = rng.choice(4, size=300, p=[0.6, 0.25, 0.1, 0.05])
    predicted = np.where(rng.random((3, 300)) < 0.8, truth, rng.integers(0, 4, (3, 300)))
    weights = rng.multinomial(300, np.full(300, 1 / 300), size=5).astype(float)
    plain = resampled_scores(predicted == truth, truth, weights, balanced=False)
    balanced = resampled_scores(predicted == truth, truth, weights, balanced=True)
    for r in range(5):
        for s in range(3):
            kept = weights[r] > 0
            assert plain[r, s] == pytest.approx(accuracy_score(truth, predicted[s], sample_weight=weights[r]))
            assert balanced[r, s] == pytest.approx(balanced_accuracy_score(
                truth[kept], predicted[s][kept], sample_weight=weights[r][kept]))


def test_seed_noise_widens_the_comparison() -> None:
    """Two seeds that disagree make the difference less certain than two seeds that agree (same mean)."""
    truth, first, second = _discordant(20, 10, 30, images=800)
    steady = paired_bootstrap(truth, np.repeat(first, 2, 0), np.repeat(second, 2, 0), seed=2)
    unsteady_second = np.repeat(second, 2, 0)
    unsteady_second[0, 100:130] = 1  # one seed 30 images worse,
    unsteady_second[1, 30:50] = 0  # the other 20 better
    unsteady = paired_bootstrap(truth, np.repeat(first, 2, 0), unsteady_second, seed=2)
    assert unsteady.std() > steady.std()
