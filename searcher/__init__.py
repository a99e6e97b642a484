"""searcher: find a small image classifier that fits a fixed hardware budget.

>>> import searcher
>>> space = searcher.load_space(searcher.builtin_space("mcu"))
>>> arch = space.random(seed=0)
>>> searcher.cost(arch).params == sum(p.numel() for p in searcher.build(arch).parameters())
True

The torch-free part (spaces, architectures, cost, budget, census) is imported at once; what
needs torch (``build``, ``search``, ``export``) is imported on first use, so ``import searcher``
and the ``cost`` and ``census`` commands start without loading torch.
"""

from __future__ import annotations

import importlib
from typing import Any

from searcher.core.arch import Arch, Conv, Head, Pool, Stage, parse_arch
from searcher.core.budget import Budget, Violation
from searcher.core.census_report import Census, CensusSettings
from searcher.core.cost import Cost, LayerCost, cost
from searcher.core.space import Space
from searcher.core.space_file import builtin_space, load_space
from searcher.errors import SearcherError

# public name -> the module that defines it; loaded on first use because it loads torch
_LATE = {
    "build": "searcher.model.build",
    "census": "searcher.results.census_files",
    "search": "searcher.results.outcome",
    "SearchSettings": "searcher.study.run",
    "SearchOutcome": "searcher.results.outcome",
    "ConfirmSettings": "searcher.run.confirmation",
    "status": "searcher.results.status",
    "report": "searcher.results.status",
    "export": "searcher.ship.export",
    "ExportSettings": "searcher.ship.export",
    "ExportOutcome": "searcher.ship.export",
}


def __getattr__(name: str) -> Any:
    if name in _LATE:
        value = getattr(importlib.import_module(_LATE[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'searcher' has no attribute {name!r}")


__all__ = [
    "Arch", "Budget", "Census", "CensusSettings", "Conv", "Cost", "Head", "LayerCost", "Pool", "SearcherError",
    "Space", "Stage", "Violation", "builtin_space", "cost", "load_space", "parse_arch", *_LATE,
]
