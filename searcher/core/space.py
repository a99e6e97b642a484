"""A search space: the family of conv-pool networks a space file describes, and how to draw from it.

A space is described once, as its list of :class:`Decision` s in a fixed order
(:attr:`Space.decisions`): each names a choice, its options, and the choice it depends on (the
stages beyond the depth drawn, the hidden layers beyond the count drawn do not exist). Everything
else reads that list: :meth:`Space.assemble` asks a *picker* for each active decision — an Optuna
trial (``suggest``), a seeded random generator (``random``), an odometer that walks every
combination (``enumerate``), or stored values (``replay``) — and :meth:`Space.size` and the
census (:mod:`searcher.core.census`) count from it. A new decision is one entry in the list.
"""

from __future__ import annotations

import functools
import math
import random
from dataclasses import dataclass, field
from typing import Any, Callable, Iterator, Sequence

from searcher.core.arch import POOLS, Arch, Conv, Head, Pool, Stage
from searcher.core.budget import Budget



@dataclass(frozen=True)
class Decision:
    """One choice the space offers; its name is also the Optuna parameter's."""

    name: str  # e.g. "convs_2" (stage 2's conv count)
    options: tuple[Any, ...]
    ordered: bool = False  # the options are a consecutive integer range (suggested as an int)
    needs: tuple[str, int] | None = None  # active only when decision needs[0] drew at least needs[1]
    costs: bool = True  # changes some cost; the census enumerates only these (the rest multiply)


# A picker returns one of ``decision.options``. ``weights`` (relative counts of configurations behind
# each option; None when all are alike) make random draws uniform over whole configurations.
Picker = Callable[[Decision, Sequence[int] | None], Any]

