"""Scores of a classifier's predictions: accuracy, and recall per class with its mean (balanced accuracy).

Plain numpy, no torch. Accuracy hides a rare class (a model that never predicts it can still score
high); balanced accuracy, the mean of per-class recall, weighs every class the same.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

METRICS = ("accuracy", "balanced_accuracy")  # scores a search can rank by


@dataclass(frozen=True)
class Scores:
    """How well predictions match the truth on one set of images."""

    accuracy: float  # share of images predicted right
    balanced_accuracy: float  # mean of `recall` over classes that have images here
    recall: tuple[float, ...]  # per class: share of its images predicted right; NaN for a class with none here
    counts: tuple[int, ...]  # images of each class here

    def get(self, metric: str) -> float:
        """The score named `metric` (one of METRICS)."""
        if metric not in METRICS:
            raise ValueError(f"metric {metric!r} is not one of {METRICS}")
        return getattr(self, metric)


def scores(truth: np.ndarray, predicted: np.ndarray, classes: int) -> Scores:
    """Accuracy, balanced accuracy and per-class recall of `predicted` against `truth` (class numbers 0..classes-1).

    Balanced accuracy follows the usual definition (mean recall over the classes present in `truth`),
    as scikit-learn's balanced_accuracy_score does.
    """
    truth, predicted = np.asarray(truth, np.int64).ravel(), np.asarray(predicted, np.int64).ravel()
    if truth.shape != predicted.shape or len(truth) == 0:
        raise ValueError(f"need as many predictions as labels, at least one: {len(truth)} and {len(predicted)}")
    counts = np.bincount(truth, minlength=classes)[:classes]
    right = np.bincount(truth[truth == predicted], minlength=classes)[:classes]
    with np.errstate(invalid="ignore", divide="ignore"):
        recall = np.where(counts > 0, right / np.maximum(counts, 1), math.nan)
    present = counts > 0
    return Scores(float((truth == predicted).mean()), float(recall[present].mean()),
                  tuple(float(r) for r in recall), tuple(int(c) for c in counts))
