"""Search-space files: read and check a TOML file once, then draw architectures from it.

Every architecture is assembled by one function, :meth:`Space.assemble`, which asks a *picker*
for each decision in a fixed order. Three pickers drive it: an Optuna trial (``suggest``), a
seeded random generator (``random``) and an odometer that walks every combination
(``enumerate``). So all three see exactly the same space.
"""

from __future__ import annotations

import functools
import math
import random
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator, Sequence

from searcher.core.arch import POOLS, Arch, Conv, Head, Pool, Stage
from searcher.core.budget import Budget

# A picker returns one of ``options`` for the decision ``name``. ``weights`` (relative counts of
# configurations behind each option) make random draws uniform over whole configurations;
# ``ordered`` says the options are a consecutive integer range.
Picker = Callable[[str, Sequence[Any], Sequence[int] | None, bool], Any]

SECTIONS = {
    "name": None,
    "description": None,
    "input": ("channels", "size", "sizes", "classes"),
    "stages": ("count", "convs", "first_width", "growth", "max_width", "round_to"),
    "conv": ("kernel", "padding", "stride", "activation", "batch_norm"),
    "pool": ("kind", "window", "stride"),
    "head": ("features", "hidden", "hidden_width", "dropout"),
    "budget": None,  # checked by Budget.from_table
    "train": None,  # checked by TrainSettings.from_dict
}
POOL_CHOICES = (*POOLS, "none")


