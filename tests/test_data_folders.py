"""Folders of images held as bytes: decoding against Pillow, modes, 16-bit files, threads, progress,
the decoded copy in a run folder, and every folder defect refused by name."""

from __future__ import annotations

import logging
import re
from pathlib import Path

import numpy as np
import pytest
from conftest import named
from PIL import Image

from searcher.data import folder as folder_module
from searcher.data import load as load_module
from searcher.data.folder import decode_folder
from searcher.data.load import (
    CACHE_FILE,
    UNREADABLE_FILE,
    describe_few_examples,
    few_examples,
    load_arrays,
    load_dataset,
    save_decoded,
)
from searcher.errors import SearcherError



@pytest.fixture(autouse=True)
def fresh_cache(monkeypatch):
    """Each test decodes for itself: the in-process copies of earlier loads are set aside."""
    monkeypatch.setattr(load_module, "_CACHE", {})


def _pattern(h: int = 12, w: int = 10) -> np.ndarray:
    """A drawn RGB test pattern: ramps in two channels, a checkerboard in the third (uint8 H×W×3)."""
    y, x = np.mgrid[:h, :w]
    return np.stack([x * 255 // (w - 1), y * 255 // (h - 1), ((x + y) % 2) * 200 + 20], -1).astype(np.uint8)


def _mixed_folder(root: Path) -> dict[str, Path]:
    """Two classes, each with one file per mode Pillow writes: L, RGB, RGBA, P (palette), LA, 1 and JPEG."""
    files = {}
    rgb = Image.fromarray(_pattern())
    made = {"L": rgb.convert("L"), "RGB": rgb, "RGBA": rgb.convert("RGBA"), "P": rgb.convert("P"),
            "LA": rgb.convert("LA"), "1": rgb.convert("1")}
    for cls in ("a", "b"):
        (root / cls).mkdir(parents=True)
        for mode, img in made.items():
            files[f"{cls}/{mode}"] = root / cls / f"{mode}.png"
            img.save(files[f"{cls}/{mode}"])
        files[f"{cls}/jpeg"] = root / cls / "z.jpg"
        rgb.save(files[f"{cls}/jpeg"], quality=90)
    return files


@pytest.mark.parametrize("channels", [1, 3, 4])
def test_png_and_jpeg_decode_as_pillow_converts_them(tmp_path, channels):
    # Reference: Pillow's own conversion (Image.convert) of the same files, PNG in six modes and JPEG.
    files = _mixed_folder(tmp_path)
    images, labels, names, _ = load_arrays(str(tmp_path), (channels, 12, 10))
    order = sorted(files.values(), key=lambda f: (f.parent.name, f.name))  # class, then file name
    mode = {1: "L", 3: "RGB", 4: "RGBA"}[channels]
    for row, file in enumerate(order):
        with Image.open(file) as img:
            expected = np.asarray(img.convert(mode)).reshape(12, 10, channels).transpose(2, 0, 1)
        assert np.array_equal(images[row], expected), file
    assert names == ("a", "b") and labels.tolist() == [0] * 7 + [1] * 7


def test_mixed_modes_are_counted_and_logged(tmp_path, caplog):
    _mixed_folder(tmp_path)
    with caplog.at_level(logging.INFO, logger="searcher.data"):
        data = load_dataset(str(tmp_path), (3, 12, 10), fractions=(0.5, 0.25, 0.25))
    assert data.modes == {"L": 2, "RGB": 4, "RGBA": 2, "P": 2, "LA": 2, "1": 2}  # the JPEGs are RGB
    assert "converted images from 6 modes to RGB" in caplog.text and "4 RGB" in caplog.text


def test_16_bit_png_is_scaled_not_clipped(tmp_path):
    # A 16-bit gray PNG written by Pillow from a uint16 ramp; 8-bit value = 16-bit value / 257 (65535 -> 255).
    ramp = (np.arange(12 * 10).reshape(12, 10) * 550).astype(np.uint16)  # 0 to 65,450
    for cls in ("deep", "shallow"):
        (tmp_path / cls).mkdir()
        for i in range(3):
            Image.fromarray(ramp).save(tmp_path / cls / f"{i}.png")
    with Image.open(tmp_path / "deep" / "0.png") as img:
        assert img.mode == "I;16"  # Pillow keeps all 16 bits, so the test reaches the 16-bit path
    gray, _, _, _ = load_arrays(str(tmp_path), (1, 12, 10))
    expected = np.round(ramp / 257).astype(np.uint8)
    assert np.array_equal(gray[0, 0], expected) and gray.min() == 0 and gray.max() == 255  # 65,450 / 257 = 254.7
    rgb = load_arrays(str(tmp_path), (3, 12, 10))[0]
    assert all(np.array_equal(rgb[0, c], expected) for c in range(3))
    assert load_dataset(str(tmp_path), (1, 12, 10), fractions=(0.34, 0.33, 0.33)).modes == {"I;16": 6}


def _classes(root: Path, counts: dict[str, int], size: int = 8) -> None:
    rng = np.random.default_rng(len(counts))
    for name, count in counts.items():
        (root / name).mkdir(parents=True)
        for i in range(count):
            Image.fromarray(rng.integers(0, 256, (size, size, 3), dtype=np.uint8)).save(root / name / f"{i:03d}.png")


def test_parallel_workers_decode_the_same_bytes_in_the_same_order(tmp_path, monkeypatch):
    _classes(tmp_path, {"x": 23, "y": 17, "z": 9})
    monkeypatch.setattr(folder_module, "CHUNK", 4)  # many small runs of files, so both workers take work
    serial = decode_folder(tmp_path, 3, 8, 8, workers=1)
    threaded = decode_folder(tmp_path, 3, 8, 8, workers=2)  # forked processes on Linux
    assert np.array_equal(serial.images, threaded.images) and np.array_equal(serial.labels, threaded.labels)
    assert serial.images.shape == (49, 3, 8, 8) and serial.images.dtype == np.uint8


def test_progress_line_counts_rate_and_time_left_never_per_image(tmp_path, monkeypatch, caplog):
    _classes(tmp_path, {"x": 20, "y": 20})
    monkeypatch.setattr(folder_module, "CHUNK", 8)
    monkeypatch.setattr(folder_module, "PROGRESS_AFTER", 0.0)  # as if every run of files took long
    with caplog.at_level(logging.DEBUG):  # what `-v` shows
        decode_folder(tmp_path, 1, 8, 8, workers=1)
    lines = [r.getMessage() for r in caplog.records if "decoding images" in r.getMessage()]
    assert len(lines) == 5 and all(r.levelno == logging.INFO for r in caplog.records if "decoding" in r.getMessage())
    assert re.search(r"decoding images in .*: 40 of 40 \([\d,]+/s, about 0 s left\)", lines[-1])
    assert not [r for r in caplog.records if r.name.startswith("PIL")]  # Pillow's per-chunk debug lines held back
    assert len(caplog.records) < 40


def test_no_progress_line_for_a_quick_load(tmp_path, caplog):
    _classes(tmp_path, {"x": 5, "y": 5})
    with caplog.at_level(logging.INFO):
        decode_folder(tmp_path, 1, 8, 8)
    assert "decoding images" not in caplog.text


def test_unreadable_files_are_named_or_skipped_and_listed(tmp_path):
    _classes(tmp_path / "data", {"ok": 6, "dent": 6})
    broken = tmp_path / "data" / "dent" / "bad.png"
    broken.write_bytes(b"\x89PNG\r\n\x1a\n not really")
    with pytest.raises(SearcherError, match=named("cannot read image", broken)):
        load_dataset(str(tmp_path / "data"), (1, 8, 8))
    data = load_dataset(str(tmp_path / "data"), (1, 8, 8), skip_unreadable=True)
    assert data.skipped == 1 and data.unreadable[0].startswith(str(broken))
    save_decoded(tmp_path / "run", data)
    assert (tmp_path / "run" / UNREADABLE_FILE).read_text().splitlines() == list(data.unreadable)


def test_a_class_with_no_readable_image_is_refused_by_name(tmp_path):
    _classes(tmp_path, {"ok": 4, "rare": 1})
    (tmp_path / "rare" / "000.png").write_bytes(b"broken")
    with pytest.raises(SearcherError, match=named("class folder 'rare' has no readable image", tmp_path / "rare")):
        load_arrays(str(tmp_path), (1, 8, 8), skip_unreadable=True)


def test_folder_that_cannot_be_listed_isnamed(tmp_path, monkeypatch):
    # Tests run as root, for whom permissions never refuse a listing: the refusal is simulated.
    _classes(tmp_path, {"ok": 3, "locked": 3})
    listing = Path.iterdir

    def refuse(self):
        if self.name == "locked":
            raise PermissionError(13, "Permission denied", str(self))
        return listing(self)

    monkeypatch.setattr(Path, "iterdir", refuse)
    with pytest.raises(SearcherError, match=named("cannot list the folder \\(Permission denied\\)",
                                                   tmp_path / "locked")):
        load_arrays(str(tmp_path), (1, 8, 8))


def test_decoded_copy_is_reused_until_a_file_changes(tmp_path, monkeypatch):
    data_dir, run = tmp_path / "data", tmp_path / "run"
    _classes(data_dir, {"ok": 6, "scratch": 6})
    first = load_dataset(str(data_dir), (3, 8, 8))
    assert save_decoded(run, first) == run / CACHE_FILE
    mtime = (run / CACHE_FILE).stat().st_mtime_ns
    assert save_decoded(run, first) == run / CACHE_FILE and (run / CACHE_FILE).stat().st_mtime_ns == mtime

    monkeypatch.setattr(load_module, "_CACHE", {})  # a new process: only the folder's copy is left
    monkeypatch.setattr(load_module, "decode_folder", lambda *a, **k: pytest.fail("decoded again"))
    again = load_dataset(str(data_dir), (3, 8, 8), cache=run, split=first.indices, fingerprint=first.fingerprint)
    assert np.array_equal(again.test.images, first.test.images) and again.class_names == first.class_names

    monkeypatch.undo()
    monkeypatch.setattr(load_module, "_CACHE", {})
    Image.new("RGB", (8, 8), (9, 9, 9)).save(data_dir / "ok" / "000.png")  # same name, new contents and size
    changed = load_dataset(str(data_dir), (3, 8, 8), cache=run)
    assert changed.fingerprint != first.fingerprint
    assert not np.array_equal(changed.rows(0, 12)[0], first.rows(0, 12)[0])


def test_few_validation_or_test_images_are_reported(tmp_path):
    _classes(tmp_path, {"common": 80, "rare": 20})
    data = load_dataset(str(tmp_path), (1, 8, 8))
    found = few_examples(data)
    assert found == [("val", "rare", 3), ("test", "rare", 3)]
    assert "'rare' 3 validation" in describe_few_examples(found)
    assert few_examples(data, minimum=3) == []


@pytest.mark.parametrize("size", [3, 1024])
def test_demo_sizes_outside_its_range_are_refused(size):
    with pytest.raises(SearcherError, match=f"drawn at sizes from 8×8 to 128×128, but the input size is {size}×{size}"):
        load_arrays("demo", (1, size, size))


def test_empty_and_one_class_folders_exit_2(tmp_path, capsys, monkeypatch):
    from searcher.cli.main import main

    monkeypatch.chdir(tmp_path)
    (tmp_path / "empty").mkdir()
    _classes(tmp_path / "one", {"only": 4})
    for data, said in (("empty", "no class sub-folders"), ("one", "only the class 'only'")):
        status = main(["search", "--space", "mcu", "--data", data, "--name", f"t-{data}", "--trials", "1"])
        err = capsys.readouterr().err
        assert status == 2 and "Traceback" not in err and said in err
    assert not (tmp_path / "runs").exists() or not any((tmp_path / "runs").iterdir())


def test_the_capsule_example_folder_loads_with_its_rare_classes_reported(tmp_path):
    # The example generator (examples/make_capsule_folder.py), small: a few PNGs and JPEGs per class.
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "examples"))
    from make_capsule_folder import write_folder

    counts = write_folder(tmp_path / "caps", size=32, seed=1, counts={"ok": 80, "cracked": 12, "empty": 8})
    data = load_dataset(str(tmp_path / "caps"), (3, 32, 32))
    assert data.class_names == ("cracked", "empty", "ok") and sum(data.modes.values()) == sum(counts.values())
    assert set(data.modes) <= {"RGB"}  # PNGs and JPEGs alike decode as RGB
    assert {name for _, name, _ in few_examples(data)} == {"cracked", "empty"}


