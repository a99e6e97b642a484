"""Faults beyond a wrong value, generated for every place they can enter (issue 17).

* special files (a FIFO, /dev/zero, /dev/urandom, a folder, a socket, a file past its ceiling) wherever
  a command reads a file: space files, architecture files, data files, stores, the run folder's own files;
* files searcher did not write at a path it writes to: in the run folder, the census folder and the store;
* values nested thousands deep, in every space-file key and every JSON a command reads;
* headers that lie about what follows (.npz arrays, PNG images, the run folder's own .npz files).

Each case runs the command in this process and asserts the promise: exit status 2, no traceback, one
line naming the path (or key) and what it is, and nothing of the user's replaced or changed. A case
that would hang fails after SAFETY seconds instead. Names that reach the outputs, damaged stores,
signals during export and divergence in every training path are in test_outputs.py.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import sqlite3
import zlib
from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from searcher.cli.main import main

from catalogue import ARCH_OK, SPACE_KEYS, space_text
from checks import made, no_hang, npz_with_header  # noqa: F401  (made is a fixture)

IMAGES = np.random.default_rng(1).integers(0, 256, size=(30, 12, 12), dtype=np.uint8)
LABELS = np.arange(30) % 3


def outcome(argv: list[str], capsys: pytest.CaptureFixture) -> tuple[int | None, str]:
    with no_hang():
        try:
            status = main(argv)
        except SystemExit as exc:
            status = exc.code
    return status, capsys.readouterr().err


def refused_line(argv: list[str], capsys: pytest.CaptureFixture) -> str:
    status, err = outcome(argv, capsys)
    assert status == 2, err[-800:]
    assert "Traceback" not in err
    line = err.strip().splitlines()[-1]
    assert line.startswith("searcher") and "error:" in line
    assert len(line) < 600, line[:200]
    return line


def snapshot(folder: Path) -> dict[str, tuple[str, int]]:
    """Every entry under ``folder``: its kind and, for a regular file, a digest of its content. SQLite's own
    shared-memory index (-shm) is left out: any reader of a store updates it."""
    found = {}
    for path in sorted(folder.rglob("*")):
        if path.name.endswith("-shm"):
            continue
        if path.is_symlink():
            found[str(path.relative_to(folder))] = ("link", hash(os.readlink(path)))
        elif path.is_file():
            found[str(path.relative_to(folder))] = ("file", zlib.crc32(path.read_bytes()))
        else:
            found[str(path.relative_to(folder))] = ("dir" if path.is_dir() else "special", 0)
    return found


# -- special files where a file is read ------------------------------------------------------------------
def fifo(path: Path) -> None:
    os.mkfifo(path)


def unix_socket(path: Path) -> None:
    with socket.socket(socket.AF_UNIX) as server:
        server.bind(str(path))  # the socket file stays after the socket is closed


def link_to(target: str) -> Callable[[Path], None]:
    return lambda path: path.symlink_to(target)


def folder(path: Path) -> None:
    path.mkdir()


def oversize(path: Path) -> None:
    path.write_bytes(b"#" * (2**20 + 1))  # one byte past the ceiling on space and architecture files


SPECIAL: dict[str, tuple[Callable[[Path], None], str]] = {  # how to make it, and what the message must call it
    "fifo": (fifo, "named pipe (FIFO)"),
    "dev-zero": (link_to("/dev/zero"), "character device"),
    "dev-urandom": (link_to("/dev/urandom"), "character device"),
    "folder": (folder, "folder"),
    "socket": (unix_socket, "socket"),
}

# where a command reads a file the user names: (file name, argv with {} for it, kinds that apply)
READ_PLACES: dict[str, tuple[str, list[str]]] = {
    "census --space": ("s.toml", ["census", "--space", "{}"]),
    "search --space": ("s.toml", ["search", "--space", "{}", "--name", "r"]),
    "cost --space": ("s.toml", ["cost", ARCH_OK, "--space", "{}"]),
    "cost FILE.json": ("a.json", ["cost", "{}"]),
    "census --data": ("d.npz", ["census", "--space", "space.toml", "--data", "{}"]),
    "search --data": ("d.npz", ["search", "--space", "space.toml", "--name", "r", "--data", "{}"]),
    "search --storage .journal": ("s.journal", ["search", "--space", "space.toml", "--name", "r", "--storage", "{}"]),
    "status --storage .journal": ("s.journal", ["status", "--name", "r", "--storage", "{}"]),
    "report --storage .journal": ("s.journal", ["report", "--name", "r", "--storage", "{}"]),
    "export --storage .journal": ("s.journal", ["export", "--name", "r", "--storage", "{}"]),
    "search --storage sqlite": ("s.db", ["search", "--space", "space.toml", "--name", "r", "--storage", "sqlite:///{}"]),
    "status --storage sqlite": ("s.db", ["status", "--name", "r", "--storage", "sqlite:///{}"]),
    "report --storage sqlite": ("s.db", ["report", "--name", "r", "--storage", "sqlite:///{}"]),
    "export --storage sqlite": ("s.db", ["export", "--name", "r", "--storage", "sqlite:///{}"]),
}
CEILINGS = ("census --space", "search --space", "cost --space", "cost FILE.json")  # files read whole, with a ceiling

READ_CASES = [(place, kind) for place in READ_PLACES for kind in SPECIAL]
READ_CASES += [(place, "oversize") for place in CEILINGS]


@pytest.fixture
def here(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "space.toml").write_text(space_text(), encoding="utf-8")
    return tmp_path


@pytest.mark.parametrize(("place", "kind"), READ_CASES, ids=[f"{p}-{k}" for p, k in READ_CASES])
def test_a_special_file_where_a_file_is_read(here, capsys, place, kind):
    """A FIFO waited for ever and /dev/zero ran out of memory: anything but a regular file is named and refused."""
    name, argv = READ_PLACES[place]
    make, called = SPECIAL.get(kind, (oversize, "holds more than 1 MiB"))
    make(here / name)
    before = snapshot(here)
    line = refused_line([a.replace("{}", name) for a in argv], capsys)
    assert name in line and (called in line or (kind == "folder" and "class sub-folders" in line)), line
    assert snapshot(here) == before, "a refused command changed the working folder"


def test_entries_of_a_class_folder_that_are_no_regular_files_are_passed_over(here, capsys, caplog):
    """A FIFO or a link to a device named like an image would block or never end: passed over, and said so."""
    from PIL import Image

    for label in ("a", "b"):
        (here / "images" / label).mkdir(parents=True)
        for i in range(10):
            Image.fromarray(IMAGES[i]).save(here / "images" / label / f"{i}.png")
    fifo(here / "images" / "a" / "pipe.png")
    link_to("/dev/zero")(here / "images" / "b" / "zero.png")
    status, err = outcome(["census", "--space", "space.toml", "--data", "images"], capsys)
    assert status == 0, err
    assert "passed over 1 image name(s) that are not regular files, first pipe.png" in caplog.text
    assert "first zero.png" in caplog.text


# -- what searcher did not write, at a path it writes to or reads from in a run folder ----------------
@pytest.fixture(scope="module")
def slim(made: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The made run without its large report, to copy for each case."""
    folder = tmp_path_factory.mktemp("slim")
    shutil.copytree(made / "runs", folder / "runs", symlinks=True)
    (folder / "runs" / "done" / "report.html").unlink()
    (folder / "runs" / "done" / "report.html").write_text("<p>a report</p>")
    shutil.copy(made / "space.toml", folder / "space.toml")
    return folder


