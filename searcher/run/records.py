"""What each trial records, and the trials table read back from a study.

Every trial carries one user attribute, ``searcher``: a dict with the architecture, its costs and
its outcome. The table below is built from those alone, so ``report`` and ``status`` can read a
study that another process (or machine) is still writing.
"""

from __future__ import annotations

import base64
import math
import os
import socket
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import optuna
import pandas as pd
from optuna.trial import TrialState

from searcher.core.arch import Arch
from searcher.model.metrics import METRICS as SCORE_NAMES

RECORD = "searcher"
HEARTBEAT = "heartbeat"
COLUMNS = (
    "trial", "arch", "state", "reason", "rejected_by", "val_accuracy", "val_balanced_accuracy", "val_accuracy_int8",
    "val_recall", "train_seconds", "int8_seconds", "threads", "epochs",
    "params", "macs", "peak_activation_bytes", "weight_bytes", "latency_ms", "training_bytes",
    "stages", "convs", "first_width", "last_width", "worker", "retry_of", "repeat_of",
)
# The trial states, one vocabulary for the loop, the tables, the report and status.
TRAINED = "trained"  # went through its whole proxy schedule
STOPPED = "stopped_early"  # fell behind its peers part-way (still a measured accuracy)
REJECTED = "rejected"  # broke a cap by exact arithmetic; never built
FAILED = "failed"  # diverged, or ran past the per-candidate limit
INTERRUPTED = "interrupted"  # cut by a signal, the run's time limit or a crash; queued again once
RUNNING = "running"  # in the hands of a worker now
NOT_STARTED = "not_started"  # asked, then left for a later run: not enough time left
DUPLICATE = "duplicate"  # the same architecture was already being trained by another worker
QUEUED = "queued"  # queued again (a retry) and not yet asked for: no outcome yet
TRAINING = "training"  # what a record says while its candidate trains (the trial is RUNNING)
STATES = (TRAINED, STOPPED, REJECTED, FAILED, INTERRUPTED, RUNNING, NOT_STARTED, DUPLICATE, QUEUED)
JUDGED = (TRAINED, STOPPED, REJECTED, FAILED, INTERRUPTED)  # 'tried': neither left for later nor yielded
SCORED = (TRAINED, STOPPED)  # outcomes with a validation accuracy that can be compared
SPENT = (TRAINED, STOPPED, FAILED)  # outcomes that cost training time


@dataclass(frozen=True)
class Metric:
    """A score a search can rank by, and where each table keeps it."""

    name: str  # as --metric takes it
    label: str  # in words, for reports
    column: str  # in the trials table: the proxy's validation score
    mean: str  # in confirmed.csv: the seeds' mean
    sd: str  # in confirmed.csv: the seeds' sample standard deviation
    proxy: str  # in confirmed.csv: the proxy's score beside them


# each score --metric can name, with its columns: val_accuracy, accuracy_mean, proxy_accuracy ...
METRICS = {name: Metric(name, name.replace("_", " "), f"val_{name}", f"{name}_mean", f"{name}_sd", f"proxy_{name}")
           for name in SCORE_NAMES}
ACCURACY = METRICS["accuracy"]


def worker_id() -> dict[str, Any]:
    """Who is running a trial: host and process, to tell a dead worker from a live one."""
    return {"host": socket.gethostname(), "pid": os.getpid(), "started": time.time()}


def describe(arch: Arch, totals: dict[str, int]) -> dict[str, Any]:
    """The candidate part of a record: its text form, costs and shape summary."""
    return {
        "arch": arch.to_text(), **totals, "stages": arch.depth, "convs": arch.conv_count,
        "first_width": arch.widths[0] if arch.widths else 0, "last_width": arch.widths[-1] if arch.widths else 0,
    }


def record_of(trial: optuna.trial.FrozenTrial) -> dict[str, Any]:
    return dict(trial.user_attrs.get(RECORD) or {})


def finished_state(record: dict[str, Any]) -> str:
    """The state of a finished trial from its record."""
    state = record.get("state")
    if state in (None, TRAINING):
        return FAILED  # ended by something other than this program (another tool, a crash clean-up)
    return state


