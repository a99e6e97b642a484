"""Helpers for tests that run `searcher search` in a subprocess and look at what it left behind.

A run keeps its study in runs/<name>/study.db (SQLite). The tests read it two ways: through
Optuna once the run has ended, and with plain SQL while it runs (a read in WAL mode never blocks
the writer, and it needs no Optuna import in the polling loop).
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path
from typing import Any, Iterator

import optuna
from conftest import TINY_SPACE

# The shared tiny space (12x12 or 16x16 input, 2-8 channels) without its caps, so nothing is rejected
# and every candidate trains in a second or so on the demo data.
FAST_SPACE = TINY_SPACE.split("[budget]")[0]

SAFETY_SECONDS = 240.0  # a hung process fails the test instead of blocking the suite; never the assertion


def write_space(folder: Path, extra: str = "", name: str = "space.toml") -> Path:
    """FAST_SPACE (plus ``extra`` TOML, e.g. a [train] table) written to ``folder``."""
    path = folder / name
    path.write_text(FAST_SPACE + extra, encoding="utf-8")
    return path


def search_args(space: Path, name: str, *extra: str) -> list[str]:
    """The command line of a small, quick search on the demo data."""
    return [sys.executable, "-m", "searcher", "search", "--space", str(space), "--data", "demo", "--name", name,
            "--train-fraction", "0.2", "--confirm", "0", *extra]


def child_env() -> dict[str, str]:
    """One torch thread per child: on a busy 2-core machine extra threads only wait for each other."""
    return {**os.environ, "OMP_NUM_THREADS": "1", "PYTHONUNBUFFERED": "1"}


def start(args: list[str], cwd: Path, tag: str) -> subprocess.Popen:
    """Start a command with its output in cwd/<tag>.out and .err (files, so a full pipe never blocks it)."""
    out = open(cwd / f"{tag}.out", "w")
    err = open(cwd / f"{tag}.err", "w")
    return subprocess.Popen(args, cwd=cwd, stdout=out, stderr=err, env=child_env())


def run(args: list[str], cwd: Path, tag: str = "run") -> tuple[int, str, str]:
    """Run a command to its end: (exit status, stdout, stderr)."""
    process = start(args, cwd, tag)
    code = process.wait(timeout=SAFETY_SECONDS)
    return code, (cwd / f"{tag}.out").read_text(), (cwd / f"{tag}.err").read_text()


def db_path(cwd: Path, name: str) -> Path:
    return cwd / "runs" / name / "study.db"


def trial_rows(db: Path) -> list[dict[str, Any]]:
    """Every trial's number, Optuna state and the user attributes searcher writes, read with plain SQL."""
    if not db.exists():
        return []
    try:
        with sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=5) as connection:
            states = connection.execute("SELECT trial_id, number, state FROM trials").fetchall()
            attrs = connection.execute("SELECT trial_id, key, value_json FROM trial_user_attributes "
                                       "WHERE key IN ('searcher', 'worker')").fetchall()
    except sqlite3.OperationalError:  # tables not created yet
        return []
    rows = {trial_id: {"number": number, "state": state, "searcher": {}, "worker": {}}
            for trial_id, number, state in states}
    for trial_id, key, value in attrs:
        rows[trial_id][key] = json.loads(value)
    return sorted(rows.values(), key=lambda r: r["number"])


def training_now(db: Path, pid: int | None = None) -> list[int]:
    """Numbers of the RUNNING trials whose record says they train (by process ``pid``, if given).

    The pid matters after a kill: the dead process's trial still looks like this until the next run
    cleans it up.
    """
    return [r["number"] for r in trial_rows(db) if r["state"] == "RUNNING" and r["searcher"].get("state") == "training"
            and (pid is None or r["worker"].get("pid") == pid)]


def wait_until_training(process: subprocess.Popen, db: Path, poll: float = 0.01) -> list[int]:
    """Poll until a candidate of this process trains; fail if the process ends first.

    Polled every 10 ms (a read-only SQLite query takes a millisecond or two): a small candidate past
    its first trains for 50-400 ms here, and a 100 ms poll missed every window of a run now and then.
    """
    give_up = time.monotonic() + SAFETY_SECONDS
    while time.monotonic() < give_up:
        numbers = training_now(db, process.pid)
        if numbers:
            return numbers
        if process.poll() is not None:
            raise AssertionError(f"the search ended (status {process.returncode}) before any candidate trained")
        time.sleep(poll)
    raise AssertionError("no candidate started training within the safety limit")


