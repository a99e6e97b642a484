"""Export: retrain the chosen candidate longer, test it on the held-out split, write what ships.

runs/<name>/export/ holds the weights (a state_dict for ``torch.load(..., weights_only=True)``),
the architecture JSON, a standalone ``model.py`` that needs only torch, the network in torch.export's
format (``model.pt2``), the ONNX and C files of :mod:`searcher.ship.deploy_files` (fp32 and int8,
each checked as it is written), test metrics as JSON and a model card. The folder is written beside
the old one and swapped in whole.

``model.pt2`` took the place of a TorchScript file: TorchScript is deprecated in torch 2.13, and
what it was still good for (running without Python, in C++ or on a phone) is now served by
``model.onnx`` (onnxruntime has C, C++, C#, Java and JavaScript front ends) and, on a
microcontroller, by ``model_int8.c``. torch.export's program is torch's current format, and the
entry point of its own ahead-of-time and on-device tool chains.
"""

from __future__ import annotations

import json
import math
import logging
import os
import time
from dataclasses import asdict, dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import torch

from searcher.core.arch import Arch, parse_arch
from searcher.core.budget import Budget, show_cost
from searcher.core.cost import cost, training_bytes
from searcher.core.latency import parse_target
from searcher.errors import SearcherError, check_int, shown
from searcher.limits import MAX_EPOCHS, MAX_TRIAL
from searcher.core.space_file import read_space_text
from searcher.core.stats import wilson_interval
from searcher.data.layout import concatenate
from searcher.data.load import DataChanged, Dataset, load_dataset, load_split
from searcher.files import read_regular
from searcher.redact import redact
from searcher.model.build import build
from searcher.model.train import Diverged, TrainSettings, evaluate_scores, train_candidate
from searcher.run.config import full_schedule
from searcher.run.config import check_tolerance
from searcher.run.records import FAILED, REJECTED, SCORED, TRAINED, best_row
from searcher.results.tables import RunResults, gather
from searcher.ship.deploy_files import DeployReport, write_deploy_files
from searcher.run.folders import RUNS, check_run_paths, folder_swap, run_folder
from searcher.ship.model_card import model_card, standalone_source
from searcher.int8.quantize import NotFinite
from searcher.study.run import RunData, default_memory_cap
from searcher.run.config import RunConfig
from searcher.study.studies import open_run
from searcher.study.stores import storage_kind, storage_url

log = logging.getLogger(__name__)


@dataclass(frozen=True)
class ExportSettings:
    name: str  # the run to export from
    trial: int | None = None  # export this trial's candidate instead of the best
    arch: str | None = None  # or this architecture (text or JSON)
    epochs: int | None = None  # training epochs; default the export's schedule: twice the search's, at least 18
    storage: str | None = None  # the run's storage, when it is not the run folder's SQLite
    tolerance: float | None = None  # accuracy the default pick may give up against the best confirmed one
    force: bool = False  # replace an existing export with a candidate that breaks a cap or failed
    target: str | None = None  # core@clock for the predicted latency (cortex-m4@80MHz); default the run's target
    root: Path = RUNS

    def __post_init__(self) -> None:
        """Refuse a bad option before the run is opened, naming it as typed (``--epochs``)."""
        run_folder(self.name, self.root)
        if self.trial is not None and self.arch is not None:
            raise SearcherError(f"give `--trial` or `--arch`, not both: --trial {self.trial} names a trial of the run, "
                                f"--arch {shown(self.arch)} an architecture of your own", key="--trial")
        if self.trial is not None:
            check_int(self.trial, "--trial", 0, MAX_TRIAL)
        if self.epochs is not None:
            check_int(self.epochs, "--epochs", 1, MAX_EPOCHS)
        if self.arch is not None:
            given_arch(self.arch)
        if self.storage is not None:
            storage_kind(self.storage)
        if self.tolerance is not None:
            check_tolerance(self.tolerance)
        if self.target is not None:
            parse_target(self.target, "--target")


