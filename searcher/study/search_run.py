"""``searcher search`` as a library call: prepare the run, run its workers, write the results.

>>> import searcher                                                            # doctest: +SKIP
>>> outcome = searcher.search(searcher.SearchSettings(name="demo", space="spaces/mcu.toml", trials=10))  # doctest: +SKIP
>>> outcome.exit_status, outcome.best["arch"]                                   # doctest: +SKIP
"""

from __future__ import annotations

import contextlib
import json
import logging
import shutil
import sqlite3
import time
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import optuna

from searcher.data.load import save_decoded, save_split
from searcher.errors import SearcherError
from searcher.redact import redact
from searcher.run.confirmation import Confirmation
from searcher.run.records import ACCURACY, REJECTED, Metric, best_row, counts
from searcher.results.tables import gather, write_results
from searcher.run.folders import write_atomic
from searcher.study.ending import Phases, StopReason
from searcher.study.launch import TrainerFor, run_phases
from searcher.study.processes import run_workers
from searcher.study.run import PreparedRun, SearchSettings, prepare
from searcher.study.studies import open_study, study_exists

log = logging.getLogger(__name__)


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
    run = prepare(settings, budget, train)
    _keep_earlier_results(run)
    fresh = not run.folder.exists()
    try:
        study, _ = open_study(settings.name, run.url, run.config, settings.sampler)
        run.folder.mkdir(parents=True, exist_ok=True)
        save_split(run.folder / "split.npz", run.data.dataset.indices, run.data.dataset.fingerprint)
        save_decoded(run.folder, run.data.dataset)  # resume and export read these bytes instead of decoding again
        write_atomic(run.folder / "run.json", json.dumps(
            {"settings": {k: str(v) if isinstance(v, Path) else v for k, v in asdict(settings).items()}
             | {"storage": redact(run.url)}, "config": run.config.to_dict()}, indent=2, default=str))
    except BaseException:  # Ctrl-C while the run is set up: a new run leaves nothing behind
        if fresh:
            _forget_fresh_run(run)
        raise
    started = time.time()
    deadline = None if settings.minutes is None else started + settings.minutes * 60
    log.info("run %s: space %s, budget %s, %d classes, data %s; storage %s", settings.name, run.space.name,
             run.budget.describe(), run.config.classes, settings.data, redact(run.url))
    if settings.workers == 1:
        phases = run_phases(run, study, deadline, trainer_for=trainer_for)
    else:
        phases = run_workers(run, deadline)
    return finish(run, study, phases, time.time() - started)


def finish(run: PreparedRun, study: optuna.Study, phases: Phases, seconds: float) -> SearchOutcome:
    """Write the result files and sum the run up."""
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


RESULT_FILES = ("trials.csv", "front.csv", "confirmed.csv", "summary.json", "report.html", "run.json", "search.log",
                "split.npz", "export")


def _forget_fresh_run(run: PreparedRun) -> None:
    """Remove the folder of a run this invocation began and that has no trial yet (its store included,
    when it lives there): an interrupted start leaves no lone empty store behind."""
    store = run.folder / "study.db"
    if store.exists():
        try:
            with contextlib.closing(sqlite3.connect(f"file:{store}?mode=ro", uri=True)) as connection:
                if connection.execute("SELECT count(*) FROM trials").fetchone()[0]:
                    return  # another search of this name got further: its run stays
        except sqlite3.Error:
            pass  # the tables were not even made
    shutil.rmtree(run.folder, ignore_errors=True)
    log.info("run %s: interrupted while it was set up; nothing kept", run.settings.name)


def _keep_earlier_results(run: PreparedRun) -> None:
    """Refuse to start a new study over a run folder whose results came from a study that is gone.

    With ``force``, the earlier files are moved into ``runs/NAME/replaced-TIME/`` first: nothing the
    user has is overwritten either way.
    """
    present = [name for name in RESULT_FILES if (run.folder / name).exists()]
    if not present or study_exists(run.settings.name, run.url):
        return
    if not run.settings.force:
        raise SearcherError(
            f"{run.folder} holds results of an earlier search ({', '.join(present)}) but its study is not in "
            f"{redact(run.url)}; restore the study, use another --name, or give --force to start afresh "
            f"(the earlier files are then moved to {run.folder}/replaced-<time>/)", key="--name")
    aside = run.folder / time.strftime("replaced-%Y%m%d-%H%M%S")
    aside.mkdir(parents=True)
    for name in present:
        (run.folder / name).rename(aside / name)
    log.warning("run %s: started afresh; the earlier results are in %s", run.settings.name, aside)
