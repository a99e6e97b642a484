"""The run commands from the command line: bad input, continuing, two objectives, report and status."""

from __future__ import annotations

import numpy as np
import optuna
import pandas as pd
import pytest

from searcher.cli.main import main

TINY = """
name = "tiny"
[input]
channels = 1
size = [16, 16]
[stages]
count = [1, 2]
convs = 1
first_width = [4, 8]
[pool]
kind = "max"
[head]
features = ["gap", "flatten"]
hidden = 0
[budget]
max_params = "3k"
[train]
epochs = 2
train_fraction = 0.3
"""


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "tiny.toml").write_text(TINY)
    return tmp_path


def run(*argv: str) -> int:
    return main(list(argv))


def assert_refused(capsys, workdir, argv, *phrases):
    status = run(*argv)
    err = capsys.readouterr().err
    assert status == 2, err
    assert "Traceback" not in err
    for phrase in phrases:
        assert phrase in err, err
    assert not (workdir / "runs" / "bad").exists(), "a refused command must write nothing"


@pytest.mark.parametrize("argv, phrases", [
    (["--data", "missing.npz"], ["missing.npz"]),
    (["--max-params", "12 apples"], ["`--max-params`", "12 apples"]),
    (["--max-params", "10"], ["no candidate", "fits the budget", "params"]),
    (["--objective", "latency"], ["--objective", "accuracy"]),
    (["--trials", "0"], ["--trials"]),
    (["--minutes", "-1"], ["--minutes"]),
    (["--storage", "mysql://u@h/db"], ["--storage"]),
    (["--name", "../escape"], ["`--name` '../escape' must be"]),
])
def test_bad_search_input_exits_2_with_a_message_and_writes_nothing(capsys, workdir, argv, phrases):
    base = ["search", "--space", "tiny.toml", "--name", "bad", "--trials", "1"]
    assert_refused(capsys, workdir, base + argv, *phrases)


def test_a_mistyped_storage_is_refused_before_the_data_is_read(capsys, workdir):
    status = run("search", "--space", "tiny.toml", "--name", "bad", "--data", "missing.npz", "--storage", "runs/x.txt")
    err = capsys.readouterr().err
    assert status == 2 and "`--storage` 'runs/x.txt' must be" in err, err
    assert "missing.npz" not in err  # the data (missing too) was never looked at


def test_bad_data_files_are_refused_by_name(capsys, workdir):
    images = np.zeros((20, 16, 16), np.uint8)
    np.savez(workdir / "one_class.npz", images=images, labels=np.zeros(20, np.int64))
    assert_refused(capsys, workdir, ["search", "--space", "tiny.toml", "--name", "bad", "--data", "one_class.npz"],
                   "one_class.npz")
    np.savez(workdir / "rgb.npz", images=np.zeros((20, 16, 16, 3), np.uint8), labels=np.arange(20) % 2)
    assert_refused(capsys, workdir, ["search", "--space", "tiny.toml", "--name", "bad", "--data", "rgb.npz"], "rgb.npz")


def test_report_status_export_of_a_missing_run_exit_2(capsys, workdir):
    for command in ("report", "status", "export"):
        assert run(command, "--name", "nothing-here") == 2
        assert "nothing-here" in capsys.readouterr().err


@pytest.mark.slow
def test_search_continues_under_the_same_name_and_refuses_a_changed_budget(capsys, workdir):
    assert run("search", "--space", "tiny.toml", "--name", "go", "--trials", "2", "--confirm", "0") == 0
    first = pd.read_csv(workdir / "runs" / "go" / "trials.csv")
    assert run("search", "--space", "tiny.toml", "--name", "go", "--trials", "3", "--confirm", "0") == 0
    second = pd.read_csv(workdir / "runs" / "go" / "trials.csv")
    # nothing completed is lost: the first run's rows are still there, unchanged
    pd.testing.assert_frame_equal(second.iloc[: len(first)][["trial", "arch", "state", "val_accuracy"]],
                                  first[["trial", "arch", "state", "val_accuracy"]])
    trained = second[second.state.isin(["trained", "stopped_early", "failed"]) & second.repeat_of.isna()]
    assert len(trained) == 3
    capsys.readouterr()
    assert run("search", "--space", "tiny.toml", "--name", "go", "--max-params", "2k") == 2
    assert "budget.max_params: 3000 -> 2000" in capsys.readouterr().err  # old against new

    assert run("status", "--name", "go") == 0
    out = capsys.readouterr().out
    assert "trained" in out and "best fitting" in out
    (workdir / "runs" / "go" / "report.html").unlink()
    assert run("report", "--name", "go") == 0
    assert (workdir / "runs" / "go" / "report.html").stat().st_size > 100_000
    log_lines = (workdir / "runs" / "go" / "search.log").read_text().splitlines()
    assert len(log_lines) == len(second)  # one line per candidate


@pytest.mark.slow
def test_two_objective_search_records_accuracy_and_cost(capsys, workdir):
    assert run("search", "--space", "tiny.toml", "--name", "two", "--trials", "3", "--objective", "params", "--confirm", "0") == 0
    study = optuna.load_study(study_name="two", storage="sqlite:///runs/two/study.db")
    assert len(study.directions) == 2
    done = [t for t in study.trials if t.state == optuna.trial.TrialState.COMPLETE]
    for t in done:
        assert t.values[1] == t.user_attrs["searcher"]["params"]
    front = pd.read_csv(workdir / "runs" / "two" / "front.csv")
    assert len(front) >= 1 and (front.params <= 3000).all()


@pytest.mark.slow
def test_a_run_whose_study_is_gone_is_not_overwritten_and_status_writes_nothing(capsys, workdir):
    """The study file removed: status and report refuse without creating one, a search under the same
    name refuses to start a new study over the old results, and --force keeps them aside."""
    folder = workdir / "runs" / "gone"
    assert run("search", "--space", "tiny.toml", "--name", "gone", "--trials", "1", "--confirm", "0") == 0
    before = (folder / "trials.csv").read_bytes()
    for suffix in ("", "-wal", "-shm"):
        (folder / f"study.db{suffix}").unlink(missing_ok=True)
    capsys.readouterr()
    for command in ("status", "report"):
        assert run(command, "--name", "gone") == 2
        assert "study.db" in capsys.readouterr().err
        assert not (folder / "study.db").exists()  # a command that reads never creates a store
    assert run("search", "--space", "tiny.toml", "--name", "gone", "--trials", "1", "--confirm", "0") == 2
    err = capsys.readouterr().err
    assert "--force" in err and "another --name" in err and "Traceback" not in err
    assert (folder / "trials.csv").read_bytes() == before and not (folder / "study.db").exists()

    assert run("search", "--space", "tiny.toml", "--name", "gone", "--trials", "1", "--force", "--confirm", "0") == 0
    kept, = folder.glob("replaced-*")
    assert (kept / "trials.csv").read_bytes() == before  # the earlier results, moved aside whole
    assert len(pd.read_csv(folder / "trials.csv")) >= 1


def test_status_of_a_store_that_vanished_creates_nothing(tmp_path):
    """Between the look for the file and the open, the store can go: opening to read never creates it."""
    from searcher.errors import SearcherError
    from searcher.study.stores import open_storage

    for url in (f"sqlite:///{tmp_path / 'none.db'}", str(tmp_path / "none.journal")):
        with pytest.raises(SearcherError, match="does not exist"):
            open_storage(url, create=False)
    assert list(tmp_path.iterdir()) == []

