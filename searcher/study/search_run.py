"""Running a search: prepare the run, open its study, run its workers through their phases.

What the search leaves (its result files, its summary) is :mod:`searcher.results.outcome`'s, one floor up;
``searcher.search`` runs both.
"""

from __future__ import annotations

import contextlib
import json
import logging
import shutil
import sqlite3
import time
from dataclasses import asdict, dataclass
from pathlib import Path

import optuna

from searcher.data.load import save_decoded, save_split
from searcher.errors import SearcherError
from searcher.redact import redact
from searcher.files import write_atomic
from searcher.study.ending import Phases
from searcher.study.launch import TrainerFor, run_phases
from searcher.study.processes import run_workers
from searcher.study.run import PreparedRun, SearchSettings, prepare
from searcher.study.studies import open_study, study_exists

log = logging.getLogger(__name__)


@dataclass
class Searched:
    """A search that has run: what the results are read from."""

    run: PreparedRun
    study: optuna.Study
    phases: Phases
    seconds: float  # wall time of the phases


def run_search(settings: SearchSettings, budget: dict | None = None, train: dict | None = None, *,
               trainer_for: TrainerFor | None = None) -> Searched:
    """Run (or continue) the search ``settings.name`` and its confirmation; see ``searcher.search``."""
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
    return Searched(run, study, phases, time.time() - started)


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
