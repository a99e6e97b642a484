"""Why a search ends, with the exit status that goes with it, and how Ctrl-C and SIGTERM end it.

A first SIGINT or SIGTERM asks for a graceful stop: the candidate in training is cut at its next
step, recorded as interrupted and queued again, and the results are written. A second one ends
the process at once, as a kill would: what was completed is in the study already, and the next
run recovers the candidate in flight.
"""

from __future__ import annotations

import contextlib
import enum
import os
import signal
import threading
from dataclasses import dataclass
from typing import Any, Iterator


class Ending(enum.Enum):
    """The kinds of reasons a search stops; a search that runs out of work ends with DONE."""

    DONE = "done"  # the trial count was reached
    TIME_LIMIT = "time limit"  # --minutes ran out (a candidate in training was cut)
    TIME_NEAR = "time limit near"  # the next candidate would not finish in the time left
    SIGNAL = "signal"  # SIGINT or SIGTERM
    PARENT_GONE = "parent gone"  # a worker whose parent process died
    EXHAUSTED = "space exhausted"  # long runs of proposals that could not be trained
    WORKER_FAILED = "worker failed"  # a worker process ended with an error


@dataclass(frozen=True)
class StopReason:
    """Why the loop ended, in words for the summary, and the shell's exit status for it."""

    kind: Ending
    text: str
    signum: int | None = None  # the signal, when kind is SIGNAL

    @property
    def exit_status(self) -> int:
        """0 for a normal end; 128 + the signal number when a signal stopped it (130 SIGINT, 143 SIGTERM)."""
        if self.kind is Ending.SIGNAL and self.signum is not None:
            return 128 + self.signum
        return 1 if self.kind is Ending.WORKER_FAILED else 0

    @classmethod
    def by_signal(cls, signum: int) -> StopReason:
        return cls(Ending.SIGNAL, f"stopped by {signal.Signals(signum).name}", signum)


@dataclass
class Phases:
    """What a worker's search did: why it stopped, each proposal's state, and how its time split."""

    stop: StopReason
    proposals: list[str]
    proxy_seconds: float = 0.0  # the proxy search
    confirm_seconds: float = 0.0  # the confirmation after it


def first_of(reasons: list[StopReason]) -> StopReason:
    """The reason that sets a multi-worker search's exit status: a signal first, then a failure."""
    order = [Ending.SIGNAL, Ending.WORKER_FAILED]
    return min(reasons, key=lambda r: order.index(r.kind) if r.kind in order else len(order))


class StopRequested(BaseException):
    """SIGINT or SIGTERM arrived while training ran (a BaseException, so no handler swallows it)."""

    def __init__(self, signum: int) -> None:
        super().__init__(signal.Signals(signum).name)
        self.signum = signum


def exit_at_once(signum: int) -> None:
    """End the process now with the shell's status for the signal (130 for SIGINT, 143 for SIGTERM)."""
    os.write(2, f"second {signal.Signals(signum).name}: stopping at once; completed candidates are kept "
                f"and the next run recovers the one in flight\n".encode())
    os._exit(128 + signum)


class StopSignals:
    """Turns SIGINT/SIGTERM into a flag; raised as :class:`StopRequested` only inside :meth:`raising`.

    Outside ``raising`` (asking Optuna, telling it, writing records) a signal only sets the flag,
    so no storage write is cut half-way; the loop looks at the flag between proposals.
    """

    def __init__(self) -> None:
        self.received: int | None = None
        self._raise = False

    def __call__(self, signum: int, frame: Any) -> None:
        if self.received is not None:
            exit_at_once(signum)
        self.received = signum
        if self._raise:
            self._raise = False
            raise StopRequested(signum)

    def install(self) -> None:
        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGINT, self)
            signal.signal(signal.SIGTERM, self)

    @contextlib.contextmanager
    def raising(self) -> Iterator[None]:
        """Inside: a signal raises StopRequested at once (also when one came just before)."""
        self._set(True)
        try:
            yield
        finally:
            self._raise = False

    @contextlib.contextmanager
    def held(self) -> Iterator[None]:
        """Inside a ``raising`` block, a stretch a signal must not cut (a storage write); it raises after."""
        before, self._raise = self._raise, False
        try:
            yield
        except BaseException:  # already leaving (a pruned candidate, say): the loop sees the flag later
            self._raise = before and self.received is None
            raise
        self._set(before)

    def _set(self, raising: bool) -> None:
        self._raise = raising
        if raising and self.received is not None:
            self._raise = False
            raise StopRequested(self.received)
