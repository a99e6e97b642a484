"""What every refusal must look like, shared by the bad-input tests: exit status 2, no traceback, one line."""

from __future__ import annotations

import contextlib
import signal
from pathlib import Path
from typing import Iterator

import numpy as np
import pytest

from searcher.cli.main import main

from catalogue import space_text


@pytest.fixture
def here(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A fresh working folder holding the catalogue's base space as space.toml."""
    monkeypatch.chdir(tmp_path)
    (tmp_path / "space.toml").write_text(space_text(), encoding="utf-8")
    return tmp_path


SAFETY = 30  # seconds after which a command that blocks (on a FIFO, say) fails its case instead of hanging


@contextlib.contextmanager
def no_hang() -> Iterator[None]:
    """A command that is still running after SAFETY seconds fails the case (a guard, not a timed assertion)."""
    def hung(number, frame):
        raise AssertionError(f"the command was still running after {SAFETY} s: it blocked on what it was given")

    before = signal.signal(signal.SIGALRM, hung)
    signal.alarm(SAFETY)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, before)


def refused(argv: list[str], capsys: pytest.CaptureFixture) -> str:
    """The one error line of a command that must exit 2 without a traceback."""
    with no_hang():
        try:
            status = main(argv)
        except SystemExit as exc:
            status = exc.code
    err = capsys.readouterr().err
    assert status == 2, err
    assert "Traceback" not in err
    return err.strip().splitlines()[-1]


def digits_folder(root: Path, per_class: int = 20, broken: bool = True) -> Path:
    """Class folders of PNGs of three digits from the UCI set scikit-learn ships, plus one broken file."""
    from PIL import Image
    from sklearn.datasets import load_digits

    digits = load_digits()
    for label in range(3):
        (root / f"digit{label}").mkdir(parents=True)
        for i, image in enumerate(digits.images[digits.target == label][:per_class]):
            Image.fromarray((image * 15).astype(np.uint8)).save(root / f"digit{label}" / f"{i}.png")
    if broken:
        (root / "digit0" / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n cut short")
    return root


@pytest.fixture(scope="module")
def made(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A search of three candidates (trained by a stand-in: no torch training) over a folder with one
    broken file, started with --skip-unreadable; its working folder, holding runs/done/ and digits/."""
    from searchkit import StandIn, search_here, write_space

    folder = tmp_path_factory.mktemp("made")
    digits_folder(folder / "digits")
    search_here(folder, write_space(folder), "done", trainer_for=lambda run, threads: StandIn(1),
                data=str(folder / "digits"), skip_unreadable=True, trials=3)
    return folder


@pytest.fixture
def run_copy(made: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A copy of the made run's working folder to change, as the working folder; data loads start afresh."""
    import shutil

    from searcher.data import load as load_module

    shutil.copytree(made, tmp_path / "w", symlinks=True)
    folder = tmp_path / "w"
    data = folder / "runs" / "done" / "run.json"
    data.write_text(data.read_text().replace(str(made), str(folder)))  # not read by the commands; kept consistent
    monkeypatch.chdir(folder)
    monkeypatch.setattr(load_module, "_CACHE", {})
    return folder


def export_here(folder: Path, **fields) -> object:
    from searcher.ship.export import ExportSettings, export
    from searchkit import in_process

    with in_process():
        return export(ExportSettings(name="done", root=folder / "runs", epochs=1, **fields))


ARCH = "1x16x16_c2k3-m2_gap-o3_relu"  # a candidate of searchkit's FAST_SPACE for three classes


def npz_with_header(arrays: dict[str, np.ndarray], member: str, old: str, new: str) -> bytes:
    """An archive of ``arrays`` whose ``member`` header says ``new`` where numpy wrote ``old`` (same length kept)."""
    import io
    import zipfile

    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    out = io.BytesIO()
    with zipfile.ZipFile(buffer) as source, zipfile.ZipFile(out, "w") as target:
        for name in source.namelist():
            data = source.read(name)
            if name == f"{member}.npy":
                length = int.from_bytes(data[8:10], "little")
                header = data[10:10 + length].decode("latin1")
                assert old in header, header
                header = header.replace(old, new).rstrip()
                data = data[:10] + (header.ljust(length - 1) + "\n").encode("latin1") + data[10 + length:]
            target.writestr(name, data)
    return out.getvalue()
