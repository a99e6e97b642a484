"""What a run searches, fixed for its life, and the settings every phase of it reads.

The stored configuration (:class:`RunConfig`) is kept in the run's study, so a resumed run, a
report, an export or another machine on the same store reads the same space, budget, training
settings and data; the objectives, the export's schedule and the confirmation's settings sit
beside it because the search, the results and the export all read them.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, replace
from typing import Any

from searcher.core.train_settings import TrainSettings
from searcher.errors import check_int, check_number, shown
from searcher.limits import MAX_CONFIRM_CANDIDATES, MAX_CONFIRM_SEEDS


# objective name -> cost column minimised beside accuracy (None: accuracy alone)
OBJECTIVES = {"accuracy": None, "params": "params", "macs": "macs", "activation": "peak_activation_bytes"}


CARRIED = ("skip_unreadable",)  # settings a run keeps from its start: later commands take them, never compare them


@dataclass(frozen=True)
class RunConfig:
    """What a run searches; fixed for the life of its study."""

    space_name: str
    space_text: str  # the space file's text, so every worker searches the same space
    budget: dict[str, Any]  # Budget fields
    train: dict[str, Any]  # TrainSettings fields
    data: str  # "demo" or the path given
    data_fingerprint: str
    classes: int
    class_names: tuple[str, ...]
    objective: str  # a key of OBJECTIVES
    seed: int
    metric: str = "accuracy"  # the score ranked, pruned, fronted and exported by (runs before --metric: accuracy)
    skip_unreadable: bool = False  # unreadable images were skipped: so are they in every later command on the run

    def digest(self) -> str:
        """What the run searches, in 12 hex digits; how its data was read (CARRIED) is left out."""
        searched = {k: v for k, v in self.__dict__.items() if k not in CARRIED}
        return hashlib.sha256(json.dumps(searched, sort_keys=True, default=list).encode()).hexdigest()[:12]

    def to_dict(self) -> dict:
        return {**self.__dict__, "class_names": list(self.class_names)}

    @classmethod
    def from_dict(cls, data: dict) -> RunConfig:
        return cls(**{**data, "class_names": tuple(data["class_names"])})


def config_changes(old: RunConfig, new: RunConfig) -> list[str]:
    """What differs between a run's stored configuration and the one asked for, as 'key: old -> new'."""
    changes = []
    for key in old.__dict__:
        before, after = getattr(old, key), getattr(new, key)
        if before == after or key in CARRIED:
            continue
        if isinstance(before, dict):
            keys = sorted(set(before) | set(after), key=str)
            changes += [f"{key}.{k}: {before.get(k)!r} -> {after.get(k)!r}" for k in keys if before.get(k) != after.get(k)]
        elif key == "space_text":
            changes.append("the space file's text")
        else:
            changes.append(f"{key}: {shown(before)} -> {shown(after)}")
    return changes


def full_schedule(settings: TrainSettings) -> TrainSettings:
    """The export's schedule: twice the proxy's epochs (at least 18) on the whole training split."""
    return replace(settings, epochs=max(18, 2 * settings.epochs), train_fraction=1.0)


@dataclass(frozen=True)
class ConfirmSettings:
    """How the front is confirmed after the proxy search; the search command's --confirm options."""

    seeds: int = 3  # full-schedule trainings per confirmed candidate, each with its own seed; 0: no confirmation
    most: int = 8  # at most this many candidates from on or near the fronts
    extra: int = 2  # plus this many trained candidates from elsewhere, drawn at random (checks the ranking lower down)
    tolerance: float | None = None  # accuracy the default pick may give up against the best; None: 2 standard errors

    @property
    def on(self) -> bool:
        return self.seeds > 0

    def check(self) -> None:
        """Each option within its bounds, named as the command line spells it."""
        check_int(self.seeds, "--confirm", 0, MAX_CONFIRM_SEEDS)
        check_int(self.most, "--confirm-candidates", 1, MAX_CONFIRM_CANDIDATES)
        check_int(self.extra, "--confirm-random", 0, MAX_CONFIRM_CANDIDATES)
        if self.tolerance is not None:
            check_tolerance(self.tolerance)


def check_tolerance(value: object) -> float:
    """An accuracy difference the default pick may give up: a number in [0, 1) (0.01 is one point)."""
    return check_number(value, "--tolerance", 0, 1, high_open=True)