def given_arch(text: str) -> Arch:
    """The architecture given with ``--arch``; a mistake in it is named as the option's."""
    try:
        return parse_arch(text)
    except SearcherError as exc:
        raise SearcherError(f"`--arch`: {exc.message}", key="--arch") from None


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
    deploy: DeployReport | None = None  # the int8 model's accuracy, the ONNX and C checks and figures
    test_balanced_accuracy: float = math.nan  # mean recall over the classes of the held-out split

    @property
    def test_accuracy_int8(self) -> float | None:
        """The integer reference's accuracy on the held-out split."""
        return None if self.deploy is None else self.deploy.test_accuracy_int8

    @property
    def test_balanced_accuracy_int8(self) -> float | None:
        """The integer reference's balanced accuracy on the held-out split."""
        return None if self.deploy is None else self.deploy.test_balanced_accuracy_int8

    def scores_line(self) -> str:
        """'test accuracy 0.9899 (int8 0.9899), balanced accuracy 0.9967 (int8 0.9967)' for logs and the CLI."""
        def both(fp32: float, int8: float | None) -> str:
            return f"{fp32:.4f}" + ("" if int8 is None else f" (int8 {int8:.4f})")
        return (f"test accuracy {both(self.test_accuracy, self.test_accuracy_int8)}, balanced accuracy "
                f"{both(self.test_balanced_accuracy, self.test_balanced_accuracy_int8)}")


@dataclass(frozen=True)
class Choice:
    """The candidate to export and why."""

    arch: Arch
    trial: int | None  # None for an architecture given on the command line
    how: str  # one sentence
    state: str = TRAINED  # the trial's state, or "given"
    confirmed: dict | None = None  # the confirmed mean, sd and seeds, when it was confirmed


def choose(results: RunResults, settings: ExportSettings) -> Choice:
    """The candidate to export: one named by --arch or --trial, else the cheapest confirmed candidate within
    noise of the best (see searcher.run.confirmation.default_pick), else the best by the proxy."""
    frame = results.frame
    if settings.arch:
        return Choice(given_arch(settings.arch), None, "given on the command line", "given")
    confirmed = results.confirmation.table.set_index("trial") if results.confirmation is not None else None

    def facts(trial: int) -> dict | None:
        if confirmed is None or trial not in confirmed.index:
            return None
        row = confirmed.loc[trial]
        metric = results.metric
        return {"metric": metric.name, "mean": float(row[metric.mean]), "sd": float(row[metric.sd]),
                "seeds": int(row["seeds"])}

    if settings.trial is not None:
        rows = frame[frame["trial"] == settings.trial]
        if rows.empty or not rows.iloc[0]["arch"]:
            raise SearcherError(f"`--trial` {settings.trial} is not a trial of run {settings.name!r} with an architecture "
                                f"(trials 0-{len(frame) - 1})", key="--trial")
        row = rows.iloc[0]
        how = (f"trial {settings.trial} ({row['state']}, proxy validation {results.metric.label} "
               f"{row[results.metric.column]:.4f}), named with --trial")
        return Choice(parse_arch(row["arch"]), settings.trial, how, str(row["state"]), facts(settings.trial))
    pick = results.confirmation.pick if results.confirmation is not None else None  # gathered with --tolerance
    if pick is not None:
        return Choice(parse_arch(pick.arch), pick.trial, pick.reason, TRAINED, facts(pick.trial))
    best = best_row(frame, results.budget.caps(), results.metric)
    if best is None:
        raise SearcherError(f"run {settings.name!r} has no fully trained candidate that fits the budget yet; "
                            f"let the search run longer, or name one with --trial or --arch", key="--name")
    how = (f"trial {int(best['trial'])} has the best proxy validation accuracy among fitting candidates "
           f"({results.metric.label} {best[results.metric.column]:.4f}); no candidate has two confirmed seeds yet, so "
           f"this rests on one short training")
    return Choice(parse_arch(best["arch"]), int(best["trial"]), how, TRAINED, facts(int(best["trial"])))


def _refuse_replacing(choice: Choice, fits: bool, folder: Path, settings: ExportSettings) -> None:
    """An export of a candidate that breaks a cap or failed must not replace an export the user has."""
    bad = not fits or choice.state in (REJECTED, FAILED)
    if bad and (folder / "export").exists() and not settings.force:
        what = "breaks a cap of the budget" if not fits else f"was {choice.state}"
        raise SearcherError(f"the candidate {what}; exporting it would replace {folder / 'export'} — give --force "
                            f"to replace it anyway, or choose another --trial", key="--trial" if settings.trial
                            is not None else "--arch")


