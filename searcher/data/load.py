"""Data sets held in memory as bytes: the demo, a .npz file or a folder of images, split reproducibly.

Everything is decoded once into uint8 N×C×H×W, so a data set costs about its pixel count in bytes,
and the trainer converts each batch to floats as it takes it. Only the three parts are kept (the
decoded whole is let go once split), and a second load of the same data in one process shares them.
The decoded bytes can be kept in a run's folder (`save_decoded`) so a resumed run or an export reads
them back instead of decoding again; the files' names, sizes and times decide whether that copy is
still good. The split is kept as index arrays and a fingerprint of the data, so a resumed run can
prove it sees the same data.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import zipfile
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

import numpy as np

from searcher.data import layout
from searcher.data.demo import make_demo
from searcher.data.folder import MODES, Decoded, decode_folder, default_workers
from searcher.data.npz import read_member, read_npz
from searcher.data.split import PARTS, check_split, load_split, save_split, split_indices  # noqa: F401  (re-exported)
from searcher.errors import SearcherError, shown
from searcher.files import not_regular
from searcher.files import write_atomic

log = logging.getLogger(__name__)

DEMO_COUNT = 3000  # images in the built-in demo
DEMO_SEED = 0  # seed the demo is drawn with; the split has its own seed
DEMO_SIZES = (8, 128)  # smallest and largest side the demo is drawn at (1024² would take tens of GB)
CACHE_FILE = "decoded.npz"  # decoded bytes kept in a run folder
UNREADABLE_FILE = "unreadable.txt"  # files skipped as unreadable, one "path: reason" a line
CACHE_VERSION = 1  # bump when the decoding changes, so old copies are not reused
FEW_EXAMPLES = 10  # validation or test images per class below which its score is too coarse to trust


@dataclass(frozen=True, eq=False)
class Split:
    """One part of the data, in memory; shared by the Datasets of one process, so never changed in place."""

    images: np.ndarray  # uint8 N×C×H×W, 0–255, laid out pixel-major (see searcher.data.layout)
    labels: np.ndarray  # int64 N, class numbers 0..K-1


@dataclass(frozen=True, eq=False)
class Dataset:
    """The three parts plus what a run must store to reload exactly this data."""

    train: Split  # data the model is fitted on
    val: Split  # data trials are scored and pruned on
    test: Split  # data held back for the final report
    class_names: tuple[str, ...]  # name of each class, in label order
    source: str  # "demo" or the path given
    fingerprint: str  # short sha256 of the images and labels, to detect changed data
    skipped: int  # unreadable files skipped while loading
    indices: dict[str, np.ndarray]  # the split as index arrays, to store with a run
    unreadable: tuple[str, ...] = ()  # "path: reason" per skipped file
    modes: dict[str, int] = field(default_factory=dict)  # files per image mode as saved, for a folder
    cache_key: str = ""  # what the source looked like when decoded (see `save_decoded`)

    @property
    def num_classes(self) -> int:
        return len(self.class_names)

    @property
    def count(self) -> int:
        """Images in the three parts together."""
        return sum(len(i) for i in self.indices.values())

    def rows(self, start: int, stop: int, images: bool = True) -> tuple[np.ndarray | None, np.ndarray]:
        """Images (unless `images` is false) and labels start..stop-1 in the source's own order, from the parts."""
        count = stop - start
        out = layout.empty(count, *self.train.images.shape[1:]) if images else None
        labels = np.empty(count, np.int64)
        for name, where in self.indices.items():
            inside = (where >= start) & (where < stop)
            part = getattr(self, name)
            labels[where[inside] - start] = part.labels[inside]
            if out is not None:
                out[where[inside] - start] = part.images[inside]
        return out, labels

    @property
    def covers_all(self) -> bool:
        """Whether the parts hold every image of the source (a stored split might leave some out)."""
        every = np.concatenate(list(self.indices.values()))
        return len(every) > 0 and int(every.max()) + 1 == len(every)


class DataChanged(SearcherError):
    """The data found now is not the data a stored split was made from; ``now`` says what it holds, in words."""

    def __init__(self, message: str, *, now: str, file: str | None = None, key: str | None = None) -> None:
        super().__init__(message, file=file, key=key)
        self.now = now


def describe_data(count: int, classes: int, shape: tuple[int, ...]) -> str:
    """'90 images in 3 classes at 1×16×16': what a data set holds, for messages that compare two."""
    return f"{count:,} images in {classes} classes at {'×'.join(map(str, shape))}"


