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
