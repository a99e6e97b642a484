"""What a run's results say about where its trainings went: the spread over cost in summary.json.

Outside reference: numpy's median over the candidates of the space that fit, enumerated one by one
and costed with ``cost()`` (whose counts tests/test_build.py checks against torch).
"""

from __future__ import annotations

from dataclasses import asdict

import numpy as np
import pandas as pd

from conftest import TINY_SPACE
from searcher.core.cost import cost
from searcher.core.space_file import read_space_text
from searcher.run.records import STOPPED, TRAINED
from searcher.results.tables import RunResults, fitting_medians
from searcher.run.config import RunConfig


def _config(budget: dict) -> RunConfig:
    return RunConfig(space_name="tiny", space_text=TINY_SPACE, budget=budget, train={}, data="demo",
                     data_fingerprint="x", classes=8, class_names=tuple("abcdefgh"), objective="accuracy", seed=0)


def test_fitting_medians_are_the_medians_of_the_candidates_within_the_caps():
    space = read_space_text(TINY_SPACE, "tiny")
    budget = asdict(space.budget) | {"max_params": 3000, "max_macs": 50_000}
    fitting = [c for c in map(cost, space.enumerate(8)) if c.params <= 3000 and c.macs <= 50_000]
    medians = fitting_medians(_config(budget))
    assert medians["params"] == np.median([c.params for c in fitting])  # numpy over the enumerated candidates
    assert medians["macs"] == np.median([c.macs for c in fitting])


def test_spread_counts_trained_and_stopped_candidates_on_each_side_of_the_median():
    frame = pd.DataFrame({"trial": range(7), "state": [TRAINED, TRAINED, TRAINED, STOPPED, STOPPED, "rejected", TRAINED],
                          "params": [100, 900, 1000, 200, 2000, 50, 100], "repeat_of": [None] * 6 + [0]})
    results = RunResults("r", _config({}), frame, None, {}, {"params": 1000.0})
    spread = results.spread()
    assert spread == {"cost": "params", "fitting_median": 1000.0, "trained_below": 2, "trained_above": 1,
                      "stopped_early_below": 1, "stopped_early_above": 1}  # the repeat of trial 0 counted once
    assert "2 below the median params" in results.spread_words()
