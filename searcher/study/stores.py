"""The stores a run keeps its studies in: SQLite (the default, in the run folder), a journal file, or
PostgreSQL shared by several machines. Opened with their retries, recognised before they are
opened (a file we did not write is never repaired or replaced), and flushed to disk after every
outcome that cost training."""

from __future__ import annotations

import contextlib
import json
import logging
import os
import random
import re
import sqlite3
import time
from pathlib import Path
from typing import Any, Callable, TypeVar

import optuna
import sqlalchemy

from searcher.errors import SearcherError, shown
from searcher.files import not_regular
from searcher.redact import password_pieces, redact
from searcher.study.optuna_private import journal_lock

log = logging.getLogger(__name__)
T = TypeVar("T")


def storage_url(storage: str | None, folder: Path) -> str:
    """The storage to use: the given URL or path, else SQLite in the run folder."""
    return storage or f"sqlite:///{folder / 'study.db'}"


class NoStore(SearcherError):
    """A command that only reads was pointed at a store file that is not there."""


def storage_kind(url: str) -> str:
    """"journal", "sqlite" or "postgresql" for a storage the program can open; else a clear error.

    Cheap, so a search checks a mistyped ``--storage`` before it spends time loading the data.
    """
    if url.endswith(".journal") and "://" not in url:
        return "journal"
    if url.startswith("sqlite:///"):
        return "sqlite"
    if url.startswith(("postgresql://", "postgres://", "postgresql+")):
        _check_server_url(url)
        return "postgresql"
    raise SearcherError(
        f"`--storage` {redact(url)!r} must be a sqlite:/// or postgresql:// URL or a path ending in .journal",
        key="--storage",
    )


# what RFC 3986 allows in a URL's user-info unescaped: unreserved and sub-delims characters, ':' and %XX
_USER_INFO_CHARACTERS = re.compile(r"(?:[A-Za-z0-9\-._~!$&'()*+,;=:]|%[0-9A-Fa-f]{2})*")


def _check_server_url(url: str) -> None:
    """A PostgreSQL URL the driver will read as the user meant it, checked without showing the password.

    A password holding '@' (``alice:Pa@ss7Word@host``) is split by the driver at the first '@' and
    the rest sent out as a host name; a port that is no number ended in "invalid literal for int()".
    """
    rest = url.split("://", 1)[1].split("?")[0]
    user_info, _, host = rest.rpartition("@")  # the host starts after the last '@' (as redact() reads it)
    host = re.match(r"[^/#]*", host).group(0)
    if user_info and not _USER_INFO_CHARACTERS.fullmatch(user_info):
        odd = sorted({c for c in re.sub(r"%[0-9A-Fa-f]{2}", "", user_info)
                      if not re.fullmatch(r"[A-Za-z0-9\-._~!$&'()*+,;=:]", c)})
        listed = ", ".join(f"{c!r} as %{ord(c):02X}" if ord(c) < 128 else repr(c) for c in odd[:6])
        raise SearcherError(
            f"`--storage` {redact(url)}: the user name or password holds characters a URL must write "
            f"percent-encoded ({listed}); write them so, for example with urllib.parse.quote(password, safe='')",
            key="--storage")
    found = re.fullmatch(r"(\[[0-9A-Fa-f:.]*\]|[^:\[\]]*)(?::(.*))?", host)
    if found is None or host.count(":") > 1 and not host.startswith("["):
        raise SearcherError(f"`--storage` {redact(url)}: the host {shown(host)} is neither a name nor an address; "
                            "write an IPv6 address in brackets, as in postgresql://user@[::1]:5432/db", key="--storage")
    port = found.group(2)
    if port is not None and not (port.isascii() and port.isdigit() and 1 <= int(port) <= 65535):
        raise SearcherError(f"`--storage` {redact(url)}: the port {shown(port)} must be a whole number from 1 to "
                            "65535 (PostgreSQL's is 5432)", key="--storage")


def store_path(url: str) -> Path | None:
    """The file of a SQLite or journal store; None for a server."""
    kind = storage_kind(url)
    return None if kind == "postgresql" else Path(url.removeprefix("sqlite:///"))


