"""``searcher search`` as a library call: run the search, then write what it found and sum it up.

>>> import searcher                                                            # doctest: +SKIP
>>> outcome = searcher.search(searcher.SearchSettings(name="demo", space="spaces/mcu.toml", trials=10))  # doctest: +SKIP
>>> outcome.exit_status, outcome.best["arch"]                                   # doctest: +SKIP
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from searcher.results.tables import gather, write_results
from searcher.run.confirmation import Confirmation
from searcher.run.records import ACCURACY, REJECTED, Metric, best_row, counts
from searcher.study.ending import StopReason
from searcher.study.launch import TrainerFor
from searcher.study.run import SearchSettings
from searcher.study.search_run import Searched, run_search


@dataclass
class SearchOutcome:
    """What a search invocation did; ``exit_status`` is what the command returns."""

    folder: Path
    counts: dict[str, int]
    best: dict[str, Any] | None  # the best fully trained candidate by its proxy accuracy
    stop: StopReason
    rejected_share: list[float] = field(default_factory=list)  # share rejected per block of 50 proposals
    rejected_by: dict[str, int] = field(default_factory=dict)  # rejections by the caps they broke
    seconds: float = 0.0
    proxy_seconds: float = 0.0  # wall time of the proxy search (the slowest worker's)
    confirm_seconds: float = 0.0  # wall time of the confirmation that followed
    confirmation: Confirmation | None = None  # what confirmation found (None when it is off or nothing ran)
    metric: Metric = ACCURACY  # the score the search ranked by
    spread: str = ""  # how the trained candidates spread over cost, in one line

    @property
    def exit_status(self) -> int:
        return self.stop.exit_status


def search(settings: SearchSettings, budget: dict | None = None, train: dict | None = None, *,
           trainer_for: TrainerFor | None = None) -> SearchOutcome:
    """Run (or continue) the search ``settings.name``, confirm its front, and write its results.

    ``budget`` and ``train`` override keys of the space file's [budget] and [train] tables (as the
    command line's options do). ``trainer_for(run, threads)`` makes the trainer of a single-worker
    search in place of the torch one (see :func:`searcher.study.launch.run_worker`).
    """
    return finish(run_search(settings, budget, train, trainer_for=trainer_for))


def finish(searched: Searched) -> SearchOutcome:
    """Write the result files and sum the run up."""
    run, study, phases, seconds = searched.run, searched.study, searched.phases, searched.seconds
    results = gather(run.settings.name, study, run.url, run.config, run.folder, run.settings.confirm.tolerance)
    times = {"seconds": round(seconds, 1), "proxy_seconds": round(phases.proxy_seconds, 1),
             "confirm_seconds": round(phases.confirm_seconds, 1)}
    write_results(run.folder, results, title=f"searcher run {run.settings.name}",
                  notes=[f"space {run.space.name}; data {run.settings.data}; objective {run.settings.objective}",
                         f"stopped: {phases.stop.text}"], extra={"time": times, "stopped": phases.stop.text})
    frame, proposals = results.frame, phases.proposals
    blocks = [proposals[i:i + 50] for i in range(0, len(proposals), 50)]
    share = [sum(p == REJECTED for p in b) / len(b) for b in blocks if b]
    rejected_by = frame.loc[frame["state"] == REJECTED, "rejected_by"].value_counts().to_dict()
    return SearchOutcome(run.folder, counts(frame), best_row(frame, run.budget.caps(), results.metric), phases.stop, share,
                         {str(k): int(v) for k, v in rejected_by.items()}, seconds, phases.proxy_seconds,
                         phases.confirm_seconds, results.confirmation, results.metric, results.spread_words())
