"""Searching by balanced accuracy when a class is rare.

Outside references: the UCI optical digits shipped with scikit-learn (sklearn.datasets.load_digits),
one class cut to a tenth of its images; the exported test figures against scikit-learn's
balanced_accuracy_score and recall_score on the exported model's own predictions.
"""

from __future__ import annotations

import json
import logging

import numpy as np
import pandas as pd
import pytest

import searcher

RARE = 8  # the digit cut to a tenth: 18 of its 174 images remain

SPACE = """
name = "digits-two-stages"
[input]
size = [8, 8]
[stages]
count = 2
convs = 1
first_width = [4, 6, 8]
[conv]
kernel = 3
activation = ["relu", "tanh"]
[pool]
kind = ["max", "none"]
[head]
features = "gap"
hidden = 0
[train]
epochs = 8
"""


@pytest.fixture(scope="module")
def imbalanced(tmp_path_factory):
    from sklearn.datasets import load_digits

    digits = load_digits()
    keep = np.ones(len(digits.target), bool)
    members = np.flatnonzero(digits.target == RARE)
    keep[np.random.default_rng(0).permutation(members)[len(members) // 10:]] = False
    folder = tmp_path_factory.mktemp("imbalanced")
    np.savez(folder / "digits.npz", images=np.round(digits.images[keep] * 255 / 16).astype(np.uint8),
             labels=digits.target[keep])
    (folder / "space.toml").write_text(SPACE)
    return folder


def _search_and_export(folder, metric: str, caplog):
    settings = searcher.SearchSettings(name=metric, space=str(folder / "space.toml"), data=str(folder / "digits.npz"),
                                       trials=4, sampler="random", seed=0, metric=metric, root=folder,
                                       confirm=searcher.ConfirmSettings(seeds=0))
    with caplog.at_level(logging.WARNING):
        outcome = searcher.search(settings)
    exported = searcher.export(searcher.ExportSettings(name=metric, root=folder))
    return outcome, exported


@pytest.mark.slow
def test_searching_by_balanced_accuracy_finds_the_rare_class(imbalanced, caplog):
    """The same candidates (a random sampler with one seed proposes the same ones whatever the scores):
    ranked, and the pick retrained, by balanced accuracy, the rare class is found on the test split;
    by plain accuracy it can be ignored at little cost."""
    plain, plain_export = _search_and_export(imbalanced, "accuracy", caplog)
    balanced, balanced_export = _search_and_export(imbalanced, "balanced_accuracy", caplog)
    assert "fewer than 10 images" in caplog.text and f"'{RARE}'" in caplog.text  # the search warned
    plain_trials = pd.read_csv(imbalanced / "accuracy" / "trials.csv")
    balanced_trials = pd.read_csv(imbalanced / "balanced_accuracy" / "trials.csv")
    assert set(plain_trials["arch"]) == set(balanced_trials["arch"])  # the same candidates
    assert balanced_export.per_class[str(RARE)] > plain_export.per_class[str(RARE)]
    assert balanced.metric.name == "balanced_accuracy" and plain.metric.name == "accuracy"


def _from_confusion(confusion: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    """The (truth, prediction) pairs a confusion matrix counts."""
    pairs = [(t, p) for t, row in enumerate(confusion) for p, n in enumerate(row) for _ in range(n)]
    truth, predicted = zip(*pairs)
    return np.array(truth), np.array(predicted)


@pytest.mark.slow
def test_exported_balanced_accuracy_and_recall_agree_with_scikit_learn(imbalanced):
    metrics = json.loads((imbalanced / "balanced_accuracy" / "export" / "metrics.json").read_text())
    truth, predicted = _from_confusion(metrics["confusion"])
    from sklearn.metrics import balanced_accuracy_score, recall_score

    # reference: scikit-learn's balanced_accuracy_score and per-class recall_score
    assert metrics["test_balanced_accuracy"] == pytest.approx(balanced_accuracy_score(truth, predicted))
    recall = recall_score(truth, predicted, average=None, labels=list(range(10)), zero_division=0)
    assert [metrics["per_class"][str(k)] for k in range(10)] == pytest.approx(list(recall))
    card = (imbalanced / "balanced_accuracy" / "export" / "MODEL_CARD.md").read_text()
    assert "balanced accuracy" in card and f"{metrics['test_balanced_accuracy']:.4f}" in card
    # the int8 model's balanced accuracy (searcher.model.metrics.scores, checked against scikit-learn in
    # tests/test_train.py) is given beside fp32's, and stays near it (common practice)
    int8 = metrics["test_balanced_accuracy_int8"]
    assert abs(int8 - metrics["test_balanced_accuracy"]) <= 0.05 and f"**{int8:.4f}**" in card
