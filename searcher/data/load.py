"""Data sets held in memory: the demo, a .npz file or a folder of images, split reproducibly.

Everything is decoded once into float32 tensors in [0, 1] (N×C×H×W) so that short
trials spend their time training, not reading files. The split is kept as index
arrays and a fingerprint of the data, so a resumed run can prove it sees the same data.
"""

from __future__ import annotations

import hashlib
import io
import logging
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch

from searcher.data.demo import make_demo
from searcher.errors import SearcherError
from searcher.runs import write_atomic

log = logging.getLogger(__name__)

DEMO_COUNT = 3000  # images in the built-in demo
DEMO_SEED = 0  # seed the demo is drawn with; the split has its own seed
PARTS = ("train", "val", "test")  # names of the three parts, in order
IMAGE_KEYS = ("images", "x")  # accepted .npz keys for the image array, first found wins
LABEL_KEYS = ("labels", "y")  # accepted .npz keys for the label array
IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg")  # files read from a class folder
MODES = {1: "L", 3: "RGB", 4: "RGBA"}  # Pillow mode for each channel count


@dataclass(frozen=True, eq=False)
class Split:
    """One part of the data, in memory."""

    images: torch.Tensor  # float32 N×C×H×W in [0, 1]
    labels: torch.Tensor  # int64 N, class numbers 0..K-1


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

    @property
    def num_classes(self) -> int:
        return len(self.class_names)


def _check_shape(input_shape: tuple[int, int, int]) -> tuple[int, int, int]:
    shape = tuple(input_shape)
    if len(shape) != 3 or not all(isinstance(d, (int, np.integer)) and d > 0 for d in shape):
        raise SearcherError(f"input shape {input_shape!r} must be three positive whole numbers C, H, W",
                            key="input_shape")
    if shape[0] not in MODES:
        raise SearcherError(f"input shape {input_shape!r} has {shape[0]} channels; channels must be 1, 3 or 4",
                            key="input_shape")
    return int(shape[0]), int(shape[1]), int(shape[2])


def resize_images(images: torch.Tensor, h: int, w: int) -> torch.Tensor:
    """Images N×C×H×W brought to h×w (bilinear, antialiased when shrinking); unchanged if already that size."""
    if images.shape[-2:] == (h, w):
        return images
    log.info("resizing images from %d×%d to %d×%d", images.shape[-2], images.shape[-1], h, w)
    out = torch.nn.functional.interpolate(images, size=(h, w), mode="bilinear", antialias=True, align_corners=False)
    return out.clamp_(0.0, 1.0)


def _to_unit(array: np.ndarray, path: Path, key: str) -> np.ndarray:
    """Pixel values as float32 in [0, 1]: uint8 and 0–255 data are divided by 255."""
    if array.dtype == np.uint8:
        return array.astype(np.float32) / 255
    if array.dtype.kind not in "biuf":
        raise SearcherError(f"`{key}` holds {array.dtype} values; images must be numbers", file=path, key=key)
    values = array.astype(np.float32)
    if not np.isfinite(values).all():
        raise SearcherError(f"`{key}` contains NaN or infinite values; pixels must be finite", file=path, key=key)
    low, high = float(values.min()), float(values.max())
    if low < 0 or high > 255:
        raise SearcherError(f"`{key}` has values from {low:g} to {high:g}; pixels must lie in 0–1 or 0–255",
                            file=path, key=key)
    if high > 1.0:
        log.info("%s: `%s` values reach %g, so they are read as 0–255 and divided by 255", path, key, high)
        values /= 255
    return values


def _channels_first(images: np.ndarray, channels: int, path: Path, key: str) -> np.ndarray:
    """Bring N×H×W, N×H×W×C or N×C×H×W to N×C×H×W, choosing the axis that matches `channels`."""
    layouts = "expected N×H×W, N×H×W×C or N×C×H×W"
    if images.ndim == 3:
        images, axis = images[:, None], 1
    elif images.ndim == 4:
        axes = [a for a in (3, 1) if images.shape[a] in MODES]
        if not axes:
            raise SearcherError(f"`{key}` has shape {images.shape}, with no channel axis of size 1, 3 or 4; {layouts}",
                                file=path, key=key)
        axis = next((a for a in axes if images.shape[a] == channels), axes[0])
    else:
        raise SearcherError(f"`{key}` has shape {images.shape}; {layouts}", file=path, key=key)
    if images.shape[axis] != channels:
        raise SearcherError(f"`{key}` has {images.shape[axis]} channel(s) but the input shape wants {channels}; "
                            "convert the images or change the input shape's channels", file=path, key=key)
    return np.moveaxis(images, axis, 1)


