"""Short CPU training of one candidate network: the proxy score a search trial reports.

A search trains hundreds of candidates, so speed comes first: batches are cut from in-memory images
by index permutation, model and inputs run channels-last, and the loss is read back once per few steps.
Images arrive as bytes (uint8 N×C×H×W, numpy or torch) and each batch is converted to floats in [0, 1]
as it is taken, so the data set stays at a quarter of its float size; training batches are augmented
(`settings.augment`) after that, evaluation batches never.
"""

from __future__ import annotations

import contextlib
import logging
import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.optim.lr_scheduler import LRScheduler

from searcher.core.train_settings import OPTIMIZERS, SCHEDULES, TrainSettings  # noqa: F401  (re-exported)
from searcher.model.augment import Augmenter, Remap, remap_images, seed_for
from searcher.model.metrics import METRICS, Scores, scores

Images = torch.Tensor | np.ndarray  # uint8 N×C×H×W (bytes, converted per batch) or float32 in [0, 1]

log = logging.getLogger(__name__)

CHECK_EVERY = 16  # steps between reads of the loss, to spot divergence without a sync each step


@dataclass(frozen=True)
class TrainResult:
    """What one short training run measured."""

    val_accuracy: float  # accuracy after the last finished epoch; NaN if none finished
    history: tuple[float, ...]  # validation score (the `metric` trained for) after each finished epoch
    epochs: int  # epochs finished
    seconds: float  # wall time of the whole run, evaluation included, on_epoch calls not
    images_per_second: float  # training images processed per second of training (evaluation excluded)
    train_loss: float  # mean training loss of the last finished epoch; NaN if none finished
    train_size: int  # training images used per epoch, after train_fraction
    val_scores: Scores | None = None  # accuracy, balanced accuracy and recall per class after the last epoch
    val_accuracy_int8: float | None = None  # the int8 model's validation accuracy, when the trainer measured it
    int8_seconds: float = 0.0  # what measuring it took (quantizing and scoring)
    val_predicted: np.ndarray | None = None  # predicted class per validation image after the last epoch
    threads: int | None = None  # torch threads it trained with, when the caller chose them


@dataclass
class TrainProgress:
    """Filled in as training runs, so a caller whose `on_epoch` raised (to prune, say) still has the figures."""

    history: list[float] = field(default_factory=list)  # validation score per finished epoch
    train_loss: float = math.nan  # mean loss of the last finished epoch
    images_seen: int = 0  # training images processed, partial epochs included
    train_seconds: float = 0.0  # time spent in training steps
    seconds: float = 0.0  # wall time so far
    train_size: int = 0  # training images per epoch
    val_scores: Scores | None = None  # all validation scores of the last finished epoch
    val_predicted: np.ndarray | None = None  # predicted class per validation image, last finished epoch
    threads: int | None = None  # torch threads the caller chose for this training

    def result(self) -> TrainResult:
        """The figures so far as a TrainResult."""
        speed = self.images_seen / self.train_seconds if self.train_seconds > 0 else 0.0
        last = self.val_scores.accuracy if self.val_scores is not None else math.nan
        return TrainResult(last, tuple(self.history), len(self.history), self.seconds, speed, self.train_loss,
                           self.train_size, self.val_scores, val_predicted=self.val_predicted, threads=self.threads)


class TrainingStopped(Exception):
    """Training ended before its last epoch; `result` holds what was measured until then."""

    def __init__(self, reason: str) -> None:
        super().__init__(reason)
        self.reason = reason
        self.result: TrainResult | None = None  # always set by the time train_candidate lets it out


class Diverged(TrainingStopped):
    """The loss became NaN or infinite: the candidate failed, the search goes on. Not a user mistake."""


class OutOfTime(TrainingStopped):
    """The deadline passed during training."""


def reset_weights(model: nn.Module, seed: int) -> None:
    """Re-draw every layer's initial weights from `seed` without touching torch's global generator."""
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        for module in model.modules():
            if hasattr(module, "reset_parameters"):
                module.reset_parameters()


def as_tensor(images: Images) -> torch.Tensor:
    """A numpy array as a tensor sharing its memory and strides (no copy); a tensor as it is."""
    return torch.from_numpy(images) if isinstance(images, np.ndarray) else images


