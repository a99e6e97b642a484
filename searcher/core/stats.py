"""The few statistics the tool reports, in plain numpy: how sure an accuracy is, and how well one
ranking agrees with another.

>>> round(spearman([1, 2, 3, 4], [10, 20, 40, 30]), 3)
0.8
>>> low, high = wilson_interval(90, 100)
>>> round(low, 3), round(high, 3)
(0.826, 0.945)
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np

Z95 = 1.959964  # the standard normal's two-sided 95% quantile


def ranks(values: Sequence[float] | np.ndarray) -> np.ndarray:
    """Ranks from 1, ties sharing the mean of the ranks they span (the usual 'average' method)."""
    x = np.asarray(values, dtype=float)
    order = np.argsort(x, kind="stable")
    sorted_x = x[order]
    result = np.empty(len(x))
    start = 0
    while start < len(x):
        end = start
        while end + 1 < len(x) and sorted_x[end + 1] == sorted_x[start]:
            end += 1
        result[order[start:end + 1]] = (start + end) / 2 + 1
        start = end + 1
    return result


def spearman(x: Sequence[float] | np.ndarray, y: Sequence[float] | np.ndarray) -> float:
    """Spearman's rank correlation: Pearson's correlation of the ranks (ties averaged).

    NaN when there are fewer than 3 pairs or either side is constant: no ranking to judge.
    """
    a, b = np.asarray(x, dtype=float), np.asarray(y, dtype=float)
    if a.shape != b.shape or a.ndim != 1:
        raise ValueError(f"need two equal-length 1-D sequences, got shapes {a.shape} and {b.shape}")
    if len(a) < 3:
        return math.nan
    ra, rb = ranks(a) - (len(a) + 1) / 2, ranks(b) - (len(b) + 1) / 2
    spread = math.sqrt(float(ra @ ra) * float(rb @ rb))
    return float(ra @ rb) / spread if spread else math.nan


def wilson_interval(successes: int, trials: int, z: float = Z95) -> tuple[float, float]:
    """Wilson's score interval for a proportion (95% by default): sound near 0 and 1 and for small n."""
    if trials <= 0:
        return 0.0, 1.0
    p = successes / trials
    centre = (p + z * z / (2 * trials)) / (1 + z * z / trials)
    half = z * math.sqrt(p * (1 - p) / trials + z * z / (4 * trials * trials)) / (1 + z * z / trials)
    return max(0.0, centre - half), min(1.0, centre + half)


def accuracy_se(accuracy: float, images: int) -> float:
    """Standard error of an accuracy measured on ``images`` images (binomial): the noise every
    score on that split carries, whatever model produced it."""
    if images <= 0 or not math.isfinite(accuracy):
        return math.nan
    p = min(max(accuracy, 0.0), 1.0)
    return math.sqrt(p * (1 - p) / images)


BOOTSTRAP_REPLICATES = 2000  # resamples of the validation images (and seeds) per comparison
BOOTSTRAP_BLOCK = 250  # replicates drawn at once: bounds memory at 250 × images counts


def resampled_scores(right: np.ndarray, truth: np.ndarray, weights: np.ndarray, balanced: bool) -> np.ndarray:
    """Scores of each seed (rows of ``right``, bool seeds × images) on each weighted resample of the images
    (rows of ``weights``, replicates × images: how often each image was drawn); replicates × seeds.

    Accuracy is the weighted share right; balanced accuracy the mean over classes drawn at least
    once of the weighted share right within the class (mean recall, as scikit-learn defines it).
    """
    right = right.astype(np.float64)
    if not balanced:
        return weights @ right.T / weights.sum(axis=1, keepdims=True)
    recalls, present = [], []
    for label in np.unique(truth):
        mask = truth == label
        drawn = weights[:, mask].sum(axis=1, keepdims=True)  # replicates × 1
        recalls.append(np.divide(weights[:, mask] @ right[:, mask].T, drawn, out=np.zeros((len(weights), len(right))),
                                 where=drawn > 0))
        present.append(drawn > 0)
    present_ = np.stack(present)  # classes × replicates × 1
    return (np.stack(recalls) * present_).sum(axis=0) / present_.sum(axis=0)


def paired_bootstrap(truth: np.ndarray, first: np.ndarray, second: np.ndarray, *, balanced: bool = False,
                     replicates: int = BOOTSTRAP_REPLICATES, seed: int = 0) -> np.ndarray:
    """Bootstrap replicates of (first's mean score − second's), resampling the validation images *and* seeds.

    ``first`` and ``second`` hold predicted classes, seeds × images, of two candidates on the same
    validation images ``truth``. Each replicate draws the images with replacement, the same draw for
    both (a paired comparison: the images both get right or both get wrong cancel, as in McNemar's
    test), then each candidate's seeds with replacement, and takes the difference of the mean
    scores. The spread so covers both noises a confirmed mean carries: which images happen to be in
    the validation split, and which seeds trained it.

    >>> truth = np.zeros(200, int)
    >>> a, b = np.zeros((2, 200), int), np.zeros((2, 200), int)
    >>> b[:, :30] = 1  # the second gets 30 of 200 wrong with either seed
    >>> bool(np.quantile(paired_bootstrap(truth, a, b), 0.025) > 0)
    True
    """
    truth = np.asarray(truth)
    right = [np.asarray(p) == truth[None, :] for p in (first, second)]
    if right[0].ndim != 2 or right[1].ndim != 2 or right[0].shape[1] != len(truth) or right[1].shape[1] != len(truth):
        raise ValueError(f"predictions must be seeds × {len(truth)} images, got {np.shape(first)} and {np.shape(second)}")
    rng = np.random.default_rng(seed)
    n, out = len(truth), []
    for start in range(0, replicates, BOOTSTRAP_BLOCK):
        block = min(BOOTSTRAP_BLOCK, replicates - start)
        weights = rng.multinomial(n, np.full(n, 1 / n), size=block).astype(np.float64)
        means = []
        for r in right:
            per_seed = resampled_scores(r, truth, weights, balanced)  # block × seeds
            pick = rng.integers(0, len(r), size=(block, len(r)))
            means.append(np.take_along_axis(per_seed, pick, axis=1).mean(axis=1))
        out.append(means[0] - means[1])
    return np.concatenate(out)


def credibly_ahead(differences: np.ndarray, level: float = 0.95) -> bool:
    """True when the lower end of the two-sided ``level`` interval of the differences lies above 0: the first
    candidate is credibly better (one-sided at (1 − level)/2, as "more than two standard errors")."""
    return bool(np.quantile(differences, (1 - level) / 2) > 0)