def _check_labels(labels: np.ndarray, count: int, names: tuple[str, ...] | None, path: Path,
                  key: str) -> tuple[np.ndarray, tuple[str, ...]]:
    """Labels as int64 class numbers, with class names (given, or '0'..'K-1')."""

    def bad(text: str) -> SearcherError:
        return SearcherError(text, file=path, key=key)

    labels = np.asarray(labels)
    labels = labels[:, 0] if labels.ndim == 2 and labels.shape[1] == 1 else labels
    if labels.ndim != 1:
        raise bad(f"`{key}` has shape {labels.shape}; labels must be one class number per image")
    if len(labels) != count:
        raise bad(f"`{key}` has {len(labels)} labels for {count} images; there must be one label per image")
    if labels.dtype.kind not in "iuf":
        raise bad(f"`{key}` holds {labels.dtype} values; labels must be integer class numbers")
    fractional = np.flatnonzero(~np.isfinite(labels) | (labels != np.round(labels))) if labels.dtype.kind == "f" else []
    if len(fractional):
        at = fractional[0]
        raise bad(f"label {labels[at].item()!r} at position {at} in `{key}` is not a whole number; "
                  "labels must be integer class numbers")
    labels = labels.astype(np.int64)
    if (labels < 0).any():
        at = int(np.argmax(labels < 0))
        raise bad(f"label {labels[at]} at position {at} in `{key}` is negative; labels must be class numbers from 0")
    if names is None:
        names = tuple(str(i) for i in range(int(labels.max()) + 1))
    elif labels.max() >= len(names):
        at = int(np.argmax(labels >= len(names)))
        raise bad(f"label {labels[at]} at position {at} in `{key}` is out of range; with {len(names)} class names, "
                  f"labels must be 0 to {len(names) - 1}")
    if len(np.unique(labels)) < 2:
        raise bad(f"`{key}` holds only class {names[labels[0]]!r}; a classifier needs at least 2 classes")
    return labels, names


def _find_key(archive: np.lib.npyio.NpzFile, keys: tuple[str, ...], what: str, path: Path) -> str:
    found = next((k for k in keys if k in archive.files), None)
    if found is None:
        raise SearcherError(f"no {what} array in the file (it has {', '.join(archive.files) or 'no arrays'}); "
                            f"name it one of {', '.join(repr(k) for k in keys)}", file=path, key=keys[0])
    return found


def _load_npz(path: Path, channels: int) -> tuple[torch.Tensor, np.ndarray, tuple[str, ...]]:
    try:
        archive = np.load(path, allow_pickle=False)
    except (OSError, ValueError, EOFError) as err:
        raise SearcherError(f"cannot read the file as .npz ({err}); save it with numpy.savez", file=path) from err
    with archive:
        image_key = _find_key(archive, IMAGE_KEYS, "image", path)
        label_key = _find_key(archive, LABEL_KEYS, "label", path)
        raw, labels = archive[image_key], archive[label_key]
        names = tuple(str(n) for n in archive["class_names"].ravel()) if "class_names" in archive.files else None
    if len(raw) == 0:
        raise SearcherError(f"`{image_key}` holds no images", file=path, key=image_key)
    if names is not None and len(set(names)) != len(names):
        raise SearcherError(f"`class_names` {list(names)} repeats a name; each class needs its own",
                            file=path, key="class_names")
    images = _channels_first(raw, channels, path, image_key)
    labels, names = _check_labels(labels, len(images), names, path, label_key)
    return torch.from_numpy(np.ascontiguousarray(_to_unit(images, path, image_key))), labels, names


def _read_image(file: Path, channels: int, h: int, w: int) -> np.ndarray:
    from PIL import Image

    with Image.open(file) as img:
        img = img.convert(MODES[channels])
        if img.size != (w, h):
            img = img.resize((w, h), Image.Resampling.BILINEAR)
        return np.asarray(img, dtype=np.uint8).reshape(h, w, channels)


def _load_folder(path: Path, channels: int, h: int, w: int,
                 skip_unreadable: bool) -> tuple[torch.Tensor, np.ndarray, tuple[str, ...], int]:
    from PIL import Image

    classes = sorted(p for p in path.iterdir() if p.is_dir() and not p.name.startswith("."))
    if len(classes) < 2:
        found = f"only the class {classes[0].name!r}" if classes else "no class sub-folders"
        raise SearcherError(f"folder has {found}; put each class's images (at least 2 classes) in a sub-folder "
                            "named after the class", file=path)
    pixels, labels, skipped = [], [], 0
    for label, folder in enumerate(classes):
        files = sorted(f for f in folder.iterdir() if f.is_file() and f.suffix.lower() in IMAGE_SUFFIXES)
        for file in files:
            try:
                pixels.append(_read_image(file, channels, h, w))
                labels.append(label)
            except (OSError, SyntaxError, ValueError, Image.DecompressionBombError) as err:
                if not skip_unreadable:
                    raise SearcherError(f"cannot read image ({err}); remove or replace it, or skip unreadable files",
                                        file=file) from err
                log.warning("skipping unreadable image %s: %s", file, err)
                skipped += 1
        if not labels or labels[-1] != label:
            raise SearcherError(f"class folder {folder.name!r} has no readable PNG or JPEG images", file=folder)
    images = torch.from_numpy(np.stack(pixels)).permute(0, 3, 1, 2).float().div_(255).contiguous()
    return images, np.asarray(labels, dtype=np.int64), tuple(c.name for c in classes), skipped