@pytest.fixture
def run_here(slim: Path, made: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    shutil.copytree(slim, tmp_path / "w", symlinks=True)
    monkeypatch.chdir(tmp_path / "w")
    (tmp_path / "w" / "mine.txt").write_text("a file of the user's")
    (tmp_path / "w" / "mine").mkdir()
    return tmp_path / "w"


def replace_with(kind: str) -> Callable[[Path], None]:
    def make(path: Path) -> None:
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path)
        elif os.path.lexists(path):
            path.unlink()
        {"fifo": fifo, "folder": folder, "file": lambda p: p.write_text("not ours"),
         "link to a file of the user's": link_to(str(Path("mine.txt").resolve())),
         "link to a folder of the user's": link_to(str(Path("mine").resolve()))}[kind](path)

    return make


# what each command reads or writes in runs/NAME/, so a foreign entry there must stop it
USES = {
    "search": ["study.db", "split.npz", "decoded.npz", "run.json", "search.log", "trials.csv", "report.html",
               "summary.json", "workers", "export"],
    "report": ["study.db", "split.npz", "trials.csv", "front.csv", "summary.json", "report.html"],
    "export": ["study.db", "split.npz", "decoded.npz", "run.json", "export"],
    "status": ["study.db"],
}
FOLDERS = ("workers", "export")
ARGV = {"search": ["search", "--space", "space.toml", "--name", "done", "--data", "demo"],
        "report": ["report", "--name", "done"], "export": ["export", "--name", "done", "--epochs", "1"],
        "status": ["status", "--name", "done"]}