def open_storage(url: str, *, create: bool = True) -> optuna.storages.BaseStorage:
    """An Optuna storage for a URL (sqlite:///, postgresql://) or a ``.journal`` file path.

    ``create=False`` is for commands that only read (status, report, export): a store file that
    does not exist is refused instead of created, and nothing is repaired or converted. A store
    file is opened only when it is recognisably one (see :func:`check_sqlite`, :func:`check_journal`):
    a file of the user's at that path is never changed.
    """
    kind = storage_kind(url)
    path = store_path(url)
    if path is not None:
        refused = not_regular(path, "the store")
        if refused is not None:
            raise refused
        if not create and not path.is_file():
            raise NoStore(f"the run's store {path} does not exist (give --storage for a run kept elsewhere)",
                          key="--storage")
    try:
        if kind == "journal":
            if create:
                Path(url).parent.mkdir(parents=True, exist_ok=True)
                repair_journal(Path(url))
            else:
                check_journal(Path(url))
            backend = optuna.storages.journal.JournalFileBackend(url)
            return optuna.storages.JournalStorage(backend)
        if kind == "sqlite":
            read_only = check_sqlite(path)
            if not create:  # mode=rw: SQLite opens the file only if it exists, never makes a new one
                mode = _read_only_mode(path) if read_only else "rw"
                return _rdb_storage(f"sqlite:///file:{path}?mode={mode}&uri=true", {"connect_args": {"timeout": 120}})
            if read_only:
                raise SearcherError(f"the store {path} is in a read-only folder; a search writes to it: run it "
                                    "where the run folder can be written", key="--name")
            path.parent.mkdir(parents=True, exist_ok=True)
            _retried(lambda: _write_ahead_log(path))
            return _commit_without_waiting_for_disk(_rdb_storage(url, {"connect_args": {"timeout": 120}}))
        if url.startswith(("postgresql://", "postgres://")):
            url = "postgresql+psycopg://" + url.split("://", 1)[1]
        return _rdb_storage(url, {"pool_pre_ping": True, "pool_size": 2})
    except SearcherError:
        raise
    except ImportError as exc:
        raise SearcherError(f"`--storage` {redact(url)} needs a driver: {exc}; {_driver_advice(url)}",
                            key="--storage") from None
    except Exception as exc:  # connection refused, bad credentials, unreadable file ...
        said = redact(_first_line(exc), password_pieces(url))  # the driver may echo a piece of a mistyped password
        raise SearcherError(f"cannot open the store {redact(url)}: {said}", key="--storage") from None


def _driver_advice(url: str) -> str:
    """How to install the driver a URL names (searcher's own extra installs psycopg 3)."""
    driver = url.split("://", 1)[0].partition("+")[2]
    if driver in ("", "psycopg"):
        return "install it with `pip install -e .[postgres]` (psycopg 3)"
    return (f"install the {driver!r} package the URL names, or write postgresql:// to use psycopg 3, which "
            "`pip install -e .[postgres]` installs")


SQLITE_HEADER = b"SQLite format 3\0"  # the first 16 bytes of every SQLite database file (sqlite.org/fileformat.html)
OPTUNA_TABLES = {"studies", "trials"}  # tables Optuna's RDB storage creates at once (alembic_version comes after)


def check_sqlite(path: Path) -> bool:
    """Refuse a file at a SQLite store's path that is not one of Optuna's stores, or is damaged.

    An empty or missing file is fine (a new store). A file that is not SQLite, a database of another
    program's (it has tables, not Optuna's), or one SQLite finds damaged is named and left as it is.
    Returns whether the file's folder is read-only (then the file can only be read: see _read_only_mode).
    """
    if not path.exists() or path.stat().st_size == 0:
        return False
    read_only = not os.access(path.parent, os.W_OK | os.X_OK) or not os.access(path, os.W_OK)
    uri = f"file:{path}?mode=" + (_read_only_mode(path) if read_only else "ro")

    def look() -> tuple[set[str], list[str]]:
        with contextlib.closing(sqlite3.connect(uri, uri=True, timeout=120)) as connection:
            tables = {row[0] for row in connection.execute("SELECT name FROM sqlite_master WHERE type = 'table'")}
            return tables, [row[0] for row in connection.execute("PRAGMA quick_check(3)")]

    try:
        tables, verdict = _retried(look)  # another search may be switching a new store to WAL mode this moment
    except sqlite3.DatabaseError as exc:  # "file is not a database", "database disk image is malformed"
        if _CREATION_RACE.search(str(exc)):
            raise SearcherError(f"the store {path} stayed locked by another process: {exc}; try again when it is "
                                "done", key="--storage") from None
        _refuse_other_formats(path)
        raise _damaged(path, str(exc)) from None
    if verdict != ["ok"]:
        raise _damaged(path, "; ".join(verdict))
    if tables and not OPTUNA_TABLES <= tables:
        raise SearcherError(f"the store {path} is a SQLite database of another program (tables "
                            f"{shown(sorted(tables))}); searcher changes nothing in it: give --storage a new file",
                            key="--storage")
    return read_only