def export(settings: ExportSettings) -> ExportOutcome:
    """Retrain on train+validation, test once on the held-out split, and write runs/<name>/export/."""
    folder, study, config = open_run(settings.name, settings.storage, settings.root)
    check_run_paths(folder, files=("split.npz", "decoded.npz", "run.json"), folders=("export",))
    budget = Budget(**config.budget).targeted(None if settings.target is None else parse_target(settings.target))
    results = gather(settings.name, study, storage_url(settings.storage, folder), config, folder, settings.tolerance)
    choice = choose(results, settings)
    arch, how = choice.arch, choice.how
    log.info("export: %s", how)
    _refuse_replacing(choice, not budget.check(budget.totals(cost(arch, budget.activation_precision), arch)), folder,
                      settings)
    if arch.head.classes != config.classes:
        raise SearcherError(f"architecture has {arch.head.classes} outputs but the run's data has {config.classes} classes")
    space_shape = read_space_text(config.space_text, f"<space of run {config.space_name}>").data_shape
    if arch.input_shape[0] != space_shape[0]:
        raise SearcherError(f"`--arch` {shown(arch.to_text())} takes {arch.input_shape[0]} input channel(s) but run "
                            f"{settings.name!r} reads its images with {space_shape[0]}; give the architecture "
                            f"{space_shape[0]} input channel(s)", key="--arch")
    guard, needed = default_memory_cap(1), training_bytes(cost(arch), TrainSettings(**config.train).batch_size)
    if needed > guard:
        raise SearcherError(f"training {shown(arch.to_text())} needs about {show_cost('training_bytes', needed)}, more "
                            f"than the guard of half this machine's free memory ({show_cost('training_bytes', guard)}); "
                            f"choose a smaller architecture", key="--arch" if settings.arch else "--trial")
    split_file = folder / "split.npz"
    stored = load_split(split_file)[0] if split_file.exists() else None
    dataset = _run_data(settings.name, config, space_shape, stored, folder)
    data = RunData(dataset).at(arch.input_shape)
    train_settings = full_schedule(TrainSettings(**config.train))
    if settings.epochs:
        train_settings = replace(train_settings, epochs=settings.epochs)
    epochs = train_settings.epochs
    images = concatenate([data.train.images, data.val.images])  # stays pixel-major: batches need no transposing
    labels = np.concatenate([data.train.labels, data.val.labels])
    model = build(arch)
    started = time.time()
    # the schedule's own validation pass reads the training data here: the test split stays unseen
    try:
        result = train_candidate(model, images, labels, data.train.images[:256], data.train.labels[:256],
                                 train_settings, seed=config.seed, metric=config.metric, classes=config.classes)
    except Diverged as exc:  # not the user's typing, but nothing to export: said plainly, exit status 2
        raise SearcherError(
            f"training {arch} with the export's schedule (epochs {epochs}, learning rate "
            f"{train_settings.learning_rate:g}, weight decay {train_settings.weight_decay:g}) diverged: {exc.reason}; "
            f"nothing was written. Lower `train.learning_rate` or `train.weight_decay` in the space file, give fewer "
            f"--epochs, or export another candidate", key="--arch" if settings.arch else "--trial") from None
    scores, predictions = evaluate_scores(model, data.test.images, data.test.labels, config.classes)
    confusion = _confusion(data.test.labels, predictions.numpy(), config.classes)
    per_class = {name: float(confusion[i, i] / max(1, confusion[i].sum())) for i, name in enumerate(config.class_names)}
    totals = budget.totals(cost(arch, budget.activation_precision), arch)
    fits = not budget.check(totals)
    outcome = ExportOutcome(folder / "export", arch, scores.accuracy, per_class, confusion.tolist(), totals, fits,
                            model, test_balanced_accuracy=scores.balanced_accuracy)
    extra = {"run": settings.name, "how": how, "trial": choice.trial, "confirmed": choice.confirmed, "epochs": epochs,
             "train_seconds": result.seconds, "train_size": len(labels),
             "sizes": {p: len(getattr(data, p).labels) for p in ("train", "val", "test")},
             "settings": asdict(train_settings), "budget": budget, "config": config,
             "noise": None if results.confirmation is None else results.confirmation.noise_words(),
             "candidates": int(results.frame["state"].isin(SCORED).sum())}
    _write(outcome, model, extra, data)
    log.info("exported %s: %s on %d held-out images (%.0f s in all)", arch, outcome.scores_line(),
             len(data.test.labels), time.time() - started)
    return outcome