def test_the_data_layer_loads_without_torch(tmp_path):
    import subprocess
    import sys

    _classes(tmp_path, {"a": 3, "b": 3})
    code = ("import sys; from searcher.data.load import load_dataset, save_decoded; "
            f"d = load_dataset({str(tmp_path)!r}, (3, 8, 8)); save_decoded({str(tmp_path / 'run')!r}, d); "
            "assert 'torch' not in sys.modules, 'torch was imported'")
    subprocess.run([sys.executable, "-c", code], check=True, cwd=Path(__file__).resolve().parents[1])


def _png_rgb16(path: Path, pixels: np.ndarray) -> None:
    """A 16-bit-per-channel RGB PNG written by hand (Pillow writes none): signature, IHDR, IDAT, IEND."""
    import struct
    import zlib

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))

    h, w, _ = pixels.shape
    rows = b"".join(b"\x00" + pixels[y].astype(">u2").tobytes() for y in range(h))  # filter type 0 per row
    header = struct.pack(">IIBBBBB", w, h, 16, 2, 0, 0, 0)  # 16 bits, colour type 2 (RGB), PNG spec 11.2.2
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"IDAT", zlib.compress(rows))
                     + chunk(b"IEND", b""))


def test_16_bit_rgb_png_is_scaled_not_clipped(tmp_path):
    deep = (np.arange(6 * 5 * 3).reshape(6, 5, 3) * 727).astype(np.uint16)  # 0 to 65,169
    for cls in ("a", "b"):
        (tmp_path / cls).mkdir()
        for i in range(3):
            _png_rgb16(tmp_path / cls / f"{i}.png", deep)
    images = load_arrays(str(tmp_path), (3, 6, 5))[0]
    # Pillow reads 16-bit RGB as 8-bit RGB keeping the high byte; within one level of value / 257.
    assert np.array_equal(images[0], (deep >> 8).astype(np.uint8).transpose(2, 0, 1))
    assert np.abs(images[0].astype(int) - np.round(deep / 257).transpose(2, 0, 1)).max() <= 1


def test_parts_lie_pixel_major_and_read_as_plain_n_c_h_w(tmp_path):
    from searcher.data import layout

    _classes(tmp_path, {"a": 6, "b": 6})
    data = load_dataset(str(tmp_path), (3, 8, 8))
    for part in (data.train, data.val, data.test):
        assert np.moveaxis(part.images, 1, 3).flags.c_contiguous  # each pixel's channels side by side
    plain = np.arange(5 * 3 * 4 * 2, dtype=np.uint8).reshape(5, 3, 4, 2)
    assert np.array_equal(layout.pixel_major(plain), plain) and np.array_equal(layout.take(plain, [3, 1]), plain[[3, 1]])
    joined = layout.concatenate([layout.pixel_major(plain), plain[:2]])
    assert np.array_equal(joined, np.concatenate([plain, plain[:2]])) and np.moveaxis(joined, 1, 3).flags.c_contiguous
    # The fingerprint reads the N×C×H×W values, however they lie in memory.
    from searcher.data.load import fingerprint_of

    assert fingerprint_of(layout.pixel_major(plain), np.arange(5)) == fingerprint_of(plain, np.arange(5))