def _refuse_other_formats(path: Path) -> None:
    """Refuse a file that is no SQLite database at all, showing how it starts.

    Its first bytes are read only once SQLite has refused the file: this process may hold SQLite
    connections to a store, and closing any other descriptor of the same file would drop their
    locks (POSIX locks belong to the process, not the descriptor), letting another process take a
    live store for an abandoned one: seen as a store that read "malformed" while a search wrote it.
    """
    with open(path, "rb") as handle:
        head = handle.read(len(SQLITE_HEADER))
    if head != SQLITE_HEADER:
        raise SearcherError(f"the store {path} is not a SQLite database (it starts {shown(head)}); searcher changes "
                            "nothing in it: give --storage a new file, or move this one away", key="--storage")


def _read_only_mode(path: Path) -> str:
    """How SQLite can read a store in a folder it cannot write: through the store's write-ahead log when one
    is left (SQLite reads it read-only when its -shm index is there too), else as an immutable file (nobody
    can be writing to it there)."""
    wal = path.with_name(path.name + "-wal")
    if not wal.exists() or wal.stat().st_size == 0:
        return "ro&immutable=1"
    if not path.with_name(path.name + "-shm").exists():
        raise SearcherError(f"the store {path} has a write-ahead log ({wal.name}) that SQLite can read only where it "
                            "may write its index beside it; make the folder writable once, and the log is folded "
                            "into the store", key="--storage")
    return "ro"


def _damaged(path: Path, why: str) -> SearcherError:
    return SearcherError(f"the store {path} is damaged (SQLite says: {why}); searcher changes nothing in it: restore "
                         "it from a copy, or start a new run with another --name", key="--storage")


def _write_ahead_log(path: Path) -> None:
    """Put a SQLite file in WAL mode, which lets readers (status, report) not block writers.

    The mode is kept in the file, so only a new file needs it set. Two searches started at once on
    a new file both set it, and SQLite answers one of them "database is locked" at once, without
    waiting out the busy timeout: :func:`_retried` makes that one look again.
    """
    with contextlib.closing(sqlite3.connect(path, timeout=120)) as connection:
        if connection.execute("PRAGMA journal_mode").fetchone()[0].lower() != "wal":
            connection.execute("PRAGMA journal_mode=WAL")


# how Optuna's journal backend writes every record: compact JSON, its operation first
_JOURNAL_RECORD = b'{"op_code":'
_JOURNAL_OPERATIONS = range(11)  # optuna.storages.journal's JournalOperation: CREATE_STUDY (0) to DISCARD_TRIALS (10)


def check_journal(path: Path, whole: bool = True) -> int:
    """How many bytes at the end of a journal store are the torn last append of a power cut (0: none).

    A journal store is recognisably Optuna's when every complete line is one of its records: a JSON
    object with an ``op_code`` from its list of operations and a ``worker_id``. A file whose first
    line is not, or with a line that is not further on, is refused by name, untouched: it is the
    user's file, or a damaged store that a cut would make worse. Only a last line without its line
    end that starts as a record does (or is all zero bytes) counts as torn. ``whole=False`` looks
    at the first line only.
    """
    size = path.stat().st_size if path.exists() else 0
    if size == 0:
        return 0
    with open(path, "rb") as handle:
        first = handle.readline(4096)
        if not _is_record(first) and not (len(first) == size and _torn(first)):
            raise SearcherError(
                f"the store {path} is not a journal store: its first line is not one of Optuna's journal records "
                f"({shown(first[:60].decode('utf-8', 'replace'))}); searcher changes nothing in it: give --storage "
                "a new .journal path, or the journal a search wrote", key="--storage")
        if not whole:
            return 0
        handle.seek(0)
        data = handle.read()
    keep = data.rfind(b"\n") + 1
    lines = data[:keep].splitlines(keepends=True)
    bad = next((number for number, line in enumerate(lines, 1) if not _is_record(line)), None)
    if bad is None and keep < len(data) and not _torn(data[keep:]):
        bad = len(lines) + 1
    if bad is not None:
        raise SearcherError(
            f"the journal store {path} is damaged at line {bad} (not one of Optuna's journal records); searcher "
            "changes nothing in it: restore it from a copy, or start a new run with another --storage",
            key="--storage")
    return len(data) - keep