def _run_data(name: str, config: RunConfig, shape: tuple[int, int, int], split: dict | None, folder: Path) -> Dataset:
    """The run's data read as its search read it (``--skip-unreadable`` carried over), proven the same by its
    fingerprint; from the run's decoded copy when the files have moved away since."""
    try:
        return load_dataset(config.data, shape, seed=config.seed, split=split, cache=folder,
                            skip_unreadable=config.skip_unreadable or _started_skipping(folder),
                            fingerprint=config.data_fingerprint)
    except DataChanged as exc:
        raise SearcherError(f"the data at {redact(config.data)} changed since run {name!r} searched it: it now holds "
                            f"{exc.now}; export reads the data from where the search found it (it takes no --data): "
                            "put the data the run searched back there", key="--name") from None
    except SearcherError as exc:
        if config.data == "demo" or os.path.lexists(config.data):
            raise
        raise SearcherError(f"run {name!r} searched the data at {redact(config.data)}, which is no longer there, and "
                            f"the run folder keeps no decoded copy of it; export reads the data from where the search "
                            f"found it (it takes no --data): put it back there", key="--name") from exc


def _started_skipping(folder: Path) -> bool:
    """Whether the search of a run stored before its configuration carried --skip-unreadable was given it
    (its run.json says so)."""
    try:
        return bool(json.loads(read_regular(folder / "run.json", 2**20, "run.json"))["settings"]["skip_unreadable"])
    except (OSError, ValueError, KeyError, TypeError, SearcherError):
        return False


def test_interval(outcome: ExportOutcome) -> tuple[float, float]:
    """Wilson's 95% interval of the test accuracy at the test split's size."""
    correct = int(np.trace(np.asarray(outcome.confusion)))
    return wilson_interval(correct, int(np.asarray(outcome.confusion).sum()))


def _confusion(truth: np.ndarray, predicted: np.ndarray, classes: int) -> np.ndarray:
    """Rows: true class; columns: predicted class."""
    table = np.zeros((classes, classes), dtype=np.int64)
    np.add.at(table, (truth, predicted), 1)
    return table


def _write(outcome: ExportOutcome, model: Any, extra: dict, data: Any) -> None:
    """Write into a fresh folder beside export/, then swap it in, so export/ is never half-written
    (see searcher.run.folders.folder_swap: what a kill leaves is cleaned up by the next export).

    The int8 model is calibrated on training images (the first of the training split) and measured
    on the held-out split, like the fp32 one.
    """
    with folder_swap(outcome.folder) as temp:
        arch = outcome.arch
        torch.save(model.state_dict(), temp / "model_state.pt")
        (temp / "arch.json").write_text(arch.to_json(), encoding="utf-8")
        (temp / "model.py").write_text(standalone_source(model, arch, extra["config"].class_names), encoding="utf-8")
        example = torch.zeros(2, *arch.input_shape)  # batch size free: any N
        program = torch.export.export(model.eval(), (example,), dynamic_shapes=({0: torch.export.Dim("batch")},))
        torch.export.save(program, str(temp / "model.pt2"))
        try:
            outcome.deploy = write_deploy_files(temp, model, arch, data.train.images, data.test.images,
                                                data.test.labels, extra["config"].class_names)
        except NotFinite as exc:
            raise SearcherError(f"the int8 model of {arch} cannot be built: {exc}; training with the export's schedule "
                                "diverged though its scores stayed finite, and nothing was written. Lower "
                                "`train.learning_rate` or `train.weight_decay` in the space file, or export another "
                                "candidate", key="--arch" if extra["trial"] is None else "--trial") from None
        metrics = {"arch": arch.to_text(), "test_accuracy": outcome.test_accuracy,
                   "test_balanced_accuracy": outcome.test_balanced_accuracy, "per_class": outcome.per_class,
                   "confusion": outcome.confusion, "costs": outcome.costs, "fits_budget": outcome.fits,
                   "sizes": extra["sizes"], "epochs": extra["epochs"], "chosen": extra["how"], "trial": extra["trial"],
                   "confirmed": extra["confirmed"], "test_accuracy_interval95": list(test_interval(outcome)),
                   **outcome.deploy.metrics()}
        (temp / "metrics.json").write_text(json.dumps(metrics, indent=2), encoding="utf-8")
        (temp / "MODEL_CARD.md").write_text(model_card(outcome, extra), encoding="utf-8")
