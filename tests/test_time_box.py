"""Time limits: the run's --minutes box, the prediction that keeps a candidate from starting when it
cannot finish, and the per-candidate limit."""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path
from types import SimpleNamespace

import pandas as pd
import pytest
from optuna.trial import TrialState

from searchkit import load, memory_worker, run, search_args, search_here, write_space
from searcher.run.records import FAILED, INTERRUPTED, NOT_STARTED, QUEUED, STOPPED, TRAINED, record_of
from searcher.core.space_file import load_space
from searcher.core.train_settings import TrainSettings
from searcher.study.launch import TorchTrainer
from searcher.study.timebox import Throughput

TRAIN_IMAGES = 1000


def test_no_prediction_before_any_candidate_was_measured(tmp_path: Path) -> None:
    worker = memory_worker(tmp_path, deadline=time.time() + 1)
    assert worker.predicted_seconds(10**6) is None
    assert worker.step() == TRAINED and worker.trainer.started == [0]  # with nothing measured, a candidate may start


def test_prediction_scales_with_macs_and_epochs(tmp_path: Path) -> None:
    short, long = memory_worker(tmp_path, epochs=1), memory_worker(tmp_path, epochs=3)
    for worker in (short, long):
        worker.tally.throughput = Throughput(mac_images=4e9, seconds=2.0)
    assert short.predicted_seconds(2_000_000) == pytest.approx(2 * short.predicted_seconds(1_000_000))
    assert long.predicted_seconds(1_000_000) == pytest.approx(3 * short.predicted_seconds(1_000_000))


def test_candidate_predicted_to_overrun_is_skipped_and_the_loop_goes_on(tmp_path: Path) -> None:
    left = 60.0
    worker = memory_worker(tmp_path, deadline=time.time() + left)
    space = load_space(write_space(tmp_path))
    from searcher.core.cost import cost

    macs = sorted(cost(a).macs for a in space.enumerate(8))
    threshold = macs[len(macs) // 2]  # candidates above the median are predicted to need more than is left
    images = 2 * TRAIN_IMAGES * 0.5
    worker.tally.throughput = Throughput(mac_images=threshold * images, seconds=left)
    started = worker.trainer.started
    states = [worker.step() for _ in range(30)]
    trials = worker.study.get_trials(deepcopy=False)
    records = {t.number: record_of(t) for t in trials}
    assert NOT_STARTED in states and TRAINED in states
    assert states.index(TRAINED) > states.index(NOT_STARTED) or states.count(TRAINED) > 1  # trained after a skip too
    for number, record in records.items():
        if threshold * 0.99 < record["macs"] < threshold:
            continue  # too close to call: the time left shrinks a little while the loop runs
        assert (record["state"] == NOT_STARTED) == (record["macs"] >= threshold), record
        if record["state"] == NOT_STARTED:
            assert number not in started and "predicted" in record["reason"]
            assert worker.study.trials[number].state == TrialState.FAIL
    assert not any(t.user_attrs.get("retry_of") is not None for t in trials)  # skipped, not queued again
    assert worker.stop_reason() is None  # the cheaper half still fits: the loop goes on


def test_the_phase_ends_when_not_even_the_cheapest_candidate_fits(tmp_path: Path) -> None:
    worker = memory_worker(tmp_path, deadline=time.time() + 60.0)
    worker.plan = dataclasses.replace(worker.plan, least_macs=10**6)
    worker.tally.throughput = Throughput(mac_images=10**6 * 1000, seconds=30.0)  # the cheapest: 30 s per 1,000 images
    assert worker.stop_reason() is None  # 30 s predicted for the cheapest, 60 s left
    worker.tally.throughput = Throughput(mac_images=10**6 * 1000, seconds=600.0)
    stop = worker.stop_reason()
    assert stop is not None and "cheapest candidate" in stop.text


def test_prediction_for_a_measured_candidate_is_not_shorter_than_it_took(tmp_path: Path) -> None:
    """A candidate like the one just trained is predicted to take at least as long: the guard errs long."""
    import torch

    from searcher.data.load import Split

    g = torch.Generator().manual_seed(0)
    split = Split(torch.rand(TRAIN_IMAGES, 1, 16, 16, generator=g), torch.randint(0, 8, (TRAIN_IMAGES,), generator=g))
    data = SimpleNamespace(num_classes=8, train=split, val=Split(split.images[:64], split.labels[:64]))
    data.at = lambda shape: data
    worker = memory_worker(tmp_path, trainer=TorchTrainer(data, TrainSettings(epochs=2, train_fraction=0.5, batch_size=16)))
    assert worker.step() in (TRAINED, STOPPED)
    trial = worker.study.trials[0]
    record = record_of(trial)
    assert worker.predicted_seconds(record["macs"]) >= record["train_seconds"] * 0.999  # seconds are rounded


@pytest.mark.slow
def test_time_box_cuts_the_candidate_and_stops_by_itself(tmp_path: Path) -> None:
    # 200 epochs cannot finish in 6 s on any CPU we know: the first candidate is cut by the limit.
    args = search_args(write_space(tmp_path), "box", "--trials", "3", "--epochs", "200", "--minutes", "0.1")
    code, out, err = run(args, tmp_path)
    assert code == 0, err
    assert "time limit reached" in out
    table = pd.read_csv(tmp_path / "runs" / "box" / "trials.csv", keep_default_na=False)
    cut = table[table.state == INTERRUPTED]
    assert len(cut) == 1 and "time limit" in cut.reason.item()
    assert set(table.state) <= {INTERRUPTED, QUEUED}
    study = load(tmp_path, "box")
    assert study.get_trials(states=(TrialState.RUNNING,)) == []
    queued = study.get_trials(states=(TrialState.WAITING,))
    assert [t.user_attrs["retry_of"] for t in queued] == [cut.trial.item()]


def test_candidate_over_its_limit_fails_and_the_search_goes_on(tmp_path: Path) -> None:
    # 0.6 s per candidate against 200 epochs: every candidate runs over.
    outcome = search_here(tmp_path, write_space(tmp_path), "limit", trials=2, candidate_minutes=0.01,
                          train={"epochs": 200})
    table = pd.read_csv(outcome.folder / "trials.csv", keep_default_na=False)
    assert list(table.state) == [FAILED, FAILED]  # the second was started after the first failed
    assert all(reason.startswith("over the per-candidate limit of 0.6 s") for reason in table.reason)
    assert (table.epochs < 200).all()
    assert outcome.exit_status == 0 and outcome.counts["interrupted"] == 0