def _check_shape(input_shape: tuple[int, int, int]) -> tuple[int, int, int]:
    shape = tuple(input_shape)
    if len(shape) != 3 or not all(isinstance(d, (int, np.integer)) and d > 0 for d in shape):
        raise SearcherError(f"input shape {input_shape!r} must be three positive whole numbers C, H, W",
                            key="input_shape")
    if shape[0] not in MODES:
        raise SearcherError(f"input shape {input_shape!r} has {shape[0]} channels; channels must be 1, 3 or 4",
                            key="input_shape")
    return int(shape[0]), int(shape[1]), int(shape[2])


def resize_images(images: np.ndarray, h: int, w: int) -> np.ndarray:
    """uint8 N×C×H×W brought to h×w, each channel on its own with Pillow's bilinear filter (which
    averages over the source when shrinking); returned unchanged if already that size."""
    from PIL import Image

    if images.shape[-2:] == (h, w):
        return images
    log.info("resizing %d images from %d×%d to %d×%d", len(images), images.shape[-2], images.shape[-1], h, w)
    count, channels = images.shape[:2]
    out = layout.empty(count, channels, h, w)

    def run(rows: range) -> None:
        for i in rows:
            n, c = divmod(i, channels)
            plane = np.ascontiguousarray(images[n, c])
            out[n, c] = np.asarray(Image.fromarray(plane).resize((w, h), Image.Resampling.BILINEAR))

    planes, step = count * channels, 1024
    with ThreadPoolExecutor(default_workers()) as pool:
        list(pool.map(run, [range(i, min(i + step, planes)) for i in range(0, planes, step)]))
    return out


def _demo(shape: tuple[int, int, int]) -> Decoded:
    channels, h, w = shape
    low, high = DEMO_SIZES
    if not (low <= h <= high and low <= w <= high):
        raise SearcherError(f"the demo data is drawn at sizes from {low}×{low} to {high}×{high}, but the input size "
                            f"is {h}×{w}; choose an input size in that range, or give your own data",
                            key="input.size")
    gray, labels, names = make_demo(DEMO_COUNT, (h, w), DEMO_SEED)
    images = layout.pixel_major(np.broadcast_to(gray[:, None], (len(gray), channels, h, w)))
    return Decoded(images, labels, names, (), {})


def decode(source: str | Path, input_shape: tuple[int, int, int], skip_unreadable: bool = False,
           workers: int | None = None) -> Decoded:
    """Decode a whole source at `input_shape` into bytes: images uint8 N×C×H×W, labels, class names."""
    channels, h, w = _check_shape(input_shape)
    source = str(source)
    path = Path(source)
    if source == "demo":
        decoded = _demo((channels, h, w))
    elif not path.exists():
        raise SearcherError(f"data source {source!r} does not exist; give 'demo', a .npz file or a folder with "
                            "one sub-folder per class", key="data")
    elif path.is_dir():
        decoded = decode_folder(path, channels, h, w, skip_unreadable=skip_unreadable, workers=workers)
    elif path.suffix.lower() == ".npz":
        images, labels, names = read_npz(path, channels)
        decoded = Decoded(resize_images(images, h, w), labels, names, (), {})
    else:
        raise SearcherError(f"data file type {path.suffix or '(none)'!r} is not supported; give a .npz file or a "
                            "folder of class sub-folders", file=path, key="data")
    log.info("loaded %d images in %d classes from %s (%d skipped)", len(decoded.labels), len(decoded.class_names),
             source, len(decoded.unreadable))
    return decoded


def load_arrays(source: str | Path, input_shape: tuple[int, int, int],
                skip_unreadable: bool = False) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], int]:
    """Decode a whole source: (images uint8 N×C×H×W, labels int64, class names, files skipped)."""
    decoded = decode(source, input_shape, skip_unreadable)
    return decoded.images, decoded.labels, decoded.class_names, len(decoded.unreadable)


def fingerprint_of(images: np.ndarray, labels: np.ndarray) -> str:
    """Short sha256 over the decoded images and labels (and their shapes and types)."""
    digest = hashlib.sha256(repr((images.shape, str(images.dtype), labels.shape)).encode())
    for start in range(0, len(images), 1024):  # the bytes in N×C×H×W order, however they lie in memory
        digest.update(memoryview(np.ascontiguousarray(images[start:start + 1024])).cast("B"))
    digest.update(memoryview(np.ascontiguousarray(labels, dtype=np.int64)).cast("B"))
    return digest.hexdigest()[:16]


def _stamp(source: str) -> tuple:
    """What must stay the same for a decoded copy to be reused: names, sizes and times of the files."""
    path = Path(source)
    if source == "demo":
        return ("demo", DEMO_COUNT, DEMO_SEED)
    try:
        files = sorted(path.rglob("*")) if path.is_dir() else [path]
        return tuple((str(f), f.stat().st_size, f.stat().st_mtime_ns) for f in files if f.is_file())
    except OSError as err:  # decoding will name the unreadable file or folder
        return ("unlisted", str(err))


