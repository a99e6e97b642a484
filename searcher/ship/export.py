"""Export: retrain the chosen candidate longer, test it on the held-out split, write what ships.

runs/<name>/export/ holds the weights (a state_dict for ``torch.load(..., weights_only=True)``),
the architecture JSON, a standalone ``model.py`` that needs only torch, a TorchScript file, test
metrics as JSON and a model card. The folder is written beside the old one and swapped in whole.
"""

from __future__ import annotations

import json
import logging
import shutil
import time
import warnings
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from searcher.core.arch import Arch, parse_arch
from searcher.core.budget import Budget
from searcher.core.cost import cost
from searcher.errors import SearcherError
from searcher.runs import RUNS

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class ExportSettings:
    name: str  # the run to export from
    trial: int | None = None  # export this trial's candidate instead of the best
    arch: str | None = None  # or this architecture (text or JSON)
    epochs: int | None = None  # training epochs; default 3x the search's, at least 10
    storage: str | None = None  # the run's storage, when it is not the run folder's SQLite
    root: Path = RUNS


@dataclass
class ExportOutcome:
    folder: Path
    arch: Arch
    test_accuracy: float
    per_class: dict[str, float]
    confusion: list[list[int]]
    costs: dict[str, int]
    fits: bool
    model: Any = None  # the retrained torch module, in eval mode


def choose(frame: Any, budget: Budget, settings: ExportSettings, classes: int) -> tuple[Arch, str]:
    """The candidate to export and how it was chosen."""
    from searcher.results.tables import best_row

    if settings.arch:
        return parse_arch(settings.arch), "given on the command line"
    if settings.trial is not None:
        rows = frame[frame["trial"] == settings.trial]
        if rows.empty or not rows.iloc[0]["arch"]:
            raise SearcherError(f"`--trial` {settings.trial} is not a trial of run {settings.name!r} with an architecture "
                                f"(trials 0-{len(frame) - 1})", key="--trial")
        row = rows.iloc[0]
        return parse_arch(row["arch"]), f"trial {settings.trial} ({row['state']}, validation accuracy {row['val_accuracy']:.4f})"
    best = best_row(frame, budget)
    if best is None:
        raise SearcherError(f"run {settings.name!r} has no fully trained candidate that fits the budget yet; "
                            f"let the search run longer, or name one with --trial or --arch", key="--name")
    return parse_arch(best["arch"]), f"best validation accuracy among fitting candidates: trial {best['trial']} ({best['val_accuracy']:.4f})"