RUN_CASES = [(command, entry, kind) for command, entries in USES.items() for entry in entries
             for kind in (("file", "fifo", "link to a folder of the user's") if entry in FOLDERS else
                          ("fifo", "folder", "link to a file of the user's"))]


@pytest.mark.parametrize(("command", "entry", "kind"), RUN_CASES, ids=[f"{c}-{e}-{k}" for c, e, k in RUN_CASES])
def test_what_searcher_did_not_write_in_a_run_folder_is_left_alone(run_here, capsys, command, entry, kind):
    path = run_here / "runs" / "done" / entry
    replace_with(kind)(path)
    before = snapshot(run_here)
    line = refused_line(ARGV[command], capsys)
    assert entry in line, line
    assert snapshot(run_here) == before, "a refused command changed the working folder"


CENSUS_FILES = ("census_summary.csv", "census_spread.csv", "census_depth_width.csv", "census.html")


@pytest.mark.parametrize("kind", ["fifo", "folder", "link to a file of the user's"])
@pytest.mark.parametrize("entry", CENSUS_FILES)
def test_what_searcher_did_not_write_in_a_census_folder_is_left_alone(here, capsys, entry, kind):
    (here / "mine.txt").write_text("a file of the user's")
    (here / "runs" / "census-tiny").mkdir(parents=True)
    replace_with(kind)(here / "runs" / "census-tiny" / entry)
    before = snapshot(here)
    line = refused_line(["census", "--space", "space.toml"], capsys)
    assert entry in line and snapshot(here) == before


def test_files_of_the_users_in_the_export_folder_are_kept(run_here, capsys):
    """Export replaces its folder whole; a file it does not write there is kept, with the previous export."""
    (run_here / "runs" / "done" / "export").mkdir()
    (run_here / "runs" / "done" / "export" / "notes.txt").write_text("measured on the line: 97%")
    status, err = outcome(["export", "--name", "done", "--epochs", "1", "--arch", "1x16x16_c2k3-m2_gap-o3_relu"],
                          capsys)
    assert status == 0, err
    kept = list((run_here / "runs" / "done").glob("export-replaced-*/notes.txt"))
    assert len(kept) == 1 and kept[0].read_text() == "measured on the line: 97%"
    assert (run_here / "runs" / "done" / "export" / "MODEL_CARD.md").is_file()


# -- foreign contents at a store's path --------------------------------------------------------------------
def sqlite_of_another_program(path: Path) -> None:
    with contextlib.closing(sqlite3.connect(path)) as connection:
        connection.execute("CREATE TABLE invoices (number INTEGER, total REAL)")
        connection.commit()


STORE_CONTENTS: dict[str, tuple[str, Callable[[Path], None], str]] = {  # (file, how, what the message says)
    "journal: notes": ("s.journal", lambda p: p.write_text("milk\neggs\n"), "is not a journal store"),
    "journal: notes without a last line end": ("s.journal", lambda p: p.write_text("milk\neggs"),
                                               "is not a journal store"),
    "journal: JSON objects": ("s.journal", lambda p: p.write_text('{"a": 1}\n{"b": 2}\n'), "is not a journal store"),
    "journal: an op_code of no operation": ("s.journal", lambda p: p.write_text('{"op_code":99,"worker_id":"w"}\n'),
                                            "is not a journal store"),
    "journal: JSON nested 5000 deep": ("s.journal", lambda p: p.write_text("[" * 5000 + "]" * 5000 + "\n"),
                                       "is not a journal store"),
    "journal: binary": ("s.journal", lambda p: p.write_bytes(bytes(range(256)) * 8), "is not a journal store"),
    "sqlite: notes": ("s.db", lambda p: p.write_text("milk\neggs\n"), "is not a SQLite database"),
    "sqlite: binary": ("s.db", lambda p: p.write_bytes(bytes(range(256)) * 16), "is not a SQLite database"),
    "sqlite: another program's database": ("s.db", sqlite_of_another_program,
                                           "is a SQLite database of another program (tables ['invoices'])"),
}
STORE_COMMANDS = {"search": ["search", "--space", "space.toml", "--name", "r"], "status": ["status", "--name", "r"],
                  "report": ["report", "--name", "r"], "export": ["export", "--name", "r"]}
