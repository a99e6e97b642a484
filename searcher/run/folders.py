"""Run folders: every output of a run lives under runs/<name>/, written so nothing is half-written."""

from __future__ import annotations

import contextlib
import fcntl
import logging
import os
import re
import shutil
import signal
import socket
import stat
import threading
import time
from collections.abc import Iterator
from pathlib import Path

from searcher.errors import SearcherError, shown
from searcher.files import kind_of

log = logging.getLogger(__name__)

RUNS = Path("runs")
# what commands write in a run folder: files (each replaced whole, or appended to: search.log) and folders
RUN_FILES = ("study.db", "study.db-wal", "study.db-shm", "split.npz", "decoded.npz", "unreadable.txt", "run.json",
             "search.log", "trials.csv", "front.csv", "confirmed.csv", "summary.json", "report.html")
RUN_FOLDERS = ("workers", "export")
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
            return f"{path} is {kind_of(mode)}, not a folder"
        if not os.access(path, os.W_OK | os.X_OK):
            return f"{path} is read-only"
        return None


def check_run_paths(folder: Path, files: tuple[str, ...] = RUN_FILES, folders: tuple[str, ...] = RUN_FOLDERS) -> None:
    """Refuse to work in a run folder where a path a command writes holds something it did not write.

    A named pipe there would block the command, and a symbolic link would have it write into
    whatever the link points at; a folder in a file's place (or a file in a folder's) cannot be
    replaced without losing what it holds. Such an entry is named, and nothing is touched.
    """
    why = why_unwritable(folder)
    if why is not None:
        raise SearcherError(f"cannot write into run folder {folder}: {why}; this command writes there: make it "
                            "writable, or run searcher from a folder where runs/ can be written", key="--name")
    for name, want in [(n, stat.S_ISREG) for n in files] + [(n, stat.S_ISDIR) for n in folders]:
        try:
            mode = os.lstat(folder / name).st_mode
        except (FileNotFoundError, NotADirectoryError):
            continue
        if not want(mode):
            what = "a regular file" if want is stat.S_ISREG else "a folder"
            raise SearcherError(f"{folder / name} is {kind_of(mode)}, where searcher keeps {what} of the run; searcher "
                                "changes nothing there: move it away, or use another --name", key="--name")


def plain_name(text: str, fallback: str = "space") -> str:
    """``text`` made fit to be part of a run name: other characters become '-', cut to 60.

    >>> plain_name("Stamp inspection (v2)")
    'Stamp-inspection-v2'
    """
    name = re.sub(r"[^A-Za-z0-9._-]+", "-", text).strip("-._")[:60].strip("-._")
    return name or fallback


LEFT_FOR = 6 * 3600  # seconds without change after which a swap folder of an older version (no owner) is stale


@contextlib.contextmanager
def folder_swap(target: Path) -> Iterator[Path]:
    """A fresh folder beside ``target`` to write into, swapped in for ``target`` whole when the block ends well.

    So ``target`` is never half-written: a reader sees the old folder or the new one. The new folder
    and the old one on its way out carry their owner in their names (``.export-new-HOST-PID-MS``);
    a later swap removes those whose process is gone (a SIGKILL's leftovers), and puts an old folder
    back when a kill fell between the two renames, while it leaves alone the folders of another swap
    that is still running (two exports at once). SIGTERM while writing ends the process as it would,
    after the new folder is removed; the two renames hold SIGINT and SIGTERM back until both are done.
    A ``target`` holding something the new folder does not is kept aside whole, never deleted.
    """
    owner = f"{plain_name(socket.gethostname(), 'host')}-{os.getpid()}-{int(time.time() * 1000)}"
    with _locked(target.parent):
        clean_stale_swaps(target)
    temp = target.with_name(f".{target.name}-new-{owner}")
    temp.mkdir(parents=True)
    try:
        with _terminate_as_exit():
            yield temp
            _swap(target, temp, owner)
    except BaseException:
        shutil.rmtree(temp, ignore_errors=True)
        raise