def to_float(batch: torch.Tensor, layout: torch.memory_format = torch.contiguous_format) -> torch.Tensor:
    """A batch as float32 in [0, 1] in `layout`: bytes are divided by 255, floats pass unchanged (but laid out)."""
    if batch.dtype != torch.uint8:
        return batch.contiguous(memory_format=layout)
    if layout == torch.channels_last and batch.is_contiguous(memory_format=torch.channels_last):
        # Through the N×H×W×C view, which is plainly contiguous: the vectorised kernels take it
        # (multiplying the channels-last N×C×H×W tensor itself ran ~6× slower, measured on CPU).
        return batch.permute(0, 2, 3, 1).to(torch.float32).mul_(1 / 255).permute(0, 3, 1, 2)
    return batch.to(torch.float32, memory_format=layout).mul_(1 / 255)


class Batches:
    """Cuts batches from a set of images without transposing them: bytes laid out pixel-major (channels last,
    as searcher.data keeps them) are copied as whole rows, and a remap (shift, flip) picks the source pixels
    in that same copy. Anything else is indexed as it lies."""

    def __init__(self, images: torch.Tensor, layout: torch.memory_format) -> None:
        self.pixel_major = images.dtype == torch.uint8 and layout == torch.channels_last
        if self.pixel_major and not images.is_contiguous(memory_format=torch.channels_last):
            images = images.contiguous(memory_format=torch.channels_last)  # once, for bytes given N×C×H×W
        elif not self.pixel_major and images.dtype != torch.uint8:
            images = images.contiguous(memory_format=layout)  # floats: laid out once; rows keep the layout
        self.images = images
        n, c, h, w = images.shape
        if self.pixel_major:
            nhwc = images.permute(0, 2, 3, 1)  # a view: N×H×W×C in memory order
            self.rows, self.pixels = nhwc.reshape(n, h * w * c), nhwc.reshape(n * h * w, c)  # views as well

    def __call__(self, index: torch.Tensor, remap: Remap | None = None) -> torch.Tensor:
        """Images `index` (N×C×H×W, as stored: uint8 or float), with `remap` applied if given."""
        n, c, h, w = self.images.shape
        if not self.pixel_major:
            batch = self.images[index]
            return batch if remap is None else remap_images(batch, remap)
        if remap is None:
            picked = torch.index_select(self.rows, 0, index)
        else:
            rows, cols = remap
            source = (index[:, None, None] * h + rows[:, :, None]) * w + cols[:, None, :]  # pixel numbers, B×H×W
            picked = torch.index_select(self.pixels, 0, source.reshape(-1))
        return picked.view(len(index), h, w, c).permute(0, 3, 1, 2)


def predict(model: nn.Module, images: Images, batch_size: int = 512,
            layout: torch.memory_format = torch.contiguous_format, finite: str | None = None) -> torch.Tensor:
    """Predicted class per image, batch by batch (bytes converted per batch); the model's mode is restored.

    ``finite`` (when in training, say "after epoch 3") raises Diverged if a score is NaN or infinite:
    weights grown huge but still finite give no argmax worth the name.
    """
    images = as_tensor(images)
    was_training = model.training
    model.eval()
    with torch.inference_mode():
        batches = []
        for i in range(0, len(images), batch_size):
            scores = model(to_float(images[i : i + batch_size], layout))
            if finite is not None and not bool(torch.isfinite(scores).all()):
                model.train(was_training)
                raise Diverged(f"the scores became NaN or infinite {finite}")
            batches.append(scores.argmax(1))
        predictions = torch.cat(batches)
    model.train(was_training)
    return predictions.clone()  # a plain tensor, usable outside inference mode


def evaluate(model: nn.Module, images: Images, labels: Images, batch_size: int = 512) -> tuple[float, torch.Tensor]:
    """Accuracy and predicted class per image, for validation and for export's test figures; mode restored."""
    found, predictions = evaluate_scores(model, images, labels, None, batch_size)
    return found.accuracy, predictions


def evaluate_scores(model: nn.Module, images: Images, labels: Images, classes: int | None = None,
                    batch_size: int = 512) -> tuple[Scores, torch.Tensor]:
    """Accuracy, balanced accuracy and recall per class (of `classes`; default: the largest class number seen,
    plus one), and the predicted class per image; the model's mode is restored."""
    if len(images) != len(labels) or len(labels) == 0:
        raise ValueError(f"need as many labels as images, at least one: {len(images)} images, {len(labels)} labels")
    predictions = predict(model, images, batch_size).numpy()
    truth = as_tensor(labels).numpy()
    classes = classes or int(max(truth.max(), predictions.max())) + 1
    return scores(truth, predictions, classes), torch.from_numpy(predictions)


def train_candidate(
    model: nn.Module, train_images: Images, train_labels: Images,
    val_images: Images, val_labels: Images, settings: TrainSettings = TrainSettings(), *,
    seed: int, on_epoch: Callable[[int, float], None] | None = None, deadline: float | None = None,
    threads: int | None = None, progress: TrainProgress | None = None, init_weights: bool = True,
    metric: str = "accuracy", classes: int | None = None,
) -> TrainResult:
    """Train `model` in place for a short schedule and report its validation scores.

    Images are uint8 N×C×H×W (numpy or torch; converted to floats per batch) or float32 tensors in [0, 1].
    Everything random comes from `seed`: subset, batch order, augmentation, initial weights (re-drawn unless
    `init_weights` is false) and dropout; torch's global generator is left as it was. One seed on one thread
    repeats exactly, and turning augmentation on leaves the batch order as it was.
    `metric` ("accuracy" or "balanced_accuracy") is the validation score kept in `history` and passed on;
    with balanced accuracy the loss also weighs each class by the inverse of its share (`class_weights`);
    `classes` is the class count for per-class recall (default: the largest label seen, plus one).
    `on_epoch(epoch_index, score)` runs after each epoch (index from 0); what it raises, such as
    optuna.TrialPruned, propagates unchanged: pass a `progress` to keep the figures so far. Diverged and
    OutOfTime carry them as `.result`. `deadline` is a time.monotonic() value. `threads` sets torch's
    process-wide intra-op thread count for this call only, restoring it after; None leaves it alone.
    The model ends in eval mode, in the default (NCHW) memory layout.
    """
    started = time.monotonic()
    waited = 0.0  # seconds spent in on_epoch: the caller's bookkeeping, not training
    if metric not in METRICS:
        raise ValueError(f"metric {metric!r} is not one of {METRICS}")
    train_images, train_labels = _check_data(train_images, train_labels, "training")
    val_images, val_labels = _check_data(val_images, val_labels, "validation")
    classes = classes or int(max(train_labels.max(), val_labels.max())) + 1
    progress = TrainProgress() if progress is None else progress
    generator = torch.Generator().manual_seed(seed)
    augmenter = Augmenter(settings.augment, seed_for(seed)) if settings.augment.active else None
    layout = torch.channels_last if settings.channels_last else torch.contiguous_format
    count = max(2, round(settings.train_fraction * len(train_labels)))
    batches = Batches(train_images, layout)
    if count < len(train_labels):
        chosen = torch.randperm(len(train_labels), generator=generator)[:count]
        batches, train_labels = Batches(batches(chosen), layout), train_labels[chosen]
    batch = min(settings.batch_size, count)
    steps = count // batch  # the short last batch is dropped; the order changes each epoch
    progress.train_size = count
    weights = class_weights(train_labels, classes) if metric == "balanced_accuracy" else None
    with _thread_count(threads), torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)  # dropout and the like draw from here
        if init_weights:
            reset_weights(model, seed)
        model.to(memory_format=layout)
        try:
            optimizer = _optimizer(model, settings)
            schedule = _schedule(optimizer, settings, settings.epochs * steps)
            for epoch in range(settings.epochs):
                order = torch.randperm(count, generator=generator)[: steps * batch].view(steps, batch)
                try:
                    loss = _train_epoch(model, batches, train_labels, order, optimizer, schedule, settings,
                                        deadline, progress, epoch, augmenter, weights)
                    predicted = predict(model, val_images, settings.eval_batch_size, layout,
                                        finite=f"on validation images after epoch {epoch + 1}")
                except TrainingStopped as stopped:
                    progress.seconds = time.monotonic() - started - waited
                    stopped.result = progress.result()
                    raise
                progress.train_loss = loss
                progress.val_predicted = predicted.numpy()
                progress.val_scores = scores(val_labels.numpy(), progress.val_predicted, classes)
                score = progress.val_scores.get(metric)
                progress.history.append(score)
                progress.seconds = time.monotonic() - started - waited
                log.debug("epoch %d: loss %.4f, val accuracy %.4f, balanced %.4f", epoch + 1, loss,
                          progress.val_scores.accuracy, progress.val_scores.balanced_accuracy)
                if on_epoch is not None:
                    called = time.monotonic()
                    on_epoch(epoch, score)
                    waited += time.monotonic() - called
        finally:
            model.eval()
            model.to(memory_format=torch.contiguous_format)
    return progress.result()


def class_weights(labels: torch.Tensor, classes: int) -> torch.Tensor:
    """Loss weights that make every class count alike: each class weighed by the inverse of its share of
    the training images (common practice when balanced accuracy is the score), 1 for a class with none."""
    counts = torch.bincount(labels, minlength=classes)[:classes].double()
    present = counts > 0
    weights = torch.ones(classes, dtype=torch.float64)
    weights[present] = counts.sum() / (present.sum() * counts[present])
    return weights.float()