STORE_CASES = [(c, k) for c in STORE_COMMANDS for k in STORE_CONTENTS]


@pytest.mark.parametrize(("command", "content"), STORE_CASES, ids=[f"{c}-{k}" for c, k in STORE_CASES])
def test_a_file_at_the_stores_path_that_is_not_a_store_is_left_alone(here, capsys, command, content):
    """A user's notes.journal was "repaired" (cut) and then replaced by a new store."""
    name, make, says = STORE_CONTENTS[content]
    make(here / name)
    url = name if name.endswith(".journal") else f"sqlite:///{name}"
    before = snapshot(here)
    line = refused_line(STORE_COMMANDS[command] + ["--storage", url], capsys)
    assert says in line and name in line, line
    assert snapshot(here) == before


# -- nesting ---------------------------------------------------------------------------------------------
DEPTHS = (40, 5000)  # one tomllib and json read, one past the interpreter's recursion limit
NEST_CASES = [(key, depth) for key in SPACE_KEYS for depth in DEPTHS]


@pytest.mark.parametrize(("key", "depth"), NEST_CASES, ids=[f"{k}-{d}" for k, d in NEST_CASES])
def test_a_space_file_value_nested_deep(here, capsys, key, depth):
    """A value 5,000 brackets deep ended in a RecursionError; the key is named at any depth."""
    (here / "space.toml").write_text(space_text(key, "[" * depth + "1" + "]" * depth), encoding="utf-8")
    line = refused_line(["census", "--space", "space.toml"], capsys)
    assert key in line and "space.toml" in line, line
    assert "x" * 200 not in line


def nested_json(depth: int) -> str:
    return '{"input_shape": ' + "[" * depth + "1" + "]" * depth + "}"


@pytest.mark.parametrize("depth", DEPTHS)
@pytest.mark.parametrize("place", ["cost ARCH", "cost FILE.json", "export --arch"])
def test_architecture_json_nested_deep(here, capsys, place, depth):
    text = nested_json(depth)
    if place == "cost FILE.json":
        (here / "a.json").write_text(text)
        argv = ["cost", "a.json"]
    elif place == "cost ARCH":
        argv = ["cost", "--", text]
    else:
        argv = ["export", "--name", "r", "--arch", text]
    line = refused_line(argv, capsys)
    assert "architecture" in line and ("--arch" in line or place != "export --arch"), line


# -- headers that lie --------------------------------------------------------------------------------------
def npz_with_directory_size(arrays: dict[str, np.ndarray], member: str, size: int) -> bytes:
    """An archive whose zip headers claim ``size`` bytes for ``member`` unpacked (what a zip bomb claims)."""
    import io
    import struct

    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    data = bytearray(buffer.getvalue())
    # (signature, offset of the uncompressed size, offset of the name length, header length) per header kind
    for marker, size_at, name_at, fixed in ((b"PK\x03\x04", 22, 26, 30), (b"PK\x01\x02", 24, 28, 46)):
        at = data.find(marker)
        while at >= 0:
            length = struct.unpack_from("<H", data, at + name_at)[0]
            if data[at + fixed:at + fixed + length] == f"{member}.npy".encode():
                struct.pack_into("<I", data, at + size_at, size)
            at = data.find(marker, at + 4)
    return bytes(data)