def load_arrays(source: str | Path, input_shape: tuple[int, int, int],
                skip_unreadable: bool = False) -> tuple[torch.Tensor, torch.Tensor, tuple[str, ...], int]:
    """Decode a whole source: (images float32 N×C×H×W in [0, 1], labels int64, class names, files skipped)."""
    channels, h, w = _check_shape(input_shape)
    source, skipped = str(source), 0
    path = Path(source)
    if source == "demo":
        gray, labels, names = make_demo(DEMO_COUNT, (h, w), DEMO_SEED)
        images = torch.from_numpy(gray).float().div_(255)[:, None].expand(-1, channels, -1, -1).contiguous()
    elif not path.exists():
        raise SearcherError(f"data source {source!r} does not exist; give 'demo', a .npz file or a folder with "
                            "one sub-folder per class", key="data")
    elif path.is_dir():
        images, labels, names, skipped = _load_folder(path, channels, h, w, skip_unreadable)
    elif path.suffix.lower() == ".npz":
        images, labels, names = _load_npz(path, channels)
        images = resize_images(images, h, w)
    else:
        raise SearcherError(f"data file type {path.suffix or '(none)'!r} is not supported; give a .npz file or a "
                            "folder of class sub-folders", file=path, key="data")
    log.info("loaded %d images in %d classes from %s (%d skipped)", len(images), len(names), source, skipped)
    return images, torch.from_numpy(np.asarray(labels, dtype=np.int64)), tuple(names), skipped


def fingerprint_of(images: torch.Tensor, labels: torch.Tensor) -> str:
    """Short sha256 over the decoded images and labels (and their shapes)."""
    digest = hashlib.sha256(repr((tuple(images.shape), tuple(labels.shape))).encode())
    for tensor in (images, labels):
        digest.update(memoryview(np.ascontiguousarray(tensor.numpy())).cast("B"))
    return digest.hexdigest()[:16]


def _check_fractions(fractions: tuple[float, float, float]) -> np.ndarray:
    try:
        shares = np.asarray(fractions, dtype=float).reshape(-1) if np.ndim(fractions) == 1 else np.zeros(0)
    except (TypeError, ValueError):
        shares = np.zeros(0)
    if (shares.shape != (3,) or not np.isfinite(shares).all() or (shares < 0).any() or shares[0] <= 0
            or abs(shares.sum() - 1) > 1e-6):
        raise SearcherError(f"split fractions {fractions!r} must be three shares for train, val and test, each at "
                            "least 0 (train above 0), adding up to 1, such as (0.7, 0.15, 0.15)", key="fractions")
    return shares


def _share(count: int, shares: np.ndarray) -> np.ndarray:
    """Split `count` items by `shares` (largest remainder), giving each wanted part at least one."""
    raw = count * shares
    sizes = np.floor(raw).astype(int)
    sizes[np.argsort(sizes - raw, kind="stable")[: count - sizes.sum()]] += 1
    for part in np.flatnonzero((shares > 0) & (sizes == 0)):
        sizes[np.argmax(sizes)] -= 1
        sizes[part] += 1
    return sizes


def split_indices(labels: np.ndarray, seed: int, fractions: tuple[float, float, float] = (0.7, 0.15, 0.15), *,
                  class_names: tuple[str, ...] | None = None) -> dict[str, np.ndarray]:
    """Stratified train/val/test index arrays: each class is split by `fractions` on its own.

    Every class reaches every part with a share above 0, so validation accuracy covers all classes.
    """
    shares = _check_fractions(fractions)
    labels = np.asarray(labels, dtype=np.int64)
    names = class_names or tuple(str(i) for i in range(int(labels.max()) + 1))
    needed = int((shares > 0).sum())
    rng = np.random.default_rng(seed)
    parts: list[list[np.ndarray]] = [[] for _ in PARTS]
    for label, name in enumerate(names):
        members = rng.permutation(np.flatnonzero(labels == label))
        if len(members) < needed:
            raise SearcherError(f"class {name!r} has {len(members)} image(s); a split into {needed} parts needs at "
                                f"least {needed} per class", key="labels")
        for part, chunk in zip(parts, np.split(members, np.cumsum(_share(len(members), shares))[:-1])):
            part.append(chunk)
    return {name: np.sort(np.concatenate(part)) for name, part in zip(PARTS, parts)}


