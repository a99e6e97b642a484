"""Proxy-training settings: the `[train]` table of a space file, checked in one place.

Kept apart from :mod:`searcher.model.train` so that reading a space file never imports torch.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

from searcher.errors import SearcherError, one_of

OPTIMIZERS = ("adamw", "sgd")
SCHEDULES = ("onecycle", "cosine", "constant")


@dataclass(frozen=True)
class TrainSettings:
    """How one candidate is trained; the `[train]` table of a search file."""

    epochs: int = 6  # passes over the (sub-sampled) training split
    train_fraction: float = 1.0  # share of the training split used, a seeded random subset
    batch_size: int = 128  # training images per optimiser step
    optimizer: str = "adamw"  # "adamw", or "sgd" (momentum 0.9, Nesterov)
    learning_rate: float = 1e-2  # schedule's peak; on digits 3e-3 reached ~0.91 in 6 short epochs, 1e-2 ~0.97
    schedule: str = "onecycle"  # "onecycle" (warm-up then anneal), "cosine" or "constant", stepped per batch
    weight_decay: float = 5e-4  # decoupled for adamw, L2 for sgd; never applied to biases or norm scales
    label_smoothing: float = 0.05  # mass moved from the true class to all classes in the loss
    channels_last: bool = True  # NHWC memory layout for model and inputs; faster convolutions on CPU
    eval_batch_size: int = 512  # images per forward pass when measuring validation accuracy

    def __post_init__(self) -> None:
        self.check()
        for name in ("train_fraction", "learning_rate", "weight_decay", "label_smoothing"):
            object.__setattr__(self, name, float(getattr(self, name)))

    def check(self) -> None:
        """Raise SearcherError naming the first field whose value breaks its rule."""
        for name, (test, rule) in _RULES.items():
            value = getattr(self, name)
            if not test(value):
                text = one_of(value, rule) if isinstance(rule, tuple) else rule
                raise SearcherError(f"`train.{name}` must be {text}, got {value!r}", key=f"train.{name}")

    @classmethod
    def from_dict(cls, values: Mapping[str, object], file: str | None = None) -> TrainSettings:
        """Settings from a parsed `[train]` table; unset keys keep their defaults."""
        if not isinstance(values, Mapping):
            raise SearcherError(f"`train` must be a table of settings, got {values!r}", file=file, key="train")
        names = tuple(f.name for f in dataclasses.fields(cls))
        for key in (k for k in values if k not in names):
            hint = f"`train.{key}` is not a training setting: use {one_of(key, names)}"
            raise SearcherError(hint, file=file, key=f"train.{key}")
        try:
            return cls(**values)
        except SearcherError as error:
            raise SearcherError(error.message, file=file, key=error.key) from None


def _is_int(low: int) -> Callable[[object], bool]:
    return lambda v: isinstance(v, int) and not isinstance(v, bool) and v >= low


def _is_number(test: Callable[[float], bool]) -> Callable[[object], bool]:
    return lambda v: isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) and test(v)


_RULES: dict[str, tuple[Callable[[object], bool], str | tuple[str, ...]]] = {  # a rule, or the options
    "epochs": (_is_int(1), "an int ≥ 1"),
    "train_fraction": (_is_number(lambda v: 0 < v <= 1), "a number in (0, 1]"),
    "batch_size": (_is_int(2), "an int ≥ 2 (batch norm needs two images)"),
    "optimizer": (lambda v: v in OPTIMIZERS, OPTIMIZERS),
    "learning_rate": (_is_number(lambda v: v > 0), "a number > 0"),
    "schedule": (lambda v: v in SCHEDULES, SCHEDULES),
    "weight_decay": (_is_number(lambda v: v >= 0), "a number ≥ 0"),
    "label_smoothing": (_is_number(lambda v: 0 <= v < 1), "a number in [0, 1)"),
    "channels_last": (lambda v: isinstance(v, bool), "true or false"),
    "eval_batch_size": (_is_int(1), "an int ≥ 1"),
}