def export(settings: ExportSettings) -> ExportOutcome:
    """Retrain on train+validation, test once on the held-out split, and write runs/<name>/export/."""
    from searcher.model.build import build
    from searcher.data.layout import concatenate
    from searcher.data.load import load_dataset, load_split
    from searcher.results.records import trials_frame
    from searcher.study.run import RunData
    from searcher.study.storage import open_run
    from searcher.model.train import TrainSettings, evaluate, train_candidate

    folder, study, config = open_run(settings.name, settings.storage, settings.root)
    budget = Budget(**config.budget)
    frame = trials_frame(study)
    arch, how = choose(frame, budget, settings, config.classes)
    if arch.head.classes != config.classes:
        raise SearcherError(f"architecture has {arch.head.classes} outputs but the run's data has {config.classes} classes")
    split_file = folder / "split.npz"
    stored = load_split(split_file)[0] if split_file.exists() else None
    space_shape = _space_shape(config)
    dataset = load_dataset(config.data, space_shape, seed=config.seed, split=stored, cache=folder)
    if dataset.fingerprint != config.data_fingerprint:
        raise SearcherError(f"the data at {config.data} changed since run {settings.name!r} searched it "
                            f"(fingerprint {dataset.fingerprint}, was {config.data_fingerprint})", key="--data")
    data = RunData(dataset).at(arch.input_shape)
    base = TrainSettings(**config.train)
    epochs = settings.epochs or max(10, 3 * base.epochs)
    train_settings = replace(base, epochs=epochs, train_fraction=1.0)
    images = concatenate([data.train.images, data.val.images])  # stays pixel-major: batches need no transposing
    labels = np.concatenate([data.train.labels, data.val.labels])
    model = build(arch)
    started = time.time()
    # the schedule's own validation pass reads the training data here: the test split stays unseen
    result = train_candidate(model, images, labels, data.train.images[:256], data.train.labels[:256],
                             train_settings, seed=config.seed)
    accuracy, predictions = evaluate(model, data.test.images, data.test.labels)
    confusion = _confusion(data.test.labels, predictions.numpy(), config.classes)
    per_class = {name: float(confusion[i, i] / max(1, confusion[i].sum())) for i, name in enumerate(config.class_names)}
    totals = budget.totals(cost(arch, budget.activation_precision))
    fits = not budget.check(totals)
    outcome = ExportOutcome(folder / "export", arch, accuracy, per_class, confusion.tolist(), totals, fits, model)
    extra = {"run": settings.name, "how": how, "epochs": epochs, "train_seconds": result.seconds, "train_size": len(labels),
             "sizes": {p: len(getattr(data, p).labels) for p in ("train", "val", "test")},
             "settings": asdict(train_settings), "budget": budget, "config": config}
    _write(outcome, model, extra)
    log.info("exported %s: test accuracy %.4f on %d held-out images (%.0f s of training)", arch, accuracy,
             len(data.test.labels), time.time() - started)
    return outcome


def _space_shape(config: Any) -> tuple[int, int, int]:
    """The input shape the run loaded its data at: the space's largest resolution."""
    from searcher.core.space_file import read_space_text

    space = read_space_text(config.space_text, f"<space of run, {config.space_name}>")
    largest = max(space.resolutions, key=lambda r: r[0] * r[1])
    return (space.channels, *largest)


def _confusion(truth: np.ndarray, predicted: np.ndarray, classes: int) -> np.ndarray:
    """Rows: true class; columns: predicted class."""
    table = np.zeros((classes, classes), dtype=np.int64)
    np.add.at(table, (truth, predicted), 1)
    return table


def _write(outcome: ExportOutcome, model: Any, extra: dict) -> None:
    """Write into a fresh folder beside export/, then swap it in, so export/ is never half-written."""
    import torch

    from searcher.ship.model_card import model_card, standalone_source

    target = outcome.folder
    temp = target.with_name(f".export-{int(time.time() * 1000)}")
    temp.mkdir(parents=True)
    try:
        arch = outcome.arch
        torch.save(model.state_dict(), temp / "model_state.pt")
        (temp / "arch.json").write_text(arch.to_json(), encoding="utf-8")
        (temp / "model.py").write_text(standalone_source(model, arch, extra["config"].class_names), encoding="utf-8")
        example = torch.zeros(1, *arch.input_shape)
        with warnings.catch_warnings():  # torch 2.13 marks TorchScript deprecated; C++ and mobile runtimes still load it
            warnings.simplefilter("ignore", DeprecationWarning)
            torch.jit.trace(model.eval(), example).save(str(temp / "model.torchscript.pt"))
        metrics = {"arch": arch.to_text(), "test_accuracy": outcome.test_accuracy, "per_class": outcome.per_class,
                   "confusion": outcome.confusion, "costs": outcome.costs, "fits_budget": outcome.fits,
                   "sizes": extra["sizes"], "epochs": extra["epochs"], "chosen": extra["how"]}
        (temp / "metrics.json").write_text(json.dumps(metrics, indent=2), encoding="utf-8")
        (temp / "MODEL_CARD.md").write_text(model_card(outcome, extra), encoding="utf-8")
        if target.exists():
            old = target.with_name(f".export-old-{int(time.time() * 1000)}")
            target.rename(old)
            temp.rename(target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            temp.rename(target)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise
