"""Proxy-training settings: the `[train]` table of a space file (and `[train.augment]`), checked in one place.

Kept apart from :mod:`searcher.model.train` so that reading a space file never imports torch.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from searcher.errors import SearcherError, one_of

OPTIMIZERS = ("adamw", "sgd")
SCHEDULES = ("onecycle", "cosine", "constant")


@dataclass(frozen=True)
class AugmentSettings:
    """Random changes to training images, the `[train.augment]` table; all off by default.

    Applied to training batches only, never to validation or test images, drawn from the candidate's seed.
    """

    shift: int = 0  # up to this many pixels of random translation each way, edges repeated into the gap
    flip: bool = False  # mirror left-right for a random half of the images (off: symbols and digits have a side)
    rotate: float = 0.0  # up to this many degrees of random rotation either way, edges repeated
    scale: float = 0.0  # random zoom by a factor from 1 - scale to 1 + scale (camera distance varies)
    brightness: float = 0.0  # add up to ± this share of full scale to every pixel of an image (lighting)
    contrast: float = 0.0  # stretch each image about its mean by a factor from 1 - contrast to 1 + contrast

    def __post_init__(self) -> None:
        _check(self, _AUGMENT_RULES, "train.augment")
        for name in ("rotate", "scale", "brightness", "contrast"):
            object.__setattr__(self, name, float(getattr(self, name)))

    @property
    def active(self) -> bool:
        """Whether any change is asked for (otherwise batches pass through untouched)."""
        return any(getattr(self, f.name) for f in dataclasses.fields(self))

    @classmethod
    def from_dict(cls, values: object, file: str | None = None) -> AugmentSettings:
        """Settings from a parsed `[train.augment]` table; unset keys stay off."""
        return _from_table(cls, values, "train.augment", file)


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
    augment: AugmentSettings = field(default_factory=lambda: AugmentSettings())  # random changes to training batches (a table, or a stored dict)

    def __post_init__(self) -> None:
        if not isinstance(self.augment, AugmentSettings):  # a stored run's settings come back as plain dicts
            object.__setattr__(self, "augment", AugmentSettings.from_dict(self.augment))
        self.check()
        for name in ("train_fraction", "learning_rate", "weight_decay", "label_smoothing"):
            object.__setattr__(self, name, float(getattr(self, name)))

    def check(self) -> None:
        """Raise SearcherError naming the first field whose value breaks its rule."""
        _check(self, _RULES, "train")

    @classmethod
    def from_dict(cls, values: Mapping[str, object], file: str | None = None) -> TrainSettings:
        """Settings from a parsed `[train]` table; unset keys keep their defaults."""
        return _from_table(cls, values, "train", file)


_WHAT = {"train": "a training setting", "train.augment": "an augmentation setting"}


def _check(settings: object, rules: dict, table: str) -> None:
    """Raise SearcherError naming the first field of `settings` whose value breaks its rule."""
    for name, (test, rule) in rules.items():
        value = getattr(settings, name)
        if not test(value):
            text = one_of(value, rule) if isinstance(rule, tuple) else rule
            raise SearcherError(f"`{table}.{name}` must be {text}, got {_shown(value)}", key=f"{table}.{name}")


def _shown(value: object, limit: int = 60) -> str:
    """A value as the user wrote it, cut to a readable length."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 1] + "…"


def _from_table(cls: type, values: object, table: str, file: str | None) -> object:
    """Build settings `cls` from a parsed table, unknown keys refused with the closest known one."""
    if not isinstance(values, Mapping):
        raise SearcherError(f"`{table}` must be a table of settings, got {_shown(values)}", file=file, key=table)
    names = tuple(f.name for f in dataclasses.fields(cls))
    for key in (k for k in values if k not in names):
        hint = f"`{table}.{key}` is not {_WHAT[table]}: use {one_of(key, names)}"
        raise SearcherError(hint, file=file, key=f"{table}.{key}")
    try:
        if cls is TrainSettings and "augment" in values:
            values = {**values, "augment": AugmentSettings.from_dict(values["augment"], file)}
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
    "augment": (lambda v: isinstance(v, AugmentSettings), "a table of augmentation settings"),
}

_AUGMENT_RULES: dict[str, tuple[Callable[[object], bool], str]] = {
    "shift": (lambda v: _is_int(0)(v) and v <= 64, "a whole number of pixels from 0 to 64"),
    "flip": (lambda v: isinstance(v, bool), "true or false"),
    "rotate": (_is_number(lambda v: 0 <= v <= 180), "a number of degrees from 0 to 180"),
    "scale": (_is_number(lambda v: 0 <= v <= 0.5), "a number from 0 to 0.5 (0.1: zoom by 0.9 to 1.1)"),
    "brightness": (_is_number(lambda v: 0 <= v <= 0.5), "a number from 0 to 0.5 (a share of full scale)"),
    "contrast": (_is_number(lambda v: 0 <= v <= 0.9), "a number from 0 to 0.9 (0.2: stretch by 0.8 to 1.2)"),
}
