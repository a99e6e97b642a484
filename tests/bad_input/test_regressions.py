"""One regression test per bad-input item of issue 8 that the generated suite does not pin down by itself.

Each asserts what the user now sees: exit status 2, one line naming the flag or key as typed, and
nothing written. (Space-file items live in tests/test_space.py, units in tests/test_units.py,
architecture texts in tests/test_arch.py, secrets in tests/test_redact.py.)
"""

from __future__ import annotations

import errno
import logging
import os
import re
from dataclasses import asdict
from pathlib import Path

import pytest

from searcher.core.budget import Budget
from searcher.core.train_settings import TrainSettings
from searcher.errors import SearcherError

from checks import here, refused  # noqa: F401  (here is a fixture)
from catalogue import ARCH_OK, LENET5, space_text


def written(folder: Path) -> list[Path]:
    return sorted(p for p in folder.rglob("*") if p.is_file() and p.name != "space.toml")


@pytest.mark.parametrize(("flag", "value", "says"), [
    ("--seed", "-1", "`--seed` must be a whole number from 0 to 2,147,483,647, got -1"),  # numpy raised ValueError
    ("--samples", "0", "`--samples` must be a whole number from 1 to 1,000,000, got 0"),
    ("--samples", "-5", "got -5"),
    ("--samples", "10000000000", "(the census holds every draw in memory), got 10000000000"),  # ran out of memory
    ("--classes", "0", "`--classes` must be a whole number from 2 to 100,000, got 0"),  # was silently ignored
])
def test_census_options_are_checked_by_name(here, capsys, flag, value, says):
    line = refused(["census", "--space", "space.toml", f"{flag}={value}"], capsys)
    assert says in line
    assert written(here) == []


def test_search_options_are_named_as_typed_not_as_file_keys(here, capsys):
    """`--epochs 0` was reported as `train.epochs` of the space file."""
    line = refused(["search", "--space", "space.toml", "--name", "x", "--epochs", "0"], capsys)
    assert "`--epochs` must be a whole number from 1 to 1,000, got 0" in line
    assert "train.epochs" not in line and "space.toml" not in line
    line = refused(["search", "--space", "space.toml", "--name", "x", "--batch-size", "1"], capsys)
    assert line.startswith("searcher: error: `--batch-size`")
    line = refused(["search", "--space", "space.toml", "--name", "x", "--seed", "-3"], capsys)
    assert "`--seed`" in line
    assert written(here) == []


@pytest.mark.parametrize("flag", ["--max-params", "--max-macs", "--max-activation", "--max-weight"])
def test_budget_flags_are_spelled_with_dashes(here, capsys, flag):
    """They were named `--max_params` in messages."""
    line = refused(["cost", LENET5, flag, "0.4"], capsys)
    assert f"`{flag}` '0.4' rounds to 0" in line  # and 0.4 was called "not positive"


@pytest.mark.parametrize(("name", "content", "says"), [
    ("missing.json", None, "architecture file 'missing.json' cannot be read: No such file"),
    ("folder.json", "folder", "architecture file 'folder.json' is a folder"),
    ("binary.json", bytes(range(256)), "architecture file 'binary.json' is not JSON text"),
    ("text.json", b"just words", "holds no JSON object"),
])
def test_cost_of_a_json_path_that_cannot_be_read(here, capsys, name, content, says):
    if content == "folder":
        (here / name).mkdir()
    elif content is not None:
        (here / name).write_bytes(content)
    assert says in refused(["cost", name], capsys)


def test_export_options_are_checked_before_the_run_is_opened(here, capsys):
    """`export --epochs 0` fell back to the default silently; the run named does not even exist here."""
    assert "`--epochs` must be a whole number from 1 to 1,000, got 0" in refused(
        ["export", "--name", "nothing", "--epochs", "0"], capsys)
    assert "`--trial` must be a whole number from 0" in refused(["export", "--name", "nothing", "--trial", "-1"], capsys)
    assert "`--arch`: architecture text" in refused(["export", "--name", "nothing", "--arch", "1x16x16"], capsys)
    assert "`--storage` ''" in refused(["export", "--name", "nothing", "--storage", ""], capsys)


