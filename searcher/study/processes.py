"""Several worker processes on one machine, each with its share of the CPU threads.

Each worker is a separate process (torch's threads and the GIL make processes the way to use
several cores) that opens the same study; TPE's constant liar and the running-architecture check
in :mod:`searcher.study.worker` keep them from training the same candidate at once.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import signal
from typing import Any

log = logging.getLogger(__name__)


def _worker_main(settings: Any, budget: Any, train: Any, index: int, threads: int, deadline: float | None,
                 parent: int, queue: Any) -> None:
    from searcher.study.run import prepare, run_worker
    from searcher.study.storage import open_study

    os.setpgrp()  # out of the terminal's group: a Ctrl-C reaches the parent only, which passes it on once
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    import torch

    torch.set_num_threads(threads)
    run = prepare(settings, budget, train)
    study, _ = open_study(settings.name, run.url, run.config, settings.sampler, worker=index)
    tally = run_worker(run, study, deadline, index=index, threads=threads, parent_pid=parent)
    queue.put((index, tally.stopped_by, tally.proposals))


def run_workers(run: Any, deadline: float | None) -> tuple[str, int, list[str]]:
    """Start ``run.settings.workers`` processes, pass signals on, and wait for all of them."""
    from searcher.study.run import _status
    from searcher.study.worker import exit_at_once

    count = run.settings.workers
    threads = max(1, (os.cpu_count() or 1) // count)
    context = multiprocessing.get_context("spawn")
    queue = context.Queue()
    budget, train = run.budget.to_table(), dict(run.config.train)
    processes = [
        context.Process(target=_worker_main, name=f"searcher-worker-{i}",
                        args=(run.settings, budget, train, i, threads, deadline, os.getpid(), queue))
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
    try:
        for p in processes:
            p.start()
        results = []
        for p in processes:
            p.join()
        while not queue.empty():
            results.append(queue.get())
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)
    failed = [p.name for p in processes if p.exitcode not in (0, None)]
    if failed:
        log.warning("worker(s) %s ended with an error; see the messages above", ", ".join(failed))
    stops = sorted({stop for _, stop, _ in results if stop})
    stopped_by = "; ".join(stops)
    if received:
        stopped_by = f"stopped by {signal.Signals(received[0]).name}" + (f"; {stopped_by}" if stopped_by else "")
    proposals = [p for _, _, props in sorted(results) for p in props]
    return stopped_by, _status(stopped_by), proposals
