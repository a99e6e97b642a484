"""Several worker processes on one machine, each with its share of the CPU threads.

Each worker is a separate process (torch's threads and the GIL make processes the way to use
several cores) that prepares the run and opens the same study; TPE's constant liar and the
running-architecture check in :mod:`searcher.study.worker` keep them from training the same
candidate at once. The parent passes Ctrl-C and SIGTERM on to each worker once.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import queue
import signal
from typing import Any

import torch

from searcher.study.ending import Ending, Phases, StopReason, exit_at_once, first_of
from searcher.study.launch import run_phases
from searcher.study.run import PreparedRun, SearchSettings, prepare
from searcher.study.studies import open_study

log = logging.getLogger(__name__)


def _worker_main(settings: SearchSettings, budget: dict, train: dict, index: int, threads: int,
                 deadline: float | None, parent: int, results: Any) -> None:
    os.setpgrp()  # out of the terminal's group: a Ctrl-C reaches the parent only, which passes it on once
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    torch.set_num_threads(threads)
    run = prepare(settings, budget, train)
    study, _ = open_study(settings.name, run.url, run.config, settings.sampler, worker=index)
    results.put((index, run_phases(run, study, deadline, index=index, threads=threads, parent_pid=parent)))


def run_workers(run: PreparedRun, deadline: float | None) -> Phases:
    """Start ``run.settings.workers`` processes, pass signals on, and collect what each did.

    Results are read while the workers run (a worker blocks on a full queue until it is read),
    and each process is joined after its result came in or it ended without one.
    """
    count = run.settings.workers
    threads = max(1, (os.cpu_count() or 1) // count)
    context = multiprocessing.get_context("spawn")
    results = context.Queue()
    budget, train = run.budget.to_table(), dict(run.config.train)
    processes = [
        context.Process(target=_worker_main, name=f"searcher-worker-{i}",
                        args=(run.settings, budget, train, i, threads, deadline, os.getpid(), results))
        for i in range(count)
    ]
    received: list[int] = []

    def forward(signum: int, frame: Any) -> None:
        received.append(signum)
        for p in processes:
            if p.is_alive() and p.pid:
                os.kill(p.pid, signum)
        if len(received) > 1:  # the workers end at once on their second signal too
            exit_at_once(signum)

    previous = {s: signal.signal(s, forward) for s in (signal.SIGINT, signal.SIGTERM)}
    collected: dict[int, Phases] = {}
    try:
        for p in processes:
            p.start()
        while len(collected) < count and any(p.is_alive() for p in processes):
            try:
                index, phases = results.get(timeout=0.5)
                collected[index] = phases
            except queue.Empty:
                continue
        while True:  # results put just before a process ended
            try:
                index, phases = results.get(timeout=0.1)
                collected[index] = phases
            except queue.Empty:
                break
        for p in processes:
            p.join()
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
    reasons = [phases.stop for phases in collected.values()]
    failed = [p.name for p in processes if p.exitcode not in (0, None)]
    if failed:
        log.warning("worker(s) %s ended with an error; see the messages above", ", ".join(failed))
        reasons.append(StopReason(Ending.WORKER_FAILED, f"worker(s) {', '.join(failed)} ended with an error"))
    if received:
        reasons.append(StopReason.by_signal(received[0]))
    stop = first_of(reasons) if reasons else StopReason(Ending.WORKER_FAILED, "no worker reported back")
    words = "; ".join(dict.fromkeys([stop.text, *(r.text for r in reasons)]))
    proposals = [p for index in sorted(collected) for p in collected[index].proposals]
    return Phases(StopReason(stop.kind, words, stop.signum), proposals,
                  max((p.proxy_seconds for p in collected.values()), default=0.0),
                  max((p.confirm_seconds for p in collected.values()), default=0.0))
