"""Reading a run that may still be running, without disturbing it: ``searcher status`` and ``report``.

Both read the stored study only (every trial's record), so they work on a run another process or
machine is writing, and they write nothing but, for ``report``, the run's own result files.
"""

from __future__ import annotations

import socket
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from optuna.trial import TrialState

from searcher.core.budget import Budget
from searcher.redact import redact
from searcher.run.records import HEARTBEAT, METRICS, best_row, counts, trials_frame
from searcher.results.tables import RESULT_FILES, gather, write_results
from searcher.run.folders import RUNS, check_run_paths
from searcher.study.liveness import Registry, is_dead
from searcher.run.config import RunConfig
from searcher.study.studies import open_run
from searcher.study.stores import storage_url


@dataclass(frozen=True)
class RunningTrial:
    """A trial some worker holds now, and whether that worker still looks alive."""

    number: int
    worker: str  # host:pid
    heartbeat_age: float | None  # seconds since its last heartbeat; None before the first
    dead: bool  # its worker looks gone: the next search run retries it


@dataclass(frozen=True)
class RunStatus:
    """What ``searcher status`` shows."""

    name: str
    config: RunConfig
    counts: dict[str, int]  # distinct candidates by state, with 'tried' and 'repeats' (see records.counts)
    training_seconds: float  # training time spent over the run's life
    best: dict[str, Any] | None  # the best fully trained candidate that fits
    running: tuple[RunningTrial, ...]

    def lines(self) -> list[str]:
        c, config = self.counts, self.config
        metric = METRICS[config.metric]
        lines = [
            f"run {self.name}: space {config.space_name}, data {redact(config.data)}, objective {config.objective}",
            f"budget: {Budget(**config.budget).describe()}",
            f"tried {c['tried']}: rejected {c['rejected']}, trained {c['trained']}, stopped early "
            f"{c['stopped_early']}, failed {c['failed']}, interrupted {c['interrupted']}, running {c['running']}"
            + (f"; {c['repeats']} more reused a known outcome without training" if c["repeats"] else ""),
            f"training time used: {self.training_seconds / 60:.1f} min",
            "best fitting: " + (f"trial {self.best['trial']} {metric.label} {self.best[metric.column]:.4f} "
                                f"{self.best['arch']}" if self.best else "none yet"),
        ]
        for t in self.running:
            beat = "-" if t.heartbeat_age is None else f"{t.heartbeat_age:.0f} s ago"
            lines.append(f"  running: trial {t.number} on {t.worker}, last heartbeat {beat}, "
                         + ("looks dead (will be retried)" if t.dead else "alive"))
        return lines


def status(name: str, storage: str | None = None, root: Path = RUNS) -> RunStatus:
    """The state of run ``name``: counts, best so far, and who is training what.

    >>> import searcher
    >>> print("\\n".join(searcher.status("demo").lines()))   # doctest: +SKIP
    """
    folder, study, config = open_run(name, storage, root)
    frame = trials_frame(study)
    now, host = time.time(), socket.gethostname()
    alone = storage is None and not Registry(folder).others_alive(prune=False)  # no worker of this run is alive here
    running = []
    for t in study.get_trials(deepcopy=False, states=(TrialState.RUNNING,)):
        worker = t.user_attrs.get("worker", {})
        beat = t.user_attrs.get(HEARTBEAT)
        running.append(RunningTrial(t.number, f"{worker.get('host', '?')}:{worker.get('pid', '?')}",
                                    None if beat is None else now - beat, is_dead(t, now, host, alone)))
    return RunStatus(name, config, counts(frame), float(frame["train_seconds"].sum()),
                     best_row(frame, Budget(**config.budget).caps(), METRICS[config.metric]), tuple(running))


def report(name: str, storage: str | None = None, root: Path = RUNS) -> list[Path]:
    """Rebuild the result files of run ``name`` (trials.csv, front.csv, confirmed.csv, summary.json,
    report.html) from its stored studies."""
    folder, study, config = open_run(name, storage, root)
    check_run_paths(folder, files=("split.npz", *RESULT_FILES), folders=())  # before the work: said plainly
    results = gather(name, study, storage_url(storage, folder), config, folder)
    return write_results(folder, results, title=f"searcher run {name}",
                         notes=[f"space {config.space_name}; data {config.data}; objective {config.objective}",
                                f"rebuilt {time.strftime('%Y-%m-%d %H:%M:%S')}"])
