"""Proxy-training settings: the `[train]` table of a space file (and `[train.augment]`), checked in one place.

Kept apart from :mod:`searcher.model.train` so that reading a space file never imports torch.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

from searcher.errors import SearcherError, is_int, one_of, shown, spelled
from searcher.limits import MAX_BATCH, MAX_EPOCHS

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
        _refuse_broken(_AUGMENT_RULES, {f.name: getattr(self, f.name) for f in dataclasses.fields(self)},
                       "train.augment.")
        for name in ("rotate", "scale", "brightness", "contrast"):
            object.__setattr__(self, name, float(getattr(self, name)))

    @property
    def active(self) -> bool:
        """Whether any change is asked for (otherwise batches pass through untouched)."""
        return any(getattr(self, f.name) for f in dataclasses.fields(self))

    @classmethod
    def from_dict(cls, values: object, file: str | None = None) -> AugmentSettings:
        """Settings from a parsed `[train.augment]` table; unset keys stay off."""
        _refuse_unknown(cls, values, "train.augment", "an augmentation setting", file)
        _refuse_broken(_AUGMENT_RULES, values, "train.augment.", file)
        return cls(**values)


@dataclass(frozen=True)
class TrainSettings:
    """How one candidate is trained; the `[train]` table of a search file."""

    epochs: int = 12  # passes over the (sub-sampled) training split; 12 ranks far better than 6 (README, Benchmarks)
    train_fraction: float = 1.0  # share of the training split used, a seeded random subset
    batch_size: int = 128  # training images per optimiser step
    optimizer: str = "adamw"  # "adamw", or "sgd" (momentum 0.9, Nesterov)
    learning_rate: float = 1e-2  # schedule's peak; on digits 3e-3 reached ~0.91 in 6 short epochs, 1e-2 ~0.97
    schedule: str = "onecycle"  # "onecycle" (warm-up then anneal), "cosine" or "constant", stepped per batch
    weight_decay: float = 5e-4  # decoupled for adamw, L2 for sgd; never applied to biases or norm scales
    label_smoothing: float = 0.05  # mass moved from the true class to all classes in the loss
    channels_last: bool = True  # NHWC memory layout for model and inputs; faster convolutions on CPU
    eval_batch_size: int = 512  # images per forward pass when measuring validation accuracy
    augment: AugmentSettings = field(default_factory=AugmentSettings)  # random changes to training batches

    def __post_init__(self) -> None:
        if not isinstance(self.augment, AugmentSettings):  # a stored run's settings come back as plain dicts
            object.__setattr__(self, "augment", AugmentSettings.from_dict(self.augment))
        self.check()
        for name in ("train_fraction", "learning_rate", "weight_decay", "label_smoothing"):
            object.__setattr__(self, name, float(getattr(self, name)))

    def check(self, prefix: str = "train.") -> None:
        """Raise SearcherError naming the first field whose value breaks its rule."""
        _refuse_broken(_RULES, {name: getattr(self, name) for name in _RULES}, prefix)

    @classmethod
    def from_dict(cls, values: Mapping[str, object], file: str | None = None, prefix: str = "train.") -> TrainSettings:
        """Settings from a parsed `[train]` table; unset keys keep their defaults.

        ``prefix`` names a key as the user wrote it: "train." in a space file, "--" for the
        command-line options (``--batch-size``), so a mistake is blamed on the right place.
        """
        _refuse_unknown(cls, values, prefix.rstrip("."), "a training setting", file, prefix)
        _refuse_broken(_RULES, values, prefix, file)
        if "augment" in values:
            values = {**values, "augment": AugmentSettings.from_dict(values["augment"], file)}
        return cls(**values)


def _refuse_unknown(cls: type, values: object, table: str, what: str, file: str | None,
                    prefix: str | None = None) -> None:
    """A table that is not one, or a key the settings do not have, refused with the closest known key."""
    if not isinstance(values, Mapping):
        raise SearcherError(f"`{table}` must be a table of settings, got {shown(values)}", file=file, key=table)
    names = tuple(f.name for f in dataclasses.fields(cls))
    for key in (k for k in values if k not in names):
        where = spelled(prefix or f"{table}.", str(key))
        raise SearcherError(f"`{where}` is not {what}: use {one_of(key, names)}", file=file, key=where)


def _refuse_broken(rules: dict, values: Mapping[str, object], prefix: str, file: str | None = None) -> None:
    """Raise for the first value that breaks its rule, naming it ``prefix`` + field."""
    for name, (test, rule) in rules.items():
        if name in values and not test(values[name]):
            text = one_of(values[name], rule) if isinstance(rule, tuple) else rule
            key = spelled(prefix, name)
            raise SearcherError(f"`{key}` must be {text}, got {shown(values[name])}", file=file, key=key)


def _is_int(low: int, high: int) -> Callable[[object], bool]:
    return lambda v: is_int(v) and low <= v <= high


def _is_number(test: Callable[[float], bool]) -> Callable[[object], bool]:
    return lambda v: isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) and test(v)


_RULES: dict[str, tuple[Callable[[object], bool], str | tuple[str, ...]]] = {  # a rule, or the options
    "epochs": (_is_int(1, MAX_EPOCHS), f"a whole number from 1 to {MAX_EPOCHS:,}"),
    "train_fraction": (_is_number(lambda v: 0 < v <= 1), "a number in (0, 1]"),
    "batch_size": (_is_int(2, MAX_BATCH), f"a whole number from 2 (batch norm needs two images) to {MAX_BATCH:,}"),
    "optimizer": (lambda v: isinstance(v, str) and v in OPTIMIZERS, OPTIMIZERS),
    "learning_rate": (_is_number(lambda v: v > 0), "a number > 0"),
    "schedule": (lambda v: isinstance(v, str) and v in SCHEDULES, SCHEDULES),
    "weight_decay": (_is_number(lambda v: v >= 0), "a number ≥ 0"),
    "label_smoothing": (_is_number(lambda v: 0 <= v < 1), "a number in [0, 1)"),
    "channels_last": (lambda v: isinstance(v, bool), "true or false"),
    "eval_batch_size": (_is_int(1, MAX_BATCH), f"a whole number from 1 to {MAX_BATCH:,}"),
    "augment": (lambda v: isinstance(v, (AugmentSettings, Mapping)), "a table of augmentation settings"),
}

_AUGMENT_RULES: dict[str, tuple[Callable[[object], bool], str]] = {
    "shift": (_is_int(0, 64), "a whole number of pixels from 0 to 64"),
    "flip": (lambda v: isinstance(v, bool), "true or false"),
    "rotate": (_is_number(lambda v: 0 <= v <= 180), "a number of degrees from 0 to 180"),
    "scale": (_is_number(lambda v: 0 <= v <= 0.5), "a number from 0 to 0.5 (0.1: zoom by 0.9 to 1.1)"),
    "brightness": (_is_number(lambda v: 0 <= v <= 0.5), "a number from 0 to 0.5 (a share of full scale)"),
    "contrast": (_is_number(lambda v: 0 <= v <= 0.9), "a number from 0 to 0.9 (0.2: stretch by 0.8 to 1.2)"),
}
