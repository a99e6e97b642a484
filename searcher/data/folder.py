"""Class folders of PNG/JPEG files decoded once into uint8 N×C×H×W, in parallel, with a progress line.

Each file is read by Pillow in whatever mode it was saved (gray, RGB, RGBA, palette, 16-bit) and
converted to the channels the space wants; how many came in each mode is counted, so a folder of
mixed files is visible instead of silently coerced. 16-bit images are scaled to 8 bits
(value / 257, which maps 65535 to 255 exactly) rather than clipped, which would turn them white.
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import sys
import time
from collections import Counter, deque
from concurrent.futures import Executor, ProcessPoolExecutor, ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from searcher.data import layout
from searcher.errors import SearcherError, shown
from searcher.limits import MAX_CLASS_NAME

log = logging.getLogger(__name__)
logging.getLogger("PIL").setLevel(logging.INFO)  # Pillow logs each PNG chunk at DEBUG: `-v` would print them all

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg")  # files read from a class folder
MODES = {1: "L", 3: "RGB", 4: "RGBA"}  # Pillow mode for each channel count
WIDE_MODES = ("I;16", "I;16B", "I;16L", "I")  # 16-bit (and 32-bit integer) gray: scaled, never clipped
CHUNK = 64  # files per unit of work: big enough to amortise scheduling, small enough to balance
PROGRESS_AFTER = 2.0  # seconds of loading before a progress line is logged, and between lines


@dataclass(frozen=True)
class Decoded:
    """A folder's images as bytes, with what was noticed on the way."""

    images: np.ndarray  # uint8 N×C×H×W, laid out pixel-major (see searcher.data.layout)
    labels: np.ndarray  # int64 N, the class folder's position in sorted order
    class_names: tuple[str, ...]  # sub-folder names, sorted
    unreadable: tuple[str, ...]  # "path: reason" for each file skipped
    modes: dict[str, int]  # files per Pillow mode as saved (e.g. {"RGB": 900, "L": 12})


def name_problem(name: str) -> str | None:
    """Why a class name cannot be used, or None. Names are data: any character is kept and shown escaped
    in every output (C, HTML, Markdown, JSON, CSV), but a name must be text that UTF-8 can hold (a file
    name in another encoding is not) and no longer than a folder name may be."""
    try:
        name.encode("utf-8")
    except UnicodeEncodeError:
        return "it is not UTF-8 text (a name saved in another encoding); rename it in UTF-8"
    if not name:
        return "it is empty; give every class a name"
    if len(name) > MAX_CLASS_NAME:
        return f"it has {len(name):,} characters; a class name may have at most {MAX_CLASS_NAME}"
    return None


def _listing(folder: Path) -> list[Path]:
    try:
        return sorted(folder.iterdir())
    except OSError as err:
        raise SearcherError(f"cannot list the folder ({err.strerror or err}); make it readable", file=folder) from err


def class_folders(path: Path) -> list[tuple[str, list[Path]]]:
    """(class name, image files) per sub-folder, sorted by name; at least two classes."""
    classes = [p for p in _listing(path) if p.is_dir() and not p.name.startswith(".")]
    if len(classes) < 2:
        found = f"only the class {classes[0].name!r}" if classes else "no class sub-folders"
        raise SearcherError(f"folder has {found}; put each class's images (at least 2 classes) in a sub-folder "
                            "named after the class", file=path)
    out = []
    for folder in classes:
        problem = name_problem(folder.name)
        if problem:
            raise SearcherError(f"class folder {shown(folder.name)} cannot name a class: {problem}", file=path)
        named = [f for f in _listing(folder) if f.suffix.lower() in IMAGE_SUFFIXES]
        files = [f for f in named if f.is_file()]
        if len(files) < len(named):  # a FIFO or a device would block or never end: passed over, and said so
            odd = next(f for f in named if not f.is_file())
            log.warning("class folder %r: passed over %d image name(s) that are not regular files, first %s",
                        folder.name, len(named) - len(files), odd.name)
        if not files:
            raise SearcherError(f"class folder {folder.name!r} has no PNG or JPEG files "
                                f"(names ending in {', '.join(IMAGE_SUFFIXES)})", file=folder)
        out.append((folder.name, files))
    return out