SECTIONS = {
    "name": None,
    "description": None,
    "input": ("channels", "size", "sizes", "classes"),
    "stages": ("count", "convs", "first_width", "growth", "max_width", "round_to"),
    "conv": ("kernel", "padding", "stride", "activation", "batch_norm"),
    "pool": ("kind", "window", "stride"),
    "head": ("features", "hidden", "hidden_width", "dropout"),
    "budget": None,  # checked by Budget.from_table
    "target": ("core", "clock"),  # the core and clock a latency budget is judged on (searcher.core.latency)
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

    @property
    def data_shape(self) -> tuple[int, int, int]:
        """(channels, height, width) at the largest input size: the run's data is held at this size,
        and a candidate with a smaller input gets it resized from there."""
        h, w = max(self.resolutions, key=lambda r: r[0] * r[1])
        return self.channels, h, w

    def stage_convs(self, stage: int) -> tuple[int, int]:
        return self.convs[min(stage, len(self.convs) - 1)]

    # -- the decisions ----------------------------------------------------------------------------
    @functools.cached_property
    def decisions(self) -> tuple[Decision, ...]:
        """Every decision in the order assembly asks for it (see the module docstring)."""
        most_stages, most_hidden = self.stage_count[1], self.hidden_count[1]
        found = [Decision("resolution", self.resolutions),
                 Decision("stages", tuple(_span(self.stage_count)), ordered=True),
                 Decision("first_width", self.first_width)]
        for i in range(1, most_stages + 1):
            needs = ("stages", i)
            found += [Decision(f"convs_{i}", tuple(_span(self.stage_convs(i - 1))), ordered=True, needs=needs),
                      Decision(f"kernel_{i}", self.kernels, needs=needs),
                      Decision(f"pool_{i}", self.pools, needs=needs)]
        found += [Decision("activation", self.activations, costs=False),
                  Decision("batch_norm", self.batch_norm),
                  Decision("features", self.features),
                  Decision("hidden", tuple(_span(self.hidden_count)), ordered=True)]
        found += [Decision(f"hidden_width_{k}", self.hidden_widths, needs=("hidden", k)) for k in range(1, most_hidden + 1)]
        found.append(Decision("dropout", self.dropouts, costs=False))
        return tuple(found)

    def decision(self, name: str) -> Decision:
        return next(d for d in self.decisions if d.name == name)

    def weights(self, decision: Decision) -> tuple[int, ...] | None:
        """Configurations behind each option of ``decision``: its dependants' option counts multiplied
        (None when every option stands for as many)."""
        dependants = [d for d in self.decisions if d.needs and d.needs[0] == decision.name]
        if not dependants:
            return None
        return tuple(math.prod(len(d.options) for d in dependants if value >= d.needs[1])
                     for value in decision.options)

    def active(self, decision: Decision, choices: dict[str, Any]) -> bool:
        """Does ``decision`` exist, given the choices made so far?"""
        return decision.needs is None or choices[decision.needs[0]] >= decision.needs[1]

    def size(self) -> int:
        """Exact number of configurations: free decisions multiply, each gate adds its options' weights."""
        total = 1
        for d in self.decisions:
            if d.needs is None:
                weights = self.weights(d)
                total *= sum(weights) if weights else len(d.options)
        return total

    # -- assembly -------------------------------------------------------------------------------
    def assemble(self, pick: Picker, classes: int | None = None) -> Arch:
        """Build one architecture, asking ``pick`` for every active decision with more than one option."""
        choices: dict[str, Any] = {}
        for d in self.decisions:
            if self.active(d, choices):
                choices[d.name] = pick(d, self.weights(d)) if len(d.options) > 1 else d.options[0]
        return self.arch_of(choices, classes)

    def arch_of(self, choices: dict[str, Any], classes: int | None = None) -> Arch:
        """The architecture a full set of choices names (inactive decisions may be left out)."""
        h, w = choices["resolution"]
        first = choices["first_width"]
        stages = []
        for i in range(choices["stages"]):
            kernel, pool = choices[f"kernel_{i + 1}"], choices[f"pool_{i + 1}"]
            convs = tuple(Conv(self.stage_width(i, first), kernel, self.stride, self.padding)
                          for _ in range(choices[f"convs_{i + 1}"]))
            stages.append(Stage(convs, None if pool == "none" else Pool(pool, self.pool_window, self.pool_stride)))
        hidden = tuple(choices[f"hidden_width_{k + 1}"] for k in range(choices["hidden"]))
        head = Head(choices["features"], hidden, choices["dropout"], classes or self.classes)
        return Arch((self.channels, h, w), tuple(stages), head, choices["activation"], choices["batch_norm"])

    def suggest(self, trial: Any, classes: int | None = None) -> Arch:
        """Draw through an Optuna trial; an input size goes to Optuna as text such as '32x32'."""

        def pick(decision: Decision, weights: Sequence[int] | None) -> Any:
            options = decision.options
            if decision.ordered:
                return trial.suggest_int(decision.name, options[0], options[-1])
            if isinstance(options[0], tuple):
                return _size(trial.suggest_categorical(decision.name, [_size_text(o) for o in options]))
            return trial.suggest_categorical(decision.name, list(options))

        return self.assemble(pick, classes)

    def random(self, seed: int | random.Random, classes: int | None = None) -> Arch:
        """A seeded draw, uniform over whole configurations.

        >>> from searcher.core.space_file import builtin_space, load_space
        >>> space = load_space(builtin_space("mcu"))
        >>> space.random(0) == space.random(0)
        True
        """
        rng = seed if isinstance(seed, random.Random) else random.Random(seed)

        def pick(decision: Decision, weights: Sequence[int] | None) -> Any:
            if weights is None:
                return decision.options[rng.randrange(len(decision.options))]
            return rng.choices(decision.options, weights)[0]

        return self.assemble(pick, classes)

    def replay(self, choices: dict[str, Any], classes: int | None = None) -> Arch:
        """The architecture behind named decisions (an Optuna trial's params, a census row);
        a decision not named takes its first option."""

        def pick(decision: Decision, weights: Sequence[int] | None) -> Any:
            value = choices.get(decision.name, decision.options[0])
            return _size(value) if isinstance(value, str) and decision.name == "resolution" else value

        return self.assemble(pick, classes)

    def enumerate(self, classes: int | None = None) -> Iterator[Arch]:
        """Every configuration once, depth-first (an odometer over the decisions)."""
        path: list[int] = []
        while True:
            counts: list[int] = []

            def pick(decision: Decision, weights: Sequence[int] | None) -> Any:
                k = len(counts)
                counts.append(len(decision.options))
                return decision.options[path[k] if k < len(path) else 0]

            yield self.assemble(pick, classes)
            path = (path + [0] * len(counts))[: len(counts)]
            i = len(counts) - 1
            while i >= 0 and path[i] + 1 >= counts[i]:
                i -= 1
            if i < 0:
                return
            path = path[:i] + [path[i] + 1]


def _size_text(size: tuple[int, int]) -> str:
    return f"{size[0]}x{size[1]}"


def _size(text: str | tuple[int, int]) -> tuple[int, int]:
    """An input size from Optuna's text form '32x32' (or the pair itself)."""
    if isinstance(text, str):
        h, w = text.split("x")
        return int(h), int(w)
    return tuple(text)


def _span(bounds: tuple[int, int]) -> list[int]:
    return list(range(bounds[0], bounds[1] + 1))
