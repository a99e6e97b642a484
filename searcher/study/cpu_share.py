"""How many torch threads to train the next candidate with, on a machine other programs may be using.

torch trains a batch with several threads that meet at the end of every operation. When another
program keeps the cores busy, one of our threads is often descheduled, and the others wait for it at
each meeting point, spinning: a search beside a 2-thread matrix-multiply loop on a 2-core machine
trained 3 candidates where a quiet machine trained 24 (a measured starvation, far below a fair
share). One thread per core that nobody else uses avoids the meeting points that cannot be met.

So before each candidate the worker looks at how busy the machine was since its last look, from
Linux's /proc/stat and its own CPU time: the cores other programs used are not ours, and the next
candidate gets the rest (at least one thread, at most the worker's share). Elsewhere (no
/proc/stat) the share is used as it is. ``benchmarks/bench_busy.py`` measures the effect.
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

PROC_STAT = Path("/proc/stat")
FIRST_LOOK_SECONDS = 0.25  # with no earlier look, how long to watch before the first candidate
FRESH_SECONDS = 1.0  # a look younger than this is reused (rejections come many to the second)
BUSY_COLUMNS = (0, 1, 2, 5, 6, 7)  # user, nice, system, irq, softirq, steal: /proc/stat's busy time


def machine_busy_seconds(stat: Path = PROC_STAT) -> float | None:
    """CPU seconds the whole machine has spent busy since boot (all cores), or None without /proc/stat."""
    try:
        first = stat.read_text(encoding="ascii").splitlines()[0].split()
    except (OSError, IndexError):
        return None
    if first[0] != "cpu":
        return None
    ticks = os.sysconf("SC_CLK_TCK")
    return sum(int(first[1 + i]) for i in BUSY_COLUMNS if 1 + i < len(first)) / ticks


def own_busy_seconds() -> float:
    """CPU seconds this process (all its threads) and its finished children have used."""
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def free_cores(others: float, cores: int) -> float:
    """Cores left when other programs keep ``others`` cores busy on average."""
    return max(0.0, cores - others)


@dataclass
class CpuShare:
    """Threads for the next candidate: the worker's share, less the cores other programs keep busy.

    >>> CpuShare(limit=2, cores=2).threads_for(others=1.6)
    1
    >>> CpuShare(limit=2, cores=2).threads_for(others=0.1)
    2
    """

    limit: int  # the worker's share of the cores: the most threads it may use
    cores: int = field(default_factory=lambda: os.cpu_count() or 1)
    stat: Path = PROC_STAT  # where the machine's busy time is read
    own: Callable[[], float] = own_busy_seconds  # this process's CPU seconds
    _last: tuple[float, float, float] | None = None  # (time, machine busy, own busy) at the last look
    _answer: int | None = None

    def threads_for(self, others: float) -> int:
        """At least one thread, at most ``limit``, and no more than the cores others leave free (rounded)."""
        return max(1, min(self.limit, round(free_cores(others, self.cores))))

    def threads(self) -> int:
        """Threads for the next candidate, from how busy the machine was since the last look."""
        now = time.monotonic()
        if self._last is not None and self._answer is not None and now - self._last[0] < FRESH_SECONDS:
            return self._answer
        machine = machine_busy_seconds(self.stat)
        if machine is None:
            return self.limit
        if self._last is None:
            self._last = (now, machine, self.own())
            time.sleep(FIRST_LOOK_SECONDS)
            now, machine = time.monotonic(), machine_busy_seconds(self.stat) or machine
        then, machine_then, own_then = self._last
        own = self.own()
        elapsed = max(now - then, 1e-6)
        others = max(0.0, (machine - machine_then) - (own - own_then)) / elapsed
        self._last, self._answer = (now, machine, own), self.threads_for(others)
        return self._answer