GOOD = {"images": IMAGES, "labels": LABELS}
NAMES = {"images": IMAGES, "labels": LABELS, "class_names": np.array(["a", "b", "c"])}
LIES: dict[str, Callable[[], bytes]] = {
    "images claim 10^12 images": lambda: npz_with_header(GOOD, "images", "(30, 12, 12)", "(1000000000000, 12, 12)"),
    "images claim fewer images": lambda: npz_with_header(GOOD, "images", "(30, 12, 12)", "(10, 12, 12)"),
    "images claim 8-byte pixels": lambda: npz_with_header(GOOD, "images", "'|u1'", "'<f8'"),
    "labels claim 10^12 labels": lambda: npz_with_header(GOOD, "labels", "(30,)", "(1000000000000,)"),
    "class names claim 10^9 names": lambda: npz_with_header(NAMES, "class_names", "(3,)", "(1000000000,)"),
    "zip directory claims 4 GB of images": lambda: npz_with_directory_size(GOOD, "images", 2**32 - 2),
}
LIE_CASES = [(lie, command) for lie in LIES for command in ("census", "search")]


@pytest.mark.parametrize(("lie", "command"), LIE_CASES, ids=[f"{c}-{lie}" for lie, c in LIE_CASES])
def test_an_npz_whose_headers_lie(here, capsys, lie, command):
    """'Unable to allocate 233 TiB': what a header claims is checked against the file before numpy allocates."""
    (here / "d.npz").write_bytes(LIES[lie]())
    argv = (["census", "--space", "space.toml"] if command == "census" else
            ["search", "--space", "space.toml", "--name", "r"]) + ["--data", "d.npz"]
    line = refused_line(argv, capsys)
    assert "d.npz" in line and ("claims" in line or "cannot be read" in line or "damaged" in line), line
    assert not (here / "runs").exists()


@pytest.mark.parametrize("lie", ["images claim 10^12 images", "labels claim 10^12 labels"])
@pytest.mark.parametrize("command", ["search", "report", "export"])
def test_a_stored_split_whose_headers_lie(run_here, capsys, lie, command):
    """The run folder's own split.npz, damaged: named, never allocated."""
    arrays = {"train": np.arange(30), "val": np.arange(30, 36), "test": np.arange(36, 42),
              "fingerprint": np.array("0")}
    member, old = ("train", "(30,)") if lie.startswith("images") else ("val", "(6,)")
    data = npz_with_header(arrays, member, old, "(1000000000000,)")
    (run_here / "runs" / "done" / "split.npz").write_bytes(data)
    line = refused_line(ARGV[command], capsys)
    assert "split.npz" in line and "claims shape (1000000000000,)" in line, line


def png_claiming(width: int, height: int) -> bytes:
    """A small gray PNG whose header (IHDR, CRC made good) claims width × height pixels."""
    import io
    import struct

    from PIL import Image

    buffer = io.BytesIO()
    Image.fromarray(IMAGES[0]).save(buffer, format="PNG")
    data = bytearray(buffer.getvalue())
    struct.pack_into(">II", data, 16, width, height)  # IHDR's data starts after the signature, length and type
    struct.pack_into(">I", data, 29, zlib.crc32(bytes(data[12:29])))
    return bytes(data)


@pytest.mark.filterwarnings("ignore::PIL.Image.DecompressionBombWarning")
@pytest.mark.parametrize("size", [(60000, 60000), (12000, 9000), (1, 10**6)])
@pytest.mark.parametrize("skip", [False, True])
def test_a_png_whose_header_lies_about_its_size(here, capsys, caplog, size, skip):
    """Named as unreadable (a decompression bomb, or cut short), or skipped with --skip-unreadable."""
    from PIL import Image

    for label in ("a", "b"):
        (here / "images" / label).mkdir(parents=True)
        for i in range(10):
            Image.fromarray(IMAGES[i]).save(here / "images" / label / f"{i}.png")
    (here / "images" / "a" / "liar.png").write_bytes(png_claiming(*size))
    if not skip:
        line = refused_line(["census", "--space", "space.toml", "--data", "images"], capsys)
        assert "liar.png" in line and "cannot read image" in line, line
        return
    from searcher.data.load import load_dataset

    with no_hang():
        data = load_dataset("images", (1, 12, 12), skip_unreadable=True)
    assert data.skipped == 1 and "liar.png" in data.unreadable[0]