@dataclass(frozen=True)
class Space:
    """A family of conv-pool networks. Tuples of choices; ranges as (min, max)."""

    name: str
    resolutions: tuple[tuple[int, int], ...]  # input (height, width) choices
    channels: int = 1  # input channels
    classes: int = 10  # output classes when no data set says otherwise
    stage_count: tuple[int, int] = (2, 3)
    convs: tuple[tuple[int, int], ...] = ((1, 2),)  # conv range per stage; the last entry repeats
    first_width: tuple[int, ...] = (8, 16)  # channels of stage 1
    growth: float = 2.0  # each stage's width is the previous one times this
    max_width: int | None = None  # ceiling on any stage's width
    round_to: int = 1  # widths rounded to the nearest multiple of this (at least one multiple)
    kernels: tuple[int, ...] = (3,)  # chosen per stage
    padding: str = "same"
    stride: int = 1  # stride of every conv
    activations: tuple[str, ...] = ("relu",)
    batch_norm: tuple[bool, ...] = (True,)
    pools: tuple[str, ...] = ("max",)  # chosen per stage: max, avg or none
    pool_window: int = 2
    pool_stride: int = 2
    features: tuple[str, ...] = ("gap",)  # how the head reads the last map: gap or flatten
    hidden_count: tuple[int, int] = (0, 1)  # number of hidden dense layers
    hidden_widths: tuple[int, ...] = (32,)  # chosen per hidden layer
    dropouts: tuple[float, ...] = (0.0,)
    budget: Budget = field(default_factory=Budget)
    train: dict = field(default_factory=dict)  # raw [train] table, read by TrainSettings.from_dict
    file: str | None = None

    # -- the width rule -------------------------------------------------------------------
    def stage_width(self, stage: int, first: int) -> int:
        """Width of stage ``stage`` (0-based): first·growthˢ, capped, rounded to ``round_to``."""
        width = first * self.growth**stage
        if self.max_width is not None:
            width = min(width, self.max_width)
        return max(self.round_to, int(math.floor(width / self.round_to + 0.5)) * self.round_to)

    def stage_convs(self, stage: int) -> tuple[int, int]:
        return self.convs[min(stage, len(self.convs) - 1)]

    # -- assembly -------------------------------------------------------------------------
    def _stage_options(self, stage: int) -> int:
        lo, hi = self.stage_convs(stage)
        return (hi - lo + 1) * len(self.kernels) * len(self.pools)

    @functools.cached_property
    def configs_by_depth(self) -> list[int]:
        """Number of stage configurations for each allowed depth, shallowest first."""
        lo, hi = self.stage_count
        return [math.prod(self._stage_options(i) for i in range(n)) for n in range(lo, hi + 1)]

    def assemble(self, pick: Picker, classes: int | None = None) -> Arch:
        """Build one architecture from the picker's answers, in a fixed decision order."""
        h, w = pick("resolution", self.resolutions, None, False) if len(self.resolutions) > 1 else self.resolutions[0]
        depth = pick("stages", _span(self.stage_count), self.configs_by_depth, True)
        first = pick("first_width", self.first_width, None, False)
        stages = []
        for i in range(depth):
            n_convs = pick(f"convs_{i + 1}", _span(self.stage_convs(i)), None, True)
            kernel = pick(f"kernel_{i + 1}", self.kernels, None, False)
            pool = pick(f"pool_{i + 1}", self.pools, None, False)
            width = self.stage_width(i, first)
            convs = tuple(Conv(width, kernel, self.stride, self.padding) for _ in range(n_convs))
            stages.append(Stage(convs, None if pool == "none" else Pool(pool, self.pool_window, self.pool_stride)))
        activation = pick("activation", self.activations, None, False)
        batch_norm = pick("batch_norm", self.batch_norm, None, False)
        features = pick("features", self.features, None, False)
        counts = _span(self.hidden_count)
        n_hidden = pick("hidden", counts, [len(self.hidden_widths) ** n for n in counts], True)
        hidden = tuple(pick(f"hidden_width_{k + 1}", self.hidden_widths, None, False) for k in range(n_hidden))
        dropout = pick("dropout", self.dropouts, None, False)
        head = Head(features, hidden, dropout, classes or self.classes)
        return Arch((self.channels, h, w), tuple(stages), head, activation, batch_norm)

    def suggest(self, trial: Any, classes: int | None = None) -> Arch:
        """Draw through an Optuna trial; decisions with one option are not suggested."""

        def pick(name, options, weights, ordered):
            if len(options) == 1:
                return options[0]
            if ordered:
                return trial.suggest_int(name, options[0], options[-1])
            if name == "resolution":
                text = trial.suggest_categorical(name, [f"{a}x{b}" for a, b in options])
                return tuple(int(v) for v in text.split("x"))
            return trial.suggest_categorical(name, list(options))

        return self.assemble(pick, classes)

    def random(self, seed: int | random.Random, classes: int | None = None) -> Arch:
        """A seeded draw, uniform over whole configurations.

        >>> from searcher.core.space_file import builtin_space, load_space
        >>> space = load_space(builtin_space("mcu"))
        >>> space.random(0) == space.random(0)
        True
        """
        rng = seed if isinstance(seed, random.Random) else random.Random(seed)

        def pick(name, options, weights, ordered):
            if weights is None:
                return options[rng.randrange(len(options))]
            return rng.choices(options, weights)[0]

        return self.assemble(pick, classes)

    def replay(self, choices: dict[str, Any], classes: int | None = None) -> Arch:
        """The architecture behind named decisions (an Optuna trial's params, a census row)."""

        def pick(name, options, weights, ordered):
            value = choices.get(name, options[0])
            if name == "resolution" and isinstance(value, str):
                value = tuple(int(v) for v in value.split("x"))
            return value

        return self.assemble(pick, classes)

    def enumerate(self, classes: int | None = None) -> Iterator[Arch]:
        """Every configuration once, depth-first (an odometer over the decisions)."""
        path: list[int] = []
        while True:
            counts: list[int] = []

            def pick(name, options, weights, ordered):
                k = len(counts)
                counts.append(len(options))
                return options[path[k] if k < len(path) else 0]

            yield self.assemble(pick, classes)
            path = (path + [0] * len(counts))[: len(counts)]
            i = len(counts) - 1
            while i >= 0 and path[i] + 1 >= counts[i]:
                i -= 1
            if i < 0:
                return
            path = path[:i] + [path[i] + 1]

    def size(self) -> int:
        """Exact number of configurations."""
        head = sum(len(self.hidden_widths) ** n for n in _span(self.hidden_count))
        rest = len(self.resolutions) * len(self.first_width) * len(self.activations) * len(self.batch_norm)
        return sum(self.configs_by_depth) * rest * len(self.features) * head * len(self.dropouts)


def _span(bounds: tuple[int, int]) -> list[int]:
    return list(range(bounds[0], bounds[1] + 1))
