"""Run folders: every output of a run lives under runs/<name>/, written so nothing is half-written."""

from __future__ import annotations

import os
import re
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO

from searcher.errors import SearcherError, shown

RUNS = Path("runs")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,79}$")


def run_folder(name: str, root: Path = RUNS) -> Path:
    """The folder of run ``name``; names are plain so they are safe as folder names."""
    if not isinstance(name, str) or not _NAME.match(name):
        raise SearcherError(
            f"`--name` {shown(name)} must be 1-80 letters, digits, '.', '_' or '-', starting with a letter or digit",
            key="--name",
        )
    return root / name


def why_unwritable(folder: Path) -> str | None:
    """Why ``folder`` could not be made or written (None when it can), found without creating anything.

    A command checks this before its work, so that a folder it cannot write costs the user no
    waiting and leaves nothing behind: the nearest part of the path that exists must be a folder
    this process may write into.
    """
    path = Path(folder)
    while True:
        try:
            mode = os.stat(path).st_mode
        except (FileNotFoundError, NotADirectoryError):  # not there yet (or under a file: found further up)
            if path.parent == path:
                return None
            path = path.parent
            continue
        except OSError as exc:
            return f"{path}: {exc.strerror or exc}"
        if not stat.S_ISDIR(mode):
            return f"{path} is {'a regular file' if stat.S_ISREG(mode) else 'not a folder'}, not a folder"
        if not os.access(path, os.W_OK | os.X_OK):
            return f"{path} is read-only"
        return None


def plain_name(text: str, fallback: str = "space") -> str:
    """``text`` made fit to be part of a run name: other characters become '-', cut to 60.

    >>> plain_name("Stamp inspection (v2)")
    'Stamp-inspection-v2'
    """
    name = re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-._")[:60].strip("-._")
    return name or fallback


def write_atomic(path: Path, data: str | bytes | Callable[[BinaryIO], object]) -> Path:
    """Write a file whole or not at all: a temporary file in the same folder, then a rename.

    `data` may be a function that writes to the open file, for contents too large to build in memory first.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as handle:
            if callable(data):
                data(handle)
            else:
                handle.write(data.encode("utf-8") if isinstance(data, str) else data)
            handle.flush()
            os.fsync(handle.fileno())  # on disk before the rename, so a power cut leaves old or new
        os.chmod(tmp, 0o644)  # mkstemp makes files private; results are for sharing
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
