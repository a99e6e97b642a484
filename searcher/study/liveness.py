"""Telling live trials from dead ones, so a killed worker costs one candidate and no more.

Optuna 5 heartbeats run only inside ``study.optimize()`` on RDB storages, and a killed trial
otherwise stays RUNNING for ever. So each trial is claimed right after it is asked: the
worker's host and process id go on the trial (``worker``), and a training worker stamps
``heartbeat`` every few seconds. A RUNNING trial is dead when its process is gone (same
host), its stamps stopped (another host), or it was never claimed — killed inside Optuna's
``ask`` — and either no other worker of the run is alive on this machine (the run's own store,
where every worker registers in ``runs/<name>/workers/``) or it is older than a grace period.
Dead trials are failed, marked ``interrupted``, and their parameters queued once more.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import time
from pathlib import Path
from types import TracebackType

import optuna
from optuna.trial import TrialState

from searcher.run.records import HEARTBEAT, INTERRUPTED, RECORD, record_of, worker_id
from searcher.run.folders import pid_alive
from searcher.study.optuna_private import set_trial_attr

log = logging.getLogger(__name__)

WORKER = "worker"
HEARTBEAT_SECONDS = 20.0  # how often a training worker says it is alive
STALE_SECONDS = 120.0  # no heartbeat for this long: the worker on another host is gone
UNCLAIMED_SECONDS = 60.0  # asked but never claimed for this long: the worker died at once


def claim(trial: optuna.Trial) -> None:
    """Mark the trial as this process's, before anything else happens to it."""
    trial.set_user_attr(WORKER, worker_id())


class Registry:
    """The workers of one run on this machine, one file each; used to judge unclaimed trials.

    Only meaningful when every worker of the study runs here (SQLite or journal store in the run
    folder): then an unclaimed RUNNING trial with no other live worker around is a kill's leftover.
    """

    def __init__(self, folder: Path) -> None:
        self.folder = folder / "workers"
        self.path = self.folder / f"{socket.gethostname()}-{os.getpid()}"

    def __enter__(self) -> Registry:
        self.folder.mkdir(parents=True, exist_ok=True)
        self.path.write_text(str(os.getpid()))
        return self

    def __exit__(self, *exc: object) -> None:
        self.path.unlink(missing_ok=True)

    def others_alive(self, prune: bool = True) -> bool:
        """Is another registered worker of this run alive on this machine? Prunes dead entries unless
        told not to (a command that only reads writes nothing)."""
        host = socket.gethostname()
        alive = False
        for entry in self.folder.glob(f"{host}-*"):
            pid = int(entry.name.rsplit("-", 1)[1])
            if pid == os.getpid():
                continue
            if pid_alive(pid):
                alive = True
            elif prune:
                entry.unlink(missing_ok=True)
        return alive


def is_dead(trial: optuna.trial.FrozenTrial, now: float, host: str, alone: bool = False) -> bool:
    """``alone``: this is the only live worker of a run whose workers all run on this machine."""
    worker = trial.user_attrs.get(WORKER)
    if worker is None:
        started = trial.datetime_start.timestamp() if trial.datetime_start else now
        return alone or now - started > UNCLAIMED_SECONDS
    if worker["pid"] == os.getpid() and worker["host"] == host:
        return False
    if worker["host"] == host:
        return not pid_alive(worker["pid"])
    last = trial.user_attrs.get(HEARTBEAT) or worker["started"]
    return now - last > STALE_SECONDS


def recover_stale(study: optuna.Study, registry: Registry | None = None) -> list[int]:
    """Fail every dead RUNNING trial as interrupted and queue its parameters again (once).

    ``registry``: the run's local worker registry, given when the store is the run's own.
    Also queues the retry of any interrupted trial that lacks one: a kill between ending a trial and
    queueing its copy would otherwise lose the retry. (A candidate skipped for lack of time is not
    owed one: the sampler may propose it again when there is time.)
    """
    now, host = time.time(), socket.gethostname()
    trials = study.get_trials(deepcopy=False)
    running = [t for t in trials if t.state == TrialState.RUNNING]
    alone = registry is not None and bool(running) and not registry.others_alive()
    recovered = []
    for trial in running:
        if not is_dead(trial, now, host, alone):
            continue
        record = record_of(trial) | {"state": INTERRUPTED, "reason": "its worker died; queued again"}
        try:
            set_trial_attr(study, trial, RECORD, record)
            study.tell(trial.number, state=TrialState.FAIL)
        except (ValueError, optuna.exceptions.UpdateFinishedTrialError):
            continue  # another worker recovered it first
        recovered.append(trial.number)
        log.info("trial %d was left running by a worker that died: marked interrupted, queued again", trial.number)
    retried = {t.user_attrs.get("retry_of") for t in trials}
    for trial in trials:
        owed = trial.number in recovered or (
            trial.state == TrialState.FAIL and record_of(trial).get("state") == INTERRUPTED)
        if owed and trial.number not in retried and trial.params:
            queue_retry(study, trial)
    return recovered


def queue_retry(study: optuna.Study, trial: optuna.trial.FrozenTrial | optuna.Trial) -> None:
    """Queue the trial's parameters once more, marked as its retry, unless it already was the retry.

    Two workers that queue the same retry at once cost nothing: the second copy finds the first
    one running or finished and yields to it or reuses its outcome.
    """
    if trial.user_attrs.get("retry_of") is None:
        study.enqueue_trial(dict(trial.params), user_attrs={"retry_of": trial.number})


class Heartbeat:
    """While training runs, a thread stamps the trial every few seconds so others can tell it is alive.

    The first stamp comes after HEARTBEAT_SECONDS: until then the claim's time stands.
    """

    def __init__(self, study: optuna.Study, trial: optuna.Trial) -> None:
        self.study, self.trial = study, trial
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True, name="searcher-heartbeat")

    def _run(self) -> None:
        while not self._stop.wait(HEARTBEAT_SECONDS):
            try:
                set_trial_attr(self.study, self.trial, HEARTBEAT, time.time())
            except (OSError, ConnectionError, optuna.exceptions.StorageInternalError) as exc:
                log.debug("heartbeat failed (the next one retries): %s", exc)  # must not stop training

    def __enter__(self) -> Heartbeat:
        self._thread.start()
        return self

    def __exit__(self, kind: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None) -> None:
        self._stop.set()

