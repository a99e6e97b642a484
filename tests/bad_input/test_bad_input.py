"""The promise on bad input, checked over every space-file key and every flag of every command.

For each generated case: exit status 2, no traceback, the last stderr line is the error and names
the key (space files: with the file) or the flag as typed, with dashes; a long value is not
echoed whole; and nothing is written in the working folder (a fresh tmp folder per case).
Commands run in-process through ``searcher.cli.main.main`` for speed. A search must refuse its
bad value before the data is loaded: the loader is replaced by one that fails the case.
"""

from __future__ import annotations

import sys
import tempfile
import types
from pathlib import Path

import pytest

from searcher.cli.main import main

from catalogue import ARCH_OK, LONG, Flag, flag_cases, space_cases, space_text

READABLE = 500  # characters an error line may take
SPACE = "space.toml"


class DataWasLoaded(AssertionError):
    """The search reached the data loader: the bad value was not refused up front."""


def files_in(folder: Path) -> dict[str, int]:
    return {str(p.relative_to(folder)): p.stat().st_size for p in folder.rglob("*") if p.is_file()}


INPUTS = {  # files the flag cases name, by what is wrong with them
    "binary.toml": bytes(range(256)) * 4,
    "binary.json": bytes(range(256)) * 4,
    "empty.json": b"",
    "wrong_fields.json": b'{"input_shape": "big", "stages": 3}',
    "huge.json": b'{"input_shape": [1, 18446744073709551617, 16], "stages": [{"convs": [{"out_channels": 4, '
                 b'"kernel": 3}]}], "head": {"features": "gap", "classes": 4}}',
}


class _Fence(types.ModuleType):
    """Stands in for searcher.data.load (so torch is never imported): calling any of its functions fails the case."""

    def __getattr__(self, name: str):
        if name.startswith("__"):
            raise AttributeError(name)

        def reached(*args, **kwargs):
            raise DataWasLoaded(f"the command called searcher.data.load.{name} before refusing the bad value")

        return reached


@pytest.fixture(scope="module", autouse=True)
def forget_fenced_imports():
    """Modules first imported while the fence stood bound its functions in place of the loader's; once this
    module's cases are done they are forgotten, so later tests import them afresh with the real loader."""
    import searcher

    before = set(sys.modules)
    yield
    for name in set(sys.modules) - before:
        if name.startswith("searcher."):
            del sys.modules[name]
    for name in searcher._LATE:  # the package caches what it loaded on first use
        vars(searcher).pop(name, None)


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("bad_input")


@pytest.fixture
def workdir(base: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh working folder holding the inputs the cases name; the data loader is fenced off."""
    folder = Path(tempfile.mkdtemp(dir=base))
    monkeypatch.chdir(folder)
    (folder / SPACE).write_text(space_text(), encoding="utf-8")
    (folder / "folder").mkdir()
    (folder / "folder.json").mkdir()
    for name, data in INPUTS.items():
        (folder / name).write_bytes(data)
    monkeypatch.setitem(sys.modules, "searcher.data.load", _Fence("searcher.data.load"))
    return folder


def run(argv: list[str], capsys: pytest.CaptureFixture) -> tuple[int | None, str]:
    """Exit status (argparse's SystemExit included) and stderr; any other exception escapes as a failure."""
    try:
        status = main(argv)
    except SystemExit as exc:
        status = exc.code
    return status, capsys.readouterr().err


def assert_refused(status: int | None, err: str, names: tuple[str, ...], value: str, before: dict, folder: Path) -> None:
    assert status == 2, f"exit status {status}, stderr: {err[:READABLE]}"
    assert "Traceback" not in err
    last = err.strip().splitlines()[-1] if err.strip() else ""
    assert last.startswith("searcher") and "error:" in last, err[:READABLE]
    assert any(name in last for name in names), f"{names} not named in: {last[:READABLE]}"
    assert len(last) <= READABLE, f"error line of {len(last)} characters: {last[:200]}..."
    if len(value) > 200:
        assert value[:200] not in err, "a long value was echoed whole"
    assert files_in(folder) == before, "a refused command wrote files"


SPACE_CASES = space_cases()


@pytest.mark.parametrize(("key", "kind", "literal"), SPACE_CASES,
                         ids=[f"{k}-{kind}-{i}" for i, (k, kind, _) in enumerate(SPACE_CASES)])
def test_space_file_key(workdir, capsys, key, kind, literal):
    (workdir / SPACE).write_text(space_text(key, literal), encoding="utf-8")
    before = files_in(workdir)
    status, err = run(["census", "--space", SPACE], capsys)
    assert_refused(status, err, (key,), literal, before, workdir)
    assert SPACE in err.strip().splitlines()[-1], "the space file is not named"


BASE_ARGV = {
    "cost": ["cost", ARCH_OK],
    "census": ["census", "--space", SPACE],
    "search": ["search", "--space", SPACE, "--name", "bad", "--trials", "1"],
    "report": ["report", "--name", "nothing"],
    "status": ["status", "--name", "nothing"],
    "export": ["export", "--name", "nothing"],
}


def argv_for(command: str, flag: Flag, value: str) -> list[str]:
    """The command's base arguments with ``flag`` set to ``value`` (typed as --flag=value)."""
    if flag.name == "ARCH":
        return ["cost", "--", value]
    if command == "searcher":
        return [f"{flag.name}={value}", *BASE_ARGV["cost"]]
    base = BASE_ARGV[command]
    if flag.name in base:
        at = base.index(flag.name)
        base = base[:at] + base[at + 2:]
    return [*base, f"{flag.name}={value}"]


FLAG_CASES = flag_cases()


@pytest.mark.parametrize(("command", "flag", "kind", "value"), FLAG_CASES,
                         ids=[f"{c}-{f.name}-{kind}-{i}" for i, (c, f, kind, _) in enumerate(FLAG_CASES)])
def test_command_line_flag(workdir, capsys, command, flag, kind, value):
    before = files_in(workdir)
    status, err = run(argv_for(command, flag, value), capsys)
    names = flag.says or (flag.name,)
    if value and len(value) < 100 and (workdir / value).is_file():
        names += (value,)  # a file that exists but holds the wrong thing may be named by its path
    assert_refused(status, err, names, value, before, workdir)


def test_the_suite_covers_every_flag_of_every_command():
    """Each option the parser defines has cases, so a new flag cannot slip past the suite."""
    from searcher.cli.main import make_parser

    parser = make_parser()
    commands = next(a for a in parser._actions if a.dest == "command").choices
    covered = {(c, f.name) for c, f, _, _ in FLAG_CASES}
    for name, sub in {"searcher": parser, **commands}.items():
        for action in sub._actions:
            if action.dest in ("help", "command"):
                continue
            flag = next((o for o in action.option_strings if o.startswith("--")), None) or "ARCH"
            assert (name, flag) in covered, f"`searcher {name} {flag}` has no bad-input cases"


def test_the_suite_covers_every_space_file_key():
    from searcher.core.space import SECTIONS
    from searcher.core.budget import BUDGET_KEYS
    from searcher.core.train_settings import TrainSettings
    import dataclasses

    keys = {key for key, _, _ in SPACE_CASES}
    expected = {s if names is None else f"{s}.{n}" for s, names in SECTIONS.items() for n in (names or [None])}
    expected -= {"budget", "train"}
    expected |= {f"budget.{k}" for k in BUDGET_KEYS}
    expected |= {f"train.{f.name}" for f in dataclasses.fields(TrainSettings)}
    assert expected <= keys, expected - keys
    assert len(SPACE_CASES) + len(FLAG_CASES) > 1000 and LONG >= 100_000
