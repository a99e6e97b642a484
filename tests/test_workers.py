"""Several workers on one study: every trial once, every write kept, the --trials count honoured.

Each test runs real `python -m searcher search` processes on the demo data (one epoch on a fifth
of it, the tiny space) in a temporary folder, then reads the study back and checks it against
the trials.csv the run wrote.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import optuna
import pandas as pd
import pytest
from optuna.trial import TrialState

from searcher.run.records import (
    DUPLICATE, FAILED, INTERRUPTED, NOT_STARTED, REJECTED, SPENT, STOPPED, TRAINED, counts, distinct_rows, record_of, trials_frame,
)
from searcher.study.studies import open_study
from searchkit import StandIn, memory_worker

TRIALS = 3  # trained candidates asked for: small, yet enough that workers overlap
# the Optuna state each searcher state must be told with (see searcher.study.worker's module docstring)
OPTUNA_STATE = {TRAINED: TrialState.COMPLETE, REJECTED: TrialState.COMPLETE, STOPPED: TrialState.PRUNED,
                FAILED: TrialState.FAIL, DUPLICATE: TrialState.FAIL, NOT_STARTED: TrialState.FAIL,
                INTERRUPTED: TrialState.FAIL}


def search_command(space: Path, name: str, *extra: str) -> list[str]:
    """A tiny, fast search: one epoch on a fifth of the demo training split."""
    return [sys.executable, "-m", "searcher", "search", "--space", str(space), "--name", name, "--data", "demo",
            "--epochs", "1", "--train-fraction", "0.2", "--trials", str(TRIALS), "--confirm", "0", *extra]


def start(command: list[str], cwd: Path) -> subprocess.Popen:
    return subprocess.Popen(command, cwd=cwd, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def finish(processes: list[subprocess.Popen], timeout: float = 240) -> list[str]:
    """Wait for every process; their combined output, each one checked to have ended well."""
    outputs = [p.communicate(timeout=timeout)[0] for p in processes]
    for process, output in zip(processes, outputs):
        assert process.returncode == 0, output[-3000:]
    return outputs


def check_study(study: optuna.Study, csv: Path, workers: int, *, last_writer: bool = True) -> pd.DataFrame:
    """Everything a shared study must satisfy once its workers are done; the study's table.

    ``last_writer`` False: trials.csv was written by one of several separate searches, which may
    have read the study just before another's last trial ended; then each row it has must agree.
    """
    trials = study.get_trials(deepcopy=False)
    numbers = [t.number for t in trials]
    assert sorted(numbers) == list(range(len(trials))), "trial numbers are not 0..n-1 each once"
    for t in trials:
        state = record_of(t).get("state")
        assert state in OPTUNA_STATE, f"trial {t.number} has no finished record (state {state!r})"
        assert t.state == OPTUNA_STATE[state], f"trial {t.number}: {state} told as {t.state.name}"
    frame = trials_frame(study)
    assert not (frame["state"] == INTERRUPTED).any(), "nothing was stopped, yet a trial was interrupted"

    spent = frame[frame["state"].isin(SPENT) & frame["repeat_of"].isna()]
    twice = spent["arch"][spent["arch"].duplicated()].tolist()
    assert not twice, f"trained more than once: {twice}\n" + frame.to_string()
    for _, row in frame[frame["repeat_of"].notna()].iterrows():
        original = frame.loc[frame["trial"] == int(row["repeat_of"])].iloc[0]
        assert original["arch"] == row["arch"] and original["state"] == row["state"], f"bad repeat: trial {row['trial']}"
        assert pd.isna(original["repeat_of"]) and row["train_seconds"] == 0.0, f"bad repeat: trial {row['trial']}"
    drawn = frame["arch"].value_counts()
    for _, row in frame[frame["state"] == DUPLICATE].iterrows():  # yielded to a trial drawing the same
        assert drawn[row["arch"]] >= 2, f"duplicate {row['trial']} of an architecture no other trial drew"

    shown = frame[["trial", "arch", "state", "reason", "worker", "repeat_of"]].to_string()  # for a failure's message
    assert TRIALS <= distinct_rows(frame)["state"].isin(SPENT).sum() <= TRIALS + workers - 1, shown
    assert frame["worker"].nunique() == workers, shown

    written = pd.read_csv(csv, keep_default_na=False)
    if last_writer:
        assert sorted(written["trial"]) == sorted(frame["trial"]), "trials.csv and the study hold different trials"
        assert (written["state"] == TRAINED).sum() == (frame["state"] == TRAINED).sum()
    finished = written[written["state"] != "running"]
    assert set(written["trial"]) <= set(frame["trial"])
    store = frame.set_index("trial").loc[finished["trial"]]
    assert list(finished["state"]) == list(store["state"]), "trials.csv disagrees with the study"
    assert list(finished["arch"]) == list(store["arch"])
    return frame


def stored(name: str, url: str) -> optuna.Study:
    return open_study(name, url, None)[0]


@pytest.mark.parametrize("outcome", [TRAINED, STOPPED])
def test_an_architecture_another_worker_finished_meanwhile_is_reused_not_trained(tmp_path: Path, outcome) -> None:
    """Two workers, one study: the second read the study, then the first trained and finished the
    architecture the second draws next. The second takes that outcome over, whatever it was."""
    trainer = StandIn(epochs=2, stop_early=outcome == STOPPED)
    first = memory_worker(tmp_path, trainer=trainer)
    second = memory_worker(tmp_path, study=first.study, trainer=trainer)
    assert second.stop_reason() is None  # the second worker's look at the study: nothing has finished
    assert first.stop_reason() is None and first.step() == outcome and trainer.started == [0]
    first.study.enqueue_trial(first.study.trials[0].params)  # the second draws the same architecture
    assert second.step() == "repeat" and trainer.started == [0]  # not trained again
    repeat = first.study.trials[1]
    record = record_of(repeat)
    assert (record["repeat_of"], record["state"], record["train_seconds"]) == (0, outcome, 0.0)
    assert record["arch"] == record_of(first.study.trials[0])["arch"]
    assert repeat.state == OPTUNA_STATE[outcome]
    for worker in (first, second):  # each worker's running ledger agrees with the table read afresh
        worker.ledger.update(first.study)
        assert worker.ledger.counts() == counts(trials_frame(first.study))


@pytest.mark.slow
def test_two_worker_processes_share_the_default_sqlite_store(tmp_path: Path, write_space) -> None:
    space = write_space()
    output, = finish([start(search_command(space, "pair", "--workers", "2"), tmp_path)])
    assert "[worker 0]" in output and "[worker 1]" in output
    folder = tmp_path / "runs" / "pair"
    check_study(stored("pair", f"sqlite:///{folder / 'study.db'}"), folder / "trials.csv", workers=2)


@pytest.mark.slow
def test_two_searches_started_at_once_with_one_name_share_the_run(tmp_path: Path, write_space) -> None:
    space = write_space()
    # three epochs: long enough that the second search, slowed by the first creating the store,
    # still finds work when it gets going (with one epoch the first could be done by then)
    processes = [start(search_command(space, "twin", "--epochs", "3"), tmp_path) for _ in range(2)]
    finish(processes)
    folder = tmp_path / "runs" / "twin"
    frame = check_study(stored("twin", f"sqlite:///{folder / 'study.db'}"), folder / "trials.csv", workers=2,
                        last_writer=False)
    assert set(frame["worker"].str.rsplit(":", n=1).str[1].astype(int)) == {p.pid for p in processes}


@pytest.mark.slow
def test_two_workers_share_a_journal_file_store(tmp_path: Path, write_space) -> None:
    space = write_space()
    journal = "runs/jr/study.journal"
    finish([start(search_command(space, "jr", "--workers", "2", "--storage", journal), tmp_path)])
    assert not (tmp_path / "runs" / "jr" / "study.db").exists()
    check_study(stored("jr", str(tmp_path / journal)), tmp_path / "runs" / "jr" / "trials.csv", workers=2)
    status = subprocess.run([sys.executable, "-m", "searcher", "status", "--name", "jr", "--storage", journal],
                            cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert status.returncode == 0, status.stderr
    assert "running 0" in status.stdout


@pytest.mark.slow
def test_two_worker_processes_share_confirmation_without_training_a_seed_twice(tmp_path: Path, write_space) -> None:
    from searcher.study.confirm import read_jobs

    space = write_space()
    folder = tmp_path / "runs" / "share"
    finish([start(search_command(space, "share", "--workers", "2", "--confirm", "2", "--confirm-candidates", "3",
                                 "--confirm-random", "0"), tmp_path)])
    jobs = read_jobs("share", f"sqlite:///{folder / 'study.db'}")
    done = jobs[jobs["state"] == "trained"]
    assert len(done) == 2 * done["trial"].nunique() and 2 <= done["trial"].nunique() <= 3, jobs.to_string()
    assert not done.duplicated(["trial", "seed_index"]).any(), "a seed was trained twice"
    confirmed = pd.read_csv(folder / "confirmed.csv")
    assert (confirmed["seeds"] == 2).all()