def _cache_key(source: str, shape: tuple[int, int, int], skip_unreadable: bool) -> str:
    text = repr((CACHE_VERSION, source, shape, skip_unreadable, _stamp(source)))
    return hashlib.sha256(text.encode()).hexdigest()[:24]


_CACHE: dict[str, Dataset] = {}  # the last loads' parts by cache key, shared by a second load of the same data
_CACHE_SIZE = 2  # sources kept; a data set may be large


def _read_saved(folder: Path | None, key: str, shape: tuple[int, int, int],
                gone: str | None = None) -> tuple[Decoded, str] | None:
    """The copy kept in `folder` by save_decoded, if it was made from the files as they are now, or (`gone`:
    the fingerprint of the data wanted) from that data when its files are no longer there."""
    path = None if folder is None else Path(folder) / CACHE_FILE
    if path is None or not_regular(path, "decoded copy") is not None or not path.is_file():
        return None
    try:
        with np.load(path, allow_pickle=False) as saved:
            if str(saved["key"]) != key and (gone is None or str(saved["fingerprint"]) != gone):
                log.info("the decoded copy in %s is out of date (the files changed); decoding again", path)
                return None
            modes = json.loads(str(saved["modes"]))
            decoded = Decoded(read_member(saved, "images", path), read_member(saved, "labels", path),
                              tuple(str(n) for n in saved["class_names"]), tuple(str(u) for u in saved["unreadable"]),
                              modes)
            fingerprint = str(saved["fingerprint"])
        if decoded.images.shape[1:] != shape or len(decoded.images) != len(decoded.labels):
            raise ValueError(f"it holds images of shape {decoded.images.shape}, not N×{'×'.join(map(str, shape))}")
    except (OSError, ValueError, KeyError, EOFError, RecursionError, zipfile.BadZipFile) as err:  # SearcherError too
        log.warning("cannot read the decoded copy %s (%s); decoding again", path, err)
        return None
    log.info("read %d decoded images from %s", len(decoded.labels), path)
    return decoded, fingerprint


def _saved_key(path: Path) -> str | None:
    try:
        with np.load(path, allow_pickle=False) as saved:
            return str(saved["key"])
    except (OSError, ValueError, KeyError, EOFError, zipfile.BadZipFile):
        return None  # missing or unreadable: to be written anew


def _write_decoded(handle: BinaryIO, dataset: Dataset, step: int = 4096) -> None:
    """An .npz (as numpy.savez writes it) whose images are gathered from the parts a few thousand at a time,
    so saving never needs a second full copy of the images in memory."""
    count = dataset.count
    small = {"labels": dataset.rows(0, count, images=False)[1], "class_names": np.array(dataset.class_names, dtype=str),
             "unreadable": np.array(dataset.unreadable, dtype=str), "modes": np.array(json.dumps(dataset.modes)),
             "key": np.array(dataset.cache_key), "fingerprint": np.array(dataset.fingerprint)}
    with zipfile.ZipFile(handle, "w", zipfile.ZIP_STORED, allowZip64=True) as archive:
        for name, array in small.items():
            with archive.open(f"{name}.npy", "w", force_zip64=True) as member:
                np.lib.format.write_array(member, array, allow_pickle=False)
        with archive.open("images.npy", "w", force_zip64=True) as member:
            shape = (count, *dataset.train.images.shape[1:])
            np.lib.format.write_array_header_1_0(member, {"descr": "|u1", "fortran_order": False, "shape": shape})
            for start in range(0, count, step):
                member.write(dataset.rows(start, min(start + step, count))[0].tobytes())


def save_decoded(folder: str | Path, dataset: Dataset) -> Path | None:
    """Keep `dataset`'s decoded bytes in `folder` for the next `load_dataset(..., cache=folder)`, and list
    the files it skipped as unreadable there. Left as is when the copy there is already current."""
    folder = Path(folder)
    if dataset.unreadable:
        write_atomic(folder / UNREADABLE_FILE, "".join(f"{line}\n" for line in dataset.unreadable))
    path = folder / CACHE_FILE
    if not dataset.cache_key or not dataset.covers_all:
        return None
    if _saved_key(path) != dataset.cache_key:
        write_atomic(path, lambda handle: _write_decoded(handle, dataset))
    return path