def _stored_run(folder: Path, name: str, channels: int) -> None:
    """A study with its configuration and no trials: enough for export to choose and check a candidate."""
    from searcher.run.config import RunConfig
    from searcher.study.studies import open_study

    text = space_text("input.channels", str(channels))
    config = RunConfig(space_name="tiny", space_text=text, budget=asdict(Budget()), train=asdict(TrainSettings()),
                       data="demo", data_fingerprint="0", classes=4, class_names=("a", "b", "c", "d"),
                       objective="accuracy", seed=0)
    (folder / "runs" / name).mkdir(parents=True)
    open_study(name, f"sqlite:///{folder / 'runs' / name / 'study.db'}", config)


def test_export_of_an_arch_with_the_wrong_channel_count(here, capsys):
    """The run reads gray images; a 3-channel --arch crashed in training with a shape error."""
    _stored_run(here, "gray", channels=1)
    before = written(here)
    line = refused(["export", "--name", "gray", "--arch", "3" + ARCH_OK[1:]], capsys)
    assert "`--arch`" in line and "takes 3 input channel(s) but run 'gray' reads its images with 1" in line
    assert written(here) == before  # no export folder, nothing else


def test_report_and_status_refuse_an_empty_storage(here, capsys):
    """An empty --storage was taken for the default store."""
    for command in ("report", "status"):
        assert "`--storage` ''" in refused([command, "--name", "nothing", "--storage", ""], capsys)


def test_census_into_a_runs_path_that_cannot_be_a_folder(here, capsys):
    (here / "runs").write_text("a file where the runs folder should be")
    line = refused(["census", "--space", "space.toml"], capsys)
    assert "cannot write the census to 'runs/census-tiny'" in line and "run it from a folder" in line


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders; the next test covers the path")
def test_census_into_a_read_only_runs_folder(here, capsys):
    (here / "runs").mkdir()
    (here / "runs").chmod(0o555)
    try:
        line = refused(["census", "--space", "space.toml"], capsys)
    finally:
        (here / "runs").chmod(0o755)
    assert "cannot write the census to 'runs/census-tiny': Permission denied" in line


def test_census_on_a_read_only_file_system(here, capsys, monkeypatch):
    """The write itself fails (EROFS, as on a read-only mount): one line, no traceback, nothing half-written."""
    import searcher.results.census_files as census_files

    def read_only(path, data):
        raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(path))

    monkeypatch.setattr(census_files, "write_atomic", read_only)
    line = refused(["census", "--space", "space.toml"], capsys)
    assert "cannot write the census to 'runs/census-tiny': Read-only file system" in line
    assert written(here) == []


def test_more_workers_than_cores_is_warned_about(monkeypatch, caplog):
    from searcher.study.run import SearchSettings

    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    with caplog.at_level(logging.WARNING, logger="searcher"):
        SearchSettings(name="x", space="space.toml", workers=3).check()
    assert "--workers 3 is more than this machine's 2 CPU cores" in caplog.text
    caplog.clear()
    with caplog.at_level(logging.WARNING, logger="searcher"):
        SearchSettings(name="x", space="space.toml", workers=2).check()
    assert "--workers" not in caplog.text
    with pytest.raises(SearcherError, match="`--workers` must be a whole number from 1 to 64"):
        SearchSettings(name="x", space="space.toml", workers=10**10).check()


@pytest.mark.parametrize("argv", [
    ["search", "--space", "space.toml", "--name", "x", "--trials", "x" * 100_000],  # argparse's own message
    ["cost", "x" * 100_000],
    ["census", "--space", "space.toml", "--name", "x" * 100_000],
    ["search", "--space", "space.toml", "--name", "x", "--storage", "x" * 100_000],
])
def test_a_very_long_value_is_cut_in_the_error_line(here, capsys, argv):
    line = refused(argv, capsys)
    assert len(line) < 400 and "x" * 200 not in line
    assert re.search(r"\(100,00\d characters\)", line)  # the value's length is told instead


def test_the_parser_is_built_once_and_reused():
    """Building it took most of a refused command's time; parsing must leave it as it was."""
    from searcher.cli.main import make_parser

    assert make_parser() is make_parser()
    first = make_parser().parse_args(["census", "--space", "mcu", "--samples", "5"])
    again = make_parser().parse_args(["census", "--space", "mcu"])
    assert first.samples == 5 and again.samples == 200_000
