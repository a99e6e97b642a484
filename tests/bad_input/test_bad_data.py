"""Defective data files and folders given to `search --data`: refused by name, before the search starts.

Each form is written into a fresh working folder; the search is stopped by a fence at the point
where it would open its study, so a defect the loader lets through fails the case quickly.
"""

from __future__ import annotations

import io
import os
import zipfile
from pathlib import Path
from typing import Callable

import numpy as np
import pytest

from searcher.cli.main import main

from catalogue import space_text
from checks import no_hang, npz_with_header

IMAGES = np.random.default_rng(0).integers(0, 256, size=(30, 12, 12), dtype=np.uint8)
LABELS = np.arange(30) % 3


def npz(**arrays) -> Callable[[Path], str]:
    def write(folder: Path) -> str:
        np.savez(folder / "bad.npz", **arrays)
        return "bad.npz"

    return write


def raw(name: str, data: bytes) -> Callable[[Path], str]:
    def write(folder: Path) -> str:
        (folder / name).write_bytes(data)
        return name

    return write


def not_numpy_zip(folder: Path) -> str:
    with zipfile.ZipFile(folder / "bad.npz", "w") as archive:
        archive.writestr("readme.txt", "hello")
    return "bad.npz"


def image_folder(classes: dict[str, list[bytes | None]]) -> Callable[[Path], str]:
    """A folder of class folders; None stands for a small valid gray PNG."""

    def write(folder: Path) -> str:
        from PIL import Image

        root = folder / "images"
        root.mkdir()
        for name, files in classes.items():
            (root / name).mkdir()
            for i, data in enumerate(files):
                if data is None:
                    buffer = io.BytesIO()
                    Image.fromarray(IMAGES[i % len(IMAGES)]).save(buffer, format="PNG")
                    data = buffer.getvalue()
                (root / name / f"{i}.png").write_bytes(data)
        return "images"

    return write


GOOD = [None] * 10