def _wide_to_bytes(img: object) -> object:
    """A 16-bit gray image as 8-bit gray: value / 257 rounded (65535 -> 255); other ranges refused."""
    from PIL import Image

    values = np.asarray(img)
    if values.size and (values.min() < 0 or values.max() > 65535):
        raise ValueError(f"mode {img.mode} with values {values.min()} to {values.max()}; "
                         "only 16-bit gray (0-65535) is read")
    return Image.fromarray(((values.astype(np.uint32) + 128) // 257).astype(np.uint8), mode="L")


def read_image(file: Path, channels: int, h: int, w: int) -> tuple[np.ndarray, str]:
    """One file as uint8 H×W×C at the wanted size, and the mode it was saved in."""
    from PIL import Image

    with Image.open(file) as img:
        mode = img.mode
        img = _wide_to_bytes(img) if mode in WIDE_MODES else img
        img = img.convert(MODES[channels])
        if img.size != (w, h):
            img = img.resize((w, h), Image.Resampling.BILINEAR)
        return np.asarray(img, dtype=np.uint8).reshape(h, w, channels), mode


def _read_chunk(files: list[Path], channels: int, h: int, w: int) -> tuple[np.ndarray, list[str], list[str | None]]:
    """Decode a run of files: (uint8 n×H×W×C with a row per file, modes, error per file or None)."""
    from PIL import Image

    out = np.zeros((len(files), h, w, channels), np.uint8)
    modes: list[str] = []
    errors: list[str | None] = []
    for i, file in enumerate(files):
        try:
            out[i], mode = read_image(file, channels, h, w)
            modes.append(mode)
            errors.append(None)
        except (OSError, SyntaxError, ValueError, Image.DecompressionBombError) as err:
            modes.append("")
            errors.append(str(err) or type(err).__name__)
    return out, modes, errors


class Progress:
    """Logs 'what: done of total (rate/s, about T left)' at INFO, only once work has taken a while."""

    def __init__(self, what: str, total: int, every: float | None = None) -> None:
        self.what, self.total = what, total
        self.every = PROGRESS_AFTER if every is None else every
        self.started = self.last = time.monotonic()
        self.done = 0
        self.shown = False  # whether a line was logged, so the end can be logged too

    def add(self, count: int) -> None:
        self.done += count
        now = time.monotonic()
        if now - self.last >= self.every or (self.shown and self.done >= self.total):
            self.last, self.shown = now, True
            rate = self.done / max(now - self.started, 1e-9)
            left = (self.total - self.done) / rate if rate > 0 else float("inf")
            log.info("%s: %s of %s (%s/s, about %s left)", self.what, f"{self.done:,}", f"{self.total:,}",
                     f"{rate:,.0f}", _duration(left))


def _duration(seconds: float) -> str:
    if seconds < 60:
        return f"{seconds:.0f} s"
    return f"{seconds // 60:.0f} min {seconds % 60:02.0f} s"


def default_workers() -> int:
    """Decoding workers: one per core this process may use."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def _pool(workers: int) -> Executor:
    """Forked processes where Linux offers them, threads elsewhere (see decode_folder)."""
    if sys.platform == "linux" and "fork" in multiprocessing.get_all_start_methods():
        return ProcessPoolExecutor(workers, mp_context=multiprocessing.get_context("fork"))
    return ThreadPoolExecutor(workers, thread_name_prefix="decode")


def decode_folder(path: Path, channels: int, h: int, w: int, *, skip_unreadable: bool = False,
                  workers: int | None = None) -> Decoded:
    """Decode every class folder under `path` into one uint8 array.

    Unreadable files stop the load with the file named, or are skipped and listed with
    `skip_unreadable`; a class left with no readable image is refused by name either way.
    `workers` decode runs of CHUNK files (None: one per core; 1: in this process). They are forked
    processes where the system forks (Linux), threads elsewhere: per file, Pillow spends much of its
    time in Python (opening, reading PNG chunks), which threads share one at a time. Measured on
    20,000 RGB 64×64 PNGs with 2 cores (benchmarks/bench_data.py decode, two runs): processes 1.29-1.67×,
    threads 0.92-1.26× the serial rate. The children only decode files; they never touch torch.
    """
    classes = class_folders(path)
    files = [f for _, members in classes for f in members]
    labels = np.concatenate([np.full(len(m), k, np.int64) for k, (_, m) in enumerate(classes)])
    images = layout.empty(len(files), channels, h, w)  # the one full-size allocation
    modes: Counter[str] = Counter()
    failed: list[tuple[int, str]] = []
    progress = Progress(f"decoding images in {path}", len(files))
    chunks = [range(i, min(i + CHUNK, len(files))) for i in range(0, len(files), CHUNK)]
    workers = default_workers() if workers is None else workers

    def take(rows: range, decoded: tuple[np.ndarray, list[str], list[str | None]]) -> None:
        pixels, chunk_modes, errors = decoded
        np.moveaxis(images, 1, 3)[rows.start:rows.stop] = pixels  # pixel-major: rows of bytes as decoded
        modes.update(m for m in chunk_modes if m)
        for row, error in zip(rows, errors):
            if error is not None:
                if not skip_unreadable:
                    raise SearcherError(f"cannot read image ({error}); remove or replace it, or skip unreadable "
                                        "files", file=files[row])
                failed.append((row, error))
        progress.add(len(rows))

    if workers <= 1 or len(chunks) == 1:
        for rows in chunks:
            take(rows, _read_chunk(files[rows.start:rows.stop], channels, h, w))
    else:
        ahead = 4 * workers  # runs decoded but not yet copied in: bounds the memory they hold
        with _pool(min(workers, len(chunks))) as pool:
            jobs = deque(pool.submit(_read_chunk, files[r.start:r.stop], channels, h, w) for r in chunks[:ahead])
            try:
                for i, rows in enumerate(chunks):
                    take(rows, jobs.popleft().result())
                    if i + ahead < len(chunks):
                        later = chunks[i + ahead]
                        jobs.append(pool.submit(_read_chunk, files[later.start:later.stop], channels, h, w))
            finally:
                for job in jobs:
                    job.cancel()
    keep = np.ones(len(files), bool)
    keep[[row for row, _ in failed]] = False
    for k, (name, _) in enumerate(classes):
        if not keep[labels == k].any():
            raise SearcherError(f"class folder {name!r} has no readable image ({int((labels == k).sum())} "
                                "file(s), all unreadable)", file=path / name)
    unreadable = tuple(f"{files[row]}: {error}" for row, error in failed)
    if failed:
        log.warning("skipped %d unreadable image file(s) in %s, first: %s", len(failed), path, unreadable[0])
        images, labels = layout.take(images, keep), labels[keep]
    if len(modes) > 1:
        log.info("converted images from %d modes to %s: %s", len(modes), MODES[channels],
                 ", ".join(f"{count:,} {mode}" for mode, count in modes.most_common()))
    return Decoded(images, labels, tuple(name for name, _ in classes), unreadable, dict(modes))
