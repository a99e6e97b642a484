"""The torch thread count under a busy machine: what other programs use is not ours.

Outside reference: the /proc/stat format of proc(5) (the Linux man page): the first line is
``cpu user nice system idle iowait irq softirq steal guest guest_nice`` in USER_HZ ticks.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

from searcher.study.cpu_share import CpuShare, free_cores, machine_busy_seconds


def test_threads_are_the_share_less_what_others_use():
    share = CpuShare(limit=4, cores=4)
    assert [share.threads_for(o) for o in (0.0, 0.4, 1.0, 2.6, 3.9, 8.0)] == [4, 4, 3, 1, 1, 1]  # at least one
    assert CpuShare(limit=1, cores=8).threads_for(0.0) == 1  # never above the worker's share
    assert free_cores(5.0, 4) == 0.0


def _stat(path: Path, user: int, system: int, idle: int, steal: int = 0) -> None:
    """A /proc/stat as proc(5) lays it out: cpu user nice system idle iowait irq softirq steal guest guest_nice."""
    path.write_text(f"cpu  {user} 0 {system} {idle} 7 0 0 {steal} 0 0\ncpu0 1 0 1 1 0 0 0 0 0 0\n", encoding="ascii")


def test_busy_time_is_read_as_proc5_lays_it_out(tmp_path: Path):
    hz = os.sysconf("SC_CLK_TCK")
    _stat(tmp_path / "stat", user=3 * hz, system=hz, idle=50 * hz, steal=hz)
    assert machine_busy_seconds(tmp_path / "stat") == 5.0  # user + system + steal; idle and iowait are not busy
    (tmp_path / "bad").write_text("intr 1 2 3\n", encoding="ascii")
    assert machine_busy_seconds(tmp_path / "bad") is None and machine_busy_seconds(tmp_path / "none") is None


def test_other_programs_busy_time_takes_threads_away(tmp_path: Path):
    """Between two looks the machine was busy 1.8 core-seconds per second, 0.1 of them ours: others used
    1.7 cores of 2, so one thread; when they stop, both."""
    hz = os.sysconf("SC_CLK_TCK")
    stat, own = tmp_path / "stat", [0.0]
    share = CpuShare(limit=2, cores=2, stat=stat, own=lambda: own[0])
    _stat(stat, user=0, system=0, idle=0)
    share._last, share._answer = (time.monotonic() - 10.0, 0.0, 0.0), None
    _stat(stat, user=17 * hz, system=1 * hz, idle=2 * hz)
    own[0] = 1.0
    assert share.threads() == 1
    share._last = (time.monotonic() - 10.0, *share._last[1:])
    _stat(stat, user=18 * hz, system=1 * hz, idle=21 * hz)  # one busy second in ten: ours
    own[0] = 2.0
    assert share.threads() == 2
    assert share.threads() == 2  # a fresh look is reused