def _check_split(indices: dict[str, np.ndarray], count: int) -> dict[str, np.ndarray]:
    missing = [p for p in PARTS if p not in indices]
    if missing:
        raise SearcherError(f"stored split lacks the part(s) {', '.join(missing)}; it needs {', '.join(PARTS)}",
                            key="split")
    checked = {p: np.asarray(indices[p]) for p in PARTS}
    checked = {p: a.astype(np.int64) if a.size == 0 else a for p, a in checked.items()}
    if any(a.ndim != 1 or a.dtype.kind not in "iu" for a in checked.values()):
        raise SearcherError("stored split must hold one integer index array per part", key="split")
    every = np.concatenate(list(checked.values()))
    outside = every[(every < 0) | (every >= count)]
    if len(outside):
        raise SearcherError(f"stored split refers to image {int(outside[0])}, but the data has images 0 to "
                            f"{count - 1}; the data has changed since the split was made", key="split")
    if len(np.unique(every)) != len(every):
        raise SearcherError("stored split uses an image twice; parts must not overlap", key="split")
    return {p: a.astype(np.int64) for p, a in checked.items()}


def save_split(path: str | Path, indices: dict[str, np.ndarray], fingerprint: str) -> None:
    """Store the split and the data fingerprint in one .npz file (exactly at `path`)."""
    parts = {p: np.asarray(indices[p], dtype=np.int64) for p in PARTS}
    buffer = io.BytesIO()
    np.savez(buffer, fingerprint=np.array(fingerprint), **parts)
    write_atomic(Path(path), buffer.getvalue())  # a search starting beside this one never reads half a file


def load_split(path: str | Path) -> tuple[dict[str, np.ndarray], str]:
    """Read a split stored by `save_split`: (indices, fingerprint)."""
    try:
        with np.load(path, allow_pickle=False) as archive:
            stored = {k: archive[k] for k in archive.files}
    except (OSError, ValueError, EOFError) as err:
        raise SearcherError(f"cannot read the stored split ({err})", file=path, key="split") from err
    if "fingerprint" not in stored:
        raise SearcherError("stored split has no fingerprint; store it with save_split", file=path, key="fingerprint")
    return {p: stored[p] for p in PARTS if p in stored}, str(stored["fingerprint"])


_CACHE: dict[tuple, tuple] = {}  # decoded sources, so a second load_dataset call skips decoding
_CACHE_SIZE = 2  # sources kept; a data set may be large


def _stamp(source: str) -> tuple:
    """What must stay the same for a cached decode to be reused: names, sizes and times of the files."""
    path = Path(source)
    if source == "demo" or not path.exists():
        return ()
    files = sorted(path.rglob("*")) if path.is_dir() else [path]
    return tuple((str(f), f.stat().st_size, f.stat().st_mtime_ns) for f in files if f.is_file())


def load_dataset(source: str | Path, input_shape: tuple[int, int, int], *, seed: int = 0,
                 fractions: tuple[float, float, float] = (0.7, 0.15, 0.15), skip_unreadable: bool = False,
                 split: dict[str, np.ndarray] | None = None, fingerprint: str | None = None) -> Dataset:
    """Load a source and split it; with `split` (and its `fingerprint`) reuse a stored split instead.

    A second call with the same source and shape reuses the decoded tensors while the files are
    unchanged, so only the split is redone; each Dataset still gets its own copies of the parts.
    """
    source = str(source)
    key = (source, _check_shape(input_shape), skip_unreadable, _stamp(source))
    if key not in _CACHE:
        images, labels, names, skipped = load_arrays(source, input_shape, skip_unreadable)
        while len(_CACHE) >= _CACHE_SIZE:
            _CACHE.pop(next(iter(_CACHE)))
        _CACHE[key] = (images, labels, names, skipped, fingerprint_of(images, labels))
    images, labels, names, skipped, found = _CACHE[key]
    if fingerprint is not None and fingerprint != found:
        raise SearcherError(f"data fingerprint {found} differs from the stored {fingerprint}; the data has changed "
                            "since the split was made", file=None if source == "demo" else source, key="fingerprint")
    if split is None:
        indices = split_indices(labels.numpy(), seed, fractions, class_names=names)
    else:
        indices = _check_split(split, len(labels))
    parts = {p: Split(images[torch.from_numpy(i)], labels[torch.from_numpy(i)]) for p, i in indices.items()}
    return Dataset(**parts, class_names=names, source=source, fingerprint=found, skipped=skipped, indices=indices)
