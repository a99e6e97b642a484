"""searcher: find a small image classifier that fits a fixed hardware budget.

>>> import searcher
>>> space = searcher.load_space(searcher.builtin_space("mcu"))
>>> arch = space.random(seed=0)
>>> searcher.cost(arch).params == sum(p.numel() for p in searcher.build(arch).parameters())
True
"""

from searcher.arch import Arch, Conv, Head, Pool, Stage, parse_arch
from searcher.budget import Budget, Violation
from searcher.cost import Cost, LayerCost, cost
from searcher.errors import SearcherError
from searcher.space import Space, builtin_space, load_space


def build(arch: Arch):
    """The torch module for ``arch`` (imports torch only when called)."""
    from searcher.build import build as _build

    return _build(arch)


__all__ = [
    "Arch", "Budget", "Conv", "Cost", "Head", "LayerCost", "Pool", "SearcherError", "Space", "Stage",
    "Violation", "build", "builtin_space", "cost", "load_space", "parse_arch",
]