def half_npz(folder: Path) -> str:
    """A good archive cut off half-way, as an interrupted copy leaves it."""
    buffer = io.BytesIO()
    np.savez(buffer, images=IMAGES, labels=LABELS)
    (folder / "bad.npz").write_bytes(buffer.getvalue()[: len(buffer.getvalue()) // 2])
    return "bad.npz"


def pickled_npz(folder: Path) -> str:
    """An archive whose labels are pickled Python objects (numpy would run code to read them)."""
    np.savez(folder / "bad.npz", images=IMAGES, labels=np.array([{"class": 0}] * len(IMAGES), dtype=object))
    return "bad.npz"

def special(name: str, make) -> Callable[[Path], str]:
    def write(folder: Path) -> str:
        make(folder / name)
        return name

    return write


def lying_header(folder: Path) -> str:
    """An archive whose images header claims 10^12 images (numpy would allocate 233 TiB before reading)."""
    data = npz_with_header({"images": IMAGES, "labels": LABELS}, "images", "(30, 12, 12)", "(1000000000000, 12, 12)")
    (folder / "bad.npz").write_bytes(data)
    return "bad.npz"


# (A folder of 16-bit PNGs is not among them: it is read, scaled by 1/257; tests/test_data.py checks that.)
DATA_FORMS: dict[str, Callable[[Path], str]] = {
    "npz: a text file": raw("bad.npz", b"images and labels, honestly"),
    "npz: an empty file": raw("bad.npz", b""),
    "npz: a zip without arrays": not_numpy_zip,
    "npz: no image array": npz(pictures=IMAGES, labels=LABELS),
    "npz: no label array": npz(images=IMAGES, classes=LABELS),
    "npz: no images at all": npz(images=np.zeros((0, 12, 12), np.uint8), labels=np.zeros(0, np.int64)),
    "npz: images of text": npz(images=np.full((30, 12, 12), "a"), labels=LABELS),
    "npz: NaN pixels": npz(images=np.full((30, 12, 12), np.nan, np.float32), labels=LABELS),
    "npz: pixels above 255": npz(images=np.full((30, 12, 12), 300, np.int32), labels=LABELS),  # uint16 is 16-bit
    "npz: negative pixels": npz(images=np.full((30, 12, 12), -1.0, np.float32), labels=LABELS),
    "npz: one-dimensional images": npz(images=np.zeros(30, np.uint8), labels=LABELS),
    "npz: two channels": npz(images=np.zeros((30, 12, 12, 2), np.uint8), labels=LABELS),
    "npz: fewer labels than images": npz(images=IMAGES, labels=LABELS[:20]),
    "npz: one class": npz(images=IMAGES, labels=np.zeros(30, np.int64)),
    "npz: repeated class names": npz(images=IMAGES, labels=LABELS, class_names=np.array(["a", "a", "b"])),
    "npz: class names of the wrong count": npz(images=IMAGES, labels=LABELS, class_names=np.array(["a", "b"])),
    "npz: fractional labels": npz(images=IMAGES, labels=LABELS + 0.5),
    "npz: negative labels": npz(images=IMAGES, labels=LABELS - 1),
    "a file of another kind": raw("notes.txt", b"images are elsewhere"),
    "folder: empty": image_folder({}),
    "folder: one class": image_folder({"a": GOOD}),
    "folder: a class without images": image_folder({"a": GOOD, "b": []}),
    "folder: a broken image": image_folder({"a": GOOD, "b": GOOD + [b"\x89PNG not really"]}),
    "npz: cut in half": half_npz,
    "npz: pickled objects": pickled_npz,
    "npz: one label of 10^11": npz(images=IMAGES, labels=np.r_[LABELS[:-1], 10**11]),
    "npz: two-dimensional labels": npz(images=IMAGES, labels=np.stack([LABELS, LABELS], axis=1)),
    "npz: labels that skip a class": npz(images=IMAGES, labels=np.where(LABELS == 1, 5, LABELS)),
    "npz: too few images of a class": npz(images=IMAGES, labels=np.r_[np.zeros(28, np.int64), 1, 1]),
    # issue 17
    "npz: bool images": npz(images=IMAGES > 127, labels=LABELS),
    "npz: images of 0×0 pixels": npz(images=np.zeros((30, 0, 0), np.uint8), labels=LABELS),
    "npz: a uint64 label of 2^64-1": npz(images=IMAGES, labels=np.r_[LABELS[:-1].astype(np.uint64), np.uint64(2**64 - 1)]),
    "npz: a class name not in UTF-8": npz(images=IMAGES, labels=LABELS, class_names=np.array([b"a", b"\xff", b"c"])),
    "npz: a class name of 300 characters": npz(images=IMAGES, labels=LABELS, class_names=np.array(["a", "b" * 300, "c"])),
    "npz: an empty class name": npz(images=IMAGES, labels=LABELS, class_names=np.array(["a", "", "c"])),
    "npz: a header claiming 10^12 images": lying_header,
    "npz: a FIFO": special("bad.npz", os.mkfifo),
    "npz: /dev/zero": special("bad.npz", lambda path: path.symlink_to("/dev/zero")),
    "npz: a folder": special("bad.npz", lambda path: path.mkdir()),
}


@pytest.fixture
def workdir(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "space.toml").write_text(space_text(), encoding="utf-8")

    def fence(*args, **kwargs):
        raise AssertionError("the loader accepted the defective data: the search went on to open its study")

    import searcher.study.search_run

    monkeypatch.setattr(searcher.study.search_run, "open_study", fence)
    return tmp_path


@pytest.mark.parametrize("form", list(DATA_FORMS))
def test_defective_data_is_refused_by_name(workdir, capsys, form):
    given = DATA_FORMS[form](workdir)
    before = sorted(p for p in workdir.rglob("*"))
    with no_hang():
        try:
            status = main(["search", "--space", "space.toml", "--name", "bad", "--data", given])
        except SystemExit as exc:
            status = exc.code
    err = capsys.readouterr().err
    assert status == 2, err
    assert "Traceback" not in err
    line = err.strip().splitlines()[-1]
    assert line.startswith("searcher: error:") and given in line, line
    assert sorted(p for p in workdir.rglob("*")) == before and not (workdir / "runs").exists()
