"""What every refusal must look like, shared by the bad-input tests: exit status 2, no traceback, one line."""

from __future__ import annotations

from pathlib import Path

import pytest

from searcher.cli.main import main

from catalogue import space_text


@pytest.fixture
def here(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh working folder holding the catalogue's base space as space.toml."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "space.toml").write_text(space_text(), encoding="utf-8")
    return tmp_path


def refused(argv: list[str], capsys: pytest.CaptureFixture) -> str:
    """The one error line of a command that must exit 2 without a traceback."""
    try:
        status = main(argv)
    except SystemExit as exc:
        status = exc.code
    err = capsys.readouterr().err
    assert status == 2, err
    assert "Traceback" not in err
    return err.strip().splitlines()[-1]