def _swap(target: Path, temp: Path, owner: str) -> None:
    """Put ``temp`` in the place of ``target``, with SIGINT and SIGTERM held until it is done."""
    with _locked(target.parent), _signals_held():
        old = target.with_name(f".{target.name}-old-{owner}")
        kept = _foreign_entries(target, temp)
        if target.exists():
            target.rename(old)
        temp.rename(target)
        if kept:
            aside = target.with_name(f"{target.name}-replaced-{time.strftime('%Y%m%d-%H%M%S')}")
            old.rename(aside)
            log.warning("%s held %s, which %s does not write: the previous folder is kept whole in %s", target,
                        ", ".join(kept[:5]) + (" ..." if len(kept) > 5 else ""), target.name, aside)
        shutil.rmtree(old, ignore_errors=True)  # before a held signal can end the process


def clean_stale_swaps(target: Path) -> list[Path]:
    """Remove the swap folders beside ``target`` that no live process owns; the folders removed.

    One whose owner runs on this machine is stale when that process is gone; one of another machine
    (a shared file system) is left alone. Folders of older versions carry no owner: stale after
    LEFT_FOR seconds without change. An old folder whose swap was cut between its renames, with no
    ``target`` left, is put back as ``target`` instead.
    """
    pattern = re.compile(rf"^\.{re.escape(target.name)}-(?:(new|old)-(.+)-(\d+)-\d+|(old-)?\d+)$")
    host = plain_name(socket.gethostname(), "host")
    removed = []
    for entry in sorted(target.parent.glob(f".{target.name}-*")):
        found = pattern.match(entry.name)
        if found is None or not entry.is_dir() or entry.is_symlink():
            continue
        if found.group(1):  # with an owner
            if found.group(2) != host or pid_alive(int(found.group(3))):
                continue
            was_old = found.group(1) == "old"
        else:
            if time.time() - entry.stat().st_mtime < LEFT_FOR:
                continue
            was_old = bool(found.group(4))
        if was_old and not os.path.lexists(target):
            entry.rename(target)
            log.warning("%s: put back the previous %s that an interrupted swap had moved aside", target, target.name)
            continue
        shutil.rmtree(entry, ignore_errors=True)
        removed.append(entry)
        log.info("removed %s, left by an interrupted %s", entry, target.name)
    return removed


def pid_alive(pid: int) -> bool:
    """Whether process ``pid`` of this machine is still there."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def _foreign_entries(target: Path, new: Path) -> list[str]:
    """Names in ``target`` that ``new`` does not have: files of the user's, or of another version."""
    if not target.is_dir():
        return []
    return sorted(set(os.listdir(target)) - set(os.listdir(new)))


@contextlib.contextmanager
def _locked(folder: Path) -> Iterator[None]:
    """An exclusive lock on ``folder`` itself (flock on its descriptor), so two swaps beside each other take turns."""
    folder.mkdir(parents=True, exist_ok=True)
    descriptor = os.open(folder, os.O_RDONLY)
    try:
        fcntl.flock(descriptor, fcntl.LOCK_EX)
        yield
    finally:
        os.close(descriptor)  # closing gives the lock back


@contextlib.contextmanager
def _signals_held() -> Iterator[None]:
    """SIGINT and SIGTERM wait until the block is done, then act as they would have.

    Python runs its signal handlers in the main thread whichever thread the signal reached (torch
    keeps threads of its own, so blocking the signals in one thread would not hold them); so the
    handlers are swapped for one that notes the signal, and a noted signal is raised again after.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    noted: list[int] = []
    before = {number: signal.signal(number, lambda n, frame: noted.append(n)) for number in (signal.SIGINT,
                                                                                             signal.SIGTERM)}
    try:
        yield
    finally:
        for number, handler in before.items():
            signal.signal(number, handler)
        for number in dict.fromkeys(noted):
            signal.raise_signal(number)


@contextlib.contextmanager
def _terminate_as_exit() -> Iterator[None]:
    """SIGTERM raises SystemExit(143) while the block runs, so what it wrote is cleaned up (the default would
    end the process on the spot); the exit status is the one SIGTERM gives."""
    if threading.current_thread() is not threading.main_thread() or signal.getsignal(signal.SIGTERM) != signal.SIG_DFL:
        yield
        return

    def terminated(number: int, frame: object) -> None:
        raise SystemExit(128 + signal.SIGTERM)

    signal.signal(signal.SIGTERM, terminated)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