def _train_epoch(model: nn.Module, batches: Batches, labels: torch.Tensor, order: torch.Tensor,
                 optimizer: torch.optim.Optimizer, schedule: LRScheduler | None, settings: TrainSettings,
                 deadline: float | None, progress: TrainProgress, epoch: int,
                 augmenter: Augmenter | None = None, weights: torch.Tensor | None = None) -> float:
    """One pass, a batch per row of `order`; returns the mean loss. Counts its time even when it raises."""
    model.train()
    layout = torch.channels_last if settings.channels_last else torch.contiguous_format
    losses: list[torch.Tensor] = []
    start = time.monotonic()
    try:
        for step, index in enumerate(order):
            if deadline is not None and time.monotonic() >= deadline:
                raise OutOfTime(f"deadline passed in epoch {epoch + 1}, step {step + 1} of {len(order)}")
            if augmenter is None:
                batch = to_float(batches(index), layout)
            else:
                h, w = batches.images.shape[-2:]
                batch = augmenter.after_float(to_float(batches(index, augmenter.remap(len(index), h, w)), layout))
            loss = F.cross_entropy(model(to_float(batch, layout)), labels[index], weight=weights,
                                   label_smoothing=settings.label_smoothing)
            optimizer.zero_grad(set_to_none=True)
            loss.backward()
            try:
                optimizer.step()
            except RuntimeError as exc:  # a step size beyond float32 (learning rate 1e300) cannot even be applied
                if "overflow" not in str(exc):
                    raise
                raise Diverged(f"the optimiser's step overflowed float32 at epoch {epoch + 1}, step {step + 1} "
                               f"(learning rate {optimizer.param_groups[0]['lr']:g}): {exc}") from None
            if schedule is not None:
                schedule.step()
            losses.append(loss.detach())  # read back only every CHECK_EVERY steps
            progress.images_seen += len(index)
            if (step + 1) % CHECK_EVERY == 0 or step + 1 == len(order):
                since = step // CHECK_EVERY * CHECK_EVERY
                finite = torch.isfinite(torch.stack(losses[since:]))
                if not bool(finite.all()):
                    bad = since + int((~finite).nonzero()[0])
                    raise Diverged(f"loss became {losses[bad].item()} at epoch {epoch + 1}, step {bad + 1}")
        if not all(bool(torch.isfinite(p).all()) for p in model.parameters()):  # the last steps' loss was still finite
            raise Diverged(f"the weights became NaN or infinite in epoch {epoch + 1}")
        return torch.stack(losses).mean().item()
    finally:
        progress.train_seconds += time.monotonic() - start


def _check_data(images: Images, labels: Images, split: str) -> tuple[torch.Tensor, torch.Tensor]:
    """Images and labels as tensors (sharing memory), refused unless uint8 or float32 N×C×H×W and int64 N."""
    images, labels = as_tensor(images), as_tensor(labels)
    if images.dim() != 4 or images.dtype not in (torch.uint8, torch.float32) or labels.dtype != torch.int64 \
            or len(labels) < 2 or labels.shape != images.shape[:1]:
        raise ValueError(f"{split} data must be ≥ 2 uint8 or float32 N×C×H×W images and N int64 labels, got "
                         f"{images.dtype} {tuple(images.shape)} and {labels.dtype} {tuple(labels.shape)}")
    return images, labels


def _optimizer(model: nn.Module, settings: TrainSettings) -> torch.optim.Optimizer:
    """Weight decay on weight matrices and kernels only, not biases or norm scales (common practice)."""
    params = [p for p in model.parameters() if p.requires_grad]
    split = [(settings.weight_decay, [p for p in params if p.dim() > 1]), (0.0, [p for p in params if p.dim() <= 1])]
    groups = [{"params": group, "weight_decay": decay} for decay, group in split if group]
    if settings.optimizer == "sgd":
        return torch.optim.SGD(groups, lr=settings.learning_rate, momentum=0.9, nesterov=True, foreach=True)
    return torch.optim.AdamW(groups, lr=settings.learning_rate, foreach=True)


def _schedule(optimizer: torch.optim.Optimizer, settings: TrainSettings, total_steps: int) -> LRScheduler | None:
    if settings.schedule == "onecycle":
        return torch.optim.lr_scheduler.OneCycleLR(optimizer, max_lr=settings.learning_rate, total_steps=total_steps)
    if settings.schedule == "cosine":
        return torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=total_steps)
    return None


@contextlib.contextmanager
def _thread_count(threads: int | None) -> Iterator[None]:
    before = torch.get_num_threads()
    if threads is not None:
        torch.set_num_threads(threads)  # raises for threads < 1
    try:
        yield
    finally:
        torch.set_num_threads(before)