def _is_record(line: bytes) -> bool:
    if not line.endswith(b"\n") or not line.startswith(_JOURNAL_RECORD):
        return False
    try:
        record = json.loads(line)
    except (ValueError, RecursionError):  # UnicodeDecodeError and JSONDecodeError both are ValueErrors
        return False
    return (isinstance(record, dict) and type(record.get("op_code")) is int
            and record["op_code"] in _JOURNAL_OPERATIONS and isinstance(record.get("worker_id"), str))


def _torn(tail: bytes) -> bool:
    """The start of a record cut short (or zeros a file system wrote in its place), with no line end."""
    return b"\n" not in tail and (tail.startswith(_JOURNAL_RECORD) or _JOURNAL_RECORD.startswith(tail)
                                   or not tail.strip(b"\0"))


def repair_journal(path: Path) -> int:
    """Cut the torn last append a power cut can leave on a journal file; the number of bytes cut.

    Optuna fsyncs each append, so only the last one can be incomplete: a torn line, or one the
    file system filled with zeros. Optuna's reader skips such a last line but refuses the file
    once anything is appended after it. The file is checked and cut under the journal's own lock,
    the one every append holds, so no writer is half-way through a line meanwhile; a file that is
    not recognisably a journal store is refused untouched (:func:`check_journal`).
    """
    if not path.exists() or path.stat().st_size == 0:
        return 0
    check_journal(path, whole=False)  # before the lock, which puts a file beside the store
    lock = journal_lock(str(path))
    lock.acquire()
    try:
        torn = check_journal(path)
        if torn:
            with open(path, "r+b") as handle:
                handle.truncate(path.stat().st_size - torn)
                os.fsync(handle.fileno())
            log.warning("%s: cut %d bytes of an incomplete last write (a power cut?); the rest is intact", path, torn)
        return torn
    finally:
        lock.release()


def _commit_without_waiting_for_disk(storage: optuna.storages.RDBStorage) -> optuna.storages.RDBStorage:
    """SQLite's synchronous=NORMAL on every connection: a commit no longer waits for the disk.

    Optuna commits once per suggested parameter, about fifteen times per proposal; waiting for the
    disk each time was most of the search loop's storage cost. In WAL mode this setting cannot
    corrupt the file; a power cut can only drop the commits since the last flush to disk, and
    :func:`disk_flush` is called after every candidate that cost training time.
    """
    def relax(connection: Any, _record: Any) -> None:
        connection.execute("PRAGMA synchronous=NORMAL")

    sqlalchemy.event.listen(storage.engine, "connect", relax)
    storage.engine.dispose()  # the connections opened while creating the tables did not have it
    return storage


def disk_flush(url: str) -> Callable[[], None] | None:
    """For a SQLite store: a call that puts everything committed so far on disk (fsync of its WAL).

    None for other stores, which make each commit durable themselves.
    """
    if storage_kind(url) != "sqlite":
        return None
    wal = url.removeprefix("sqlite:///") + "-wal"

    def flush() -> None:
        try:
            descriptor = os.open(wal, os.O_RDONLY)
        except FileNotFoundError:  # checkpointed away: the database file itself holds everything
            return
        try:
            os.fsync(descriptor)
        finally:
            os.close(descriptor)

    return flush


# what opening a new store says when another process is setting up the same store at that moment
# (creating its tables, or switching a SQLite file to WAL mode)
_CREATION_RACE = re.compile(r"already exists|unique|duplicate|database is locked", re.IGNORECASE)


def _retried(action: Callable[[], T], attempts: int = 60) -> T:
    """``action()``, tried again after a moment while another process is setting up the same new store."""
    for attempt in range(attempts):
        try:
            return action()
        except Exception as exc:
            if attempt == attempts - 1 or not _CREATION_RACE.search(str(exc)):
                raise
            log.debug("another process is setting up the store (%s); retrying", _first_line(exc))
            time.sleep(0.02 + 0.06 * random.random())
    raise AssertionError("unreachable")


def _rdb_storage(url: str, engine_kwargs: dict[str, Any]) -> optuna.storages.RDBStorage:
    """An RDB storage, retried while another worker is creating the same fresh database's tables."""
    return _retried(lambda: optuna.storages.RDBStorage(url, engine_kwargs=engine_kwargs))


def _first_line(exc: BaseException) -> str:
    return (str(exc).strip().splitlines() or [type(exc).__name__])[0]


