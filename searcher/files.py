"""Files: those the user names read safely (regular files only, never past a size ceiling), and those
we write written whole or not at all (:func:`write_atomic`).

A named pipe (FIFO) blocks whoever opens it until something writes to it, and a device such as
``/dev/zero`` or ``/dev/urandom`` never ends: reading either "as a file" hangs or exhausts memory.
So a file is looked at (``stat``, which never blocks) before it is opened, opened without waiting
(``O_NONBLOCK``, in case something else took its place meanwhile), looked at again, and read no
further than its ceiling from :mod:`searcher.limits`.
"""

from __future__ import annotations

import os
import stat
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import BinaryIO

from searcher.errors import SearcherError, shown
from searcher.core.units import format_bytes

_KINDS = ((stat.S_ISREG, "a regular file"), (stat.S_ISLNK, "a symbolic link"), (stat.S_ISDIR, "a folder"),
          (stat.S_ISFIFO, "a named pipe (FIFO)"), (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
          (stat.S_ISSOCK, "a socket"))


def kind_of(mode: int) -> str:
    """What a file system entry is, in words: 'a regular file', 'a named pipe (FIFO)', 'a folder' ..."""
    return next((name for test, name in _KINDS if test(mode)), "of an unknown kind")


def not_regular(path: str | Path, what: str, key: str | None = None, *, follow: bool = True) -> SearcherError | None:
    """The error for a ``path`` that exists but is no regular file (None when it is one, or is missing).

    ``follow=False`` looks at a symbolic link itself (for paths a command writes to).
    """
    try:
        mode = os.stat(path).st_mode if follow else os.lstat(path).st_mode
    except (OSError, ValueError):
        return None
    if stat.S_ISREG(mode):
        return None
    return SearcherError(f"{what} {shown(str(path))} is {kind_of(mode)}, not a regular file", key=key)


def read_regular(path: str | Path, limit: int, what: str, key: str | None = None) -> bytes:
    """The bytes of a regular file of at most ``limit`` bytes; an error naming ``what`` and the path otherwise.

    ``what`` says what the file is for ("space file", "architecture file"); missing files and
    unreadable ones raise OSError as ``open`` does, for the caller to word.
    """
    refused = not_regular(path, what, key)
    if refused is not None:
        raise refused
    descriptor = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    with os.fdopen(descriptor, "rb") as handle:
        mode = os.fstat(handle.fileno()).st_mode
        if not stat.S_ISREG(mode):  # replaced between the look and the open
            raise SearcherError(f"{what} {shown(str(path))} is {kind_of(mode)}, not a regular file", key=key)
        data = handle.read(limit + 1)
    if len(data) > limit:
        raise SearcherError(f"{what} {shown(str(path))} holds more than {format_bytes(limit)}, the most searcher "
                            f"reads of a {what}", key=key)
    return data


def write_atomic(path: Path, data: str | bytes | Callable[[BinaryIO], object]) -> Path:
    """Write a file whole or not at all: a temporary file in the same folder, then a rename.

    `data` may be a function that writes to the open file, for contents too large to build in memory first.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    if os.path.lexists(path) and not stat.S_ISREG(os.lstat(path).st_mode):  # checked up front too: check_run_paths
        raise SearcherError(f"{path} is {kind_of(os.lstat(path).st_mode)}, not a file searcher wrote; it is left as "
                            "it is: move it away")
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
