"""Run folders: every output of a run lives under runs/<name>/, written so nothing is half-written."""

from __future__ import annotations

import os
import re
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