def row_of(trial: optuna.trial.FrozenTrial) -> dict[str, Any]:
    """One table row; trials with no record yet (just asked) show what Optuna knows."""
    record = record_of(trial)
    if trial.state == TrialState.RUNNING:
        state = RUNNING
    elif trial.state == TrialState.WAITING:
        state = QUEUED
    else:
        state = finished_state(record)
    row = {column: record.get(column) for column in COLUMNS}
    row.update(trial=trial.number, state=state, reason=record.get("reason", ""),
               rejected_by=record.get("rejected_by", ""), arch=record.get("arch", ""))
    worker = trial.user_attrs.get("worker") or {}
    row["worker"] = f"{worker.get('host', '')}:{worker.get('pid', '')}" if worker else ""
    for column in ("val_accuracy", "val_balanced_accuracy", "val_accuracy_int8"):
        if row[column] is None:
            row[column] = math.nan
    return row


def trials_frame(study: optuna.Study) -> pd.DataFrame:
    """Every trial of the study as one row, in trial order (see COLUMNS)."""
    rows = [row_of(t) for t in study.get_trials(deepcopy=False)]
    frame = pd.DataFrame(rows, columns=list(COLUMNS))
    for column in ("train_seconds", "int8_seconds"):
        frame[column] = frame[column].fillna(0.0)
    return frame


def counts(frame: pd.DataFrame) -> dict[str, int]:
    """Distinct candidates by state, plus 'tried' and 'repeats' (see :func:`counts_of`)."""
    distinct = distinct_rows(frame)
    state = distinct["state"] if "state" in distinct.columns else pd.Series(dtype=object)
    return counts_of(state.value_counts().to_dict(), len(frame) - len(distinct))


def counts_of(by_state: dict[str, int], repeats: int) -> dict[str, int]:
    """Every state's count of distinct candidates: a proposal that reused a known outcome is counted once,
    under 'repeats', not again under the state it reused (a run that trained one candidate and was
    proposed it 268 more times trained 1, not 269). 'tried' counts every proposal that was judged
    (neither left for later nor yielded to another worker), the repeats among them."""
    out = {s: int(by_state.get(s, 0)) for s in STATES}
    out["tried"] = sum(out[s] for s in JUDGED) + repeats
    out["repeats"] = repeats
    return out


def distinct_rows(frame: pd.DataFrame) -> pd.DataFrame:
    """Rows that stand for a distinct candidate: repeats of a known outcome dropped (a table
    without a ``repeat_of`` column has none)."""
    if "repeat_of" not in frame.columns or not len(frame):
        return frame
    return frame[frame["repeat_of"].isna()]


def best_row(frame: pd.DataFrame, caps: dict[str, int], metric: Metric = ACCURACY) -> dict[str, Any] | None:
    """The fully trained candidate with the best validation score that meets every cap (fewest parameters
    on a tie): what the summary and report call best by the proxy."""
    rows = distinct_rows(frame)
    rows = rows[(rows["state"] == TRAINED) & rows[metric.column].notna()]
    for column, limit in caps.items():
        rows = rows[rows[column] <= limit]
    if rows.empty:
        return None
    return rows.sort_values([metric.column, "params"], ascending=[False, True]).iloc[0].to_dict()


def pack_classes(classes: np.ndarray) -> str:
    """Class numbers (one per validation image) as short text for a record: base64 of bytes, with the width.

    >>> unpack_classes(pack_classes(np.array([0, 3, 2, 300]))).tolist()
    [0, 3, 2, 300]
    """
    values = np.asarray(classes, np.int64).ravel()
    dtype = "<u1" if not len(values) or values.max() < 256 else "<u2" if values.max() < 65536 else "<u4"
    return f"{dtype[-2:]}:" + base64.b64encode(values.astype(dtype).tobytes()).decode("ascii")


def unpack_classes(text: str) -> np.ndarray:
    """The class numbers :func:`pack_classes` wrote."""
    width, _, data = text.partition(":")
    return np.frombuffer(base64.b64decode(data), f"<{width}").astype(np.int64)