def load_dataset(source: str | Path, input_shape: tuple[int, int, int], *, seed: int = 0,
                 fractions: tuple[float, float, float] = (0.7, 0.15, 0.15), skip_unreadable: bool = False,
                 split: dict[str, np.ndarray] | None = None, fingerprint: str | None = None,
                 cache: str | Path | None = None, workers: int | None = None) -> Dataset:
    """Load a source and split it; with `split` (and its `fingerprint`) reuse a stored split instead.

    The decoded bytes come from this process's last loads or from `cache` (a folder that
    `save_decoded` wrote to) while the files are unchanged; otherwise the source is decoded
    (a folder by `workers` threads). Nothing is written here. A load with the same split as an
    earlier one in this process shares its parts; another split is cut from them anew.
    """
    source = str(source)
    shape = _check_shape(input_shape)
    key = _cache_key(source, shape, skip_unreadable)
    known = _CACHE.get(key)
    images: np.ndarray | None = None  # for a known source, gathered from its parts only if the split differs
    if known is not None:
        labels, names, found = known.rows(0, known.count, images=False)[1], known.class_names, known.fingerprint
        unreadable, modes = known.unreadable, known.modes
    else:
        gone = fingerprint if source != "demo" and not os.path.lexists(source) else None
        saved = _read_saved(None if cache is None else Path(cache), key, shape, gone)
        if saved is not None and gone is not None:
            log.info("the data at %s is no longer there; reading the run's decoded copy of it (the same data: its "
                     "fingerprint is the one the run stored)", source)
        if saved is None:
            decoded = decode(source, shape, skip_unreadable, workers)
            saved = decoded, fingerprint_of(decoded.images, decoded.labels)
        whole, found = saved
        images, labels, names, unreadable, modes = (whole.images, whole.labels, whole.class_names, whole.unreadable,
                                                    whole.modes)
    if fingerprint is not None and fingerprint != found:
        now = describe_data(len(labels), len(names), shape)
        raise DataChanged(f"data fingerprint {found} differs from the stored {fingerprint}; the data has changed "
                          f"since the split was made: it now holds {now}", now=now,
                          file=None if source == "demo" else source, key="fingerprint")
    if split is None:
        try:
            indices = split_indices(labels, seed, fractions, class_names=names)
        except SearcherError as exc:  # too few images of a class: a fact of this data set, so name it
            raise SearcherError(exc.message, file=None if source == "demo" else source, key=exc.key) from None
    else:
        indices = check_split(split, len(labels))
    if known is not None and all(np.array_equal(indices[p], known.indices[p]) for p in PARTS):
        parts = {p: getattr(known, p) for p in PARTS}  # the same split again: share the parts
    else:
        images = images if images is not None else known.rows(0, known.count)[0]
        parts = {p: Split(layout.take(images, i), labels[i]) for p, i in indices.items()}
    dataset = Dataset(**parts, class_names=names, source=source, fingerprint=found, skipped=len(unreadable),
                      indices=indices, unreadable=unreadable, modes=modes, cache_key=key)
    if dataset.covers_all:
        _CACHE.pop(key, None)
        while len(_CACHE) >= _CACHE_SIZE:
            _CACHE.pop(next(iter(_CACHE)))
        _CACHE[key] = dataset
    return dataset


def few_examples(dataset: Dataset, minimum: int = FEW_EXAMPLES) -> list[tuple[str, str, int]]:
    """(part, class name, images) for each class with fewer than `minimum` validation or test images:
    a recall measured on so few images moves by 10 points or more with one image, so warn about it."""
    found = []
    for part in ("val", "test"):
        counts = np.bincount(getattr(dataset, part).labels, minlength=dataset.num_classes)
        found += [(part, dataset.class_names[k], int(n)) for k, n in enumerate(counts) if n < minimum]
    return found


def describe_few_examples(found: list[tuple[str, str, int]], minimum: int = FEW_EXAMPLES) -> str:
    """One warning line for what `few_examples` found."""
    parts = {"val": "validation", "test": "test"}
    listed = ", ".join(f"{name!r} {n} {parts[part]}" for part, name, n in found[:8])
    more = f" and {len(found) - 8} more" if len(found) > 8 else ""
    return (f"{len(found)} class part(s) hold fewer than {minimum} images ({listed}{more}): their recall is coarse, "
            "so scores can swing by chance; add images of those classes if you can")


def check_source(data: str) -> None:
    """A data source that cannot be there is refused by name before the space or data is read."""
    try:
        there = data == "demo" or bool(data.strip()) and Path(data).exists()
    except (OSError, ValueError, AttributeError):  # too long a name, a NUL byte, not text
        there = False
    if not there:
        raise SearcherError(f"`--data` {shown(data)} does not exist; give 'demo', a .npz file or a folder with one "
                            f"sub-folder per class", key="--data")