def stop(process: subprocess.Popen, signum: int = signal.SIGKILL) -> int:
    """Send a signal and wait for the process to end; its exit status (negative: killed by a signal)."""
    process.send_signal(signum)
    return process.wait(timeout=SAFETY_SECONDS)


def load(cwd: Path, name: str) -> optuna.Study:
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    return optuna.load_study(study_name=name, storage=f"sqlite:///{db_path(cwd, name)}")


def finished(study: optuna.Study) -> dict[int, tuple[str, Any, str]]:
    """Trial number -> (Optuna state, values, our state) of every finished trial."""
    from searcher.run.records import record_of

    return {t.number: (t.state.name, t.values, record_of(t).get("state"))
            for t in study.get_trials(deepcopy=False) if t.state.is_finished()}


@contextlib.contextmanager
def in_process() -> Iterator[None]:
    """For a search run inside the test process: one torch thread, and signal handlers put back after."""
    import torch

    handlers = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)}
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    try:
        yield
    finally:
        torch.set_num_threads(threads)
        for s, handler in handlers.items():
            signal.signal(s, handler)


def search_here(folder: Path, space: Path, name: str, train: dict | None = None, trainer_for: Any = None,
                budget: dict | None = None, **fields: Any):
    """searcher.search in this process on the demo data, runs under folder/runs; returns its outcome.
    Confirmation is off unless ``confirm`` is given."""
    from searcher.run.config import ConfirmSettings
    from searcher.study.run import SearchSettings
    from searcher.results.outcome import search

    fields.setdefault("confirm", ConfirmSettings(seeds=0))
    settings = SearchSettings(name=name, space=str(space), root=folder / "runs", **fields)
    with in_process():
        return search(settings, budget, train={"epochs": 1, "train_fraction": 0.2, **(train or {})},
                      trainer_for=trainer_for)


def recording_trainer(built: list[str]):
    """A trainer_for that trains with torch and notes every architecture it was handed (that is, built)."""
    from searcher.study.launch import TorchTrainer

    def make(run, threads):
        inner = TorchTrainer.for_run(run, threads)

        def train(arch, **given):
            built.append(arch.to_text())
            return inner(arch, **given)

        return train

    return make


class StandIn:
    """A Trainer that trains nothing: it notes the seed of each candidate it is handed (the trial number,
    in a run seeded 0: searcher.study.stores.trial_seed) and reports ``accuracy`` after every epoch,
    through the loop's own early-stop callback. Having processed no images, it leaves the measured
    throughput alone."""

    def __init__(self, epochs: int, accuracy: float = 0.5, stop_early: bool = False) -> None:
        self.epochs, self.accuracy, self.stop_early = epochs, accuracy, stop_early
        self.started: list[int] = []

    def __call__(self, arch, *, seed, on_epoch, deadline, progress):
        from searcher.model.metrics import Scores

        self.started.append(seed)
        for epoch in range(self.epochs):
            progress.history.append(self.accuracy)
            progress.val_scores = Scores(self.accuracy, self.accuracy, (self.accuracy,), (1,))
            on_epoch(epoch, self.accuracy)
            if self.stop_early:
                raise optuna.TrialPruned()  # as the loop's own policy would after a poor epoch
        return progress.result()


def memory_worker(tmp_path: Path, *, trials: int = 100, deadline: float | None = None, trainer: Any = None,
                  epochs: int = 2, study: optuna.Study | None = None, train_images: int = 1000):
    """A Worker on an in-memory study (or on ``study``), whose steps a test can take one by one.

    Unless a trainer is given, a :class:`StandIn` trains (``worker.trainer.started`` lists what it was handed).
    """
    from searcher.core.budget import Budget
    from searcher.core.space_file import load_space
    from searcher.core.train_settings import TrainSettings
    from searcher.study.worker import Worker, WorkerPlan

    optuna.logging.set_verbosity(optuna.logging.WARNING)
    if study is None:
        study = optuna.create_study(directions=["maximize"], sampler=optuna.samplers.RandomSampler(seed=3))
    settings = TrainSettings(epochs=epochs, train_fraction=0.5, batch_size=16)
    plan = WorkerPlan(trials=trials, deadline=deadline, candidate_seconds=None, memory_cap=2**40,
                      images_per_epoch=round(settings.train_fraction * train_images))
    return Worker(study, load_space(write_space(tmp_path)), Budget(), settings, "accuracy", 8, plan,
                  trainer or StandIn(epochs))
