"""A NumPy .npz archive of images and labels, checked and brought to uint8 N×C×H×W.

Every defect is refused with the file and the array's key named: a file that is not an archive at
all, arrays holding pickled objects, an unknown layout, pixels outside 0–1 / 0–255 / 16 bits, and
labels that are not the class numbers 0..K-1 (checked before anything is sized by the label count).
"""

from __future__ import annotations

import logging
import math
import zipfile
from pathlib import Path

import numpy as np

from searcher.data import layout
from searcher.data.folder import MODES, name_problem
from searcher.core.units import format_bytes
from searcher.errors import SearcherError, shown
from searcher.files import not_regular
from searcher.limits import available_memory

log = logging.getLogger(__name__)

IMAGE_KEYS = ("images", "x")  # accepted .npz keys for the image array, first found wins
LABEL_KEYS = ("labels", "y")  # accepted .npz keys for the label array
SHOWN = 8  # values quoted in a message before it says "…"
DEFLATE_MOST = 1100  # deflate's greatest compression ratio is about 1,032 to 1 (zlib's technical notes, from memory)


def _quoted(values: np.ndarray) -> str:
    listed = ", ".join(str(v) for v in values[:SHOWN].tolist())
    return listed + (f", … ({len(values)} in all)" if len(values) > SHOWN else "")


def to_bytes(array: np.ndarray, path: Path, key: str) -> np.ndarray:
    """Pixel values as uint8: kept if uint8, 0–1 floats times 255, 0–255 as they are, uint16 / 257; rounded."""
    if array.dtype == np.uint8:
        return array
    if array.dtype.kind not in "iuf":
        raise SearcherError(f"`{key}` holds {array.dtype} values; pixels must be numbers: uint8 (0–255), uint16 "
                            "(16-bit) or floats in 0–1 or 0–255", file=path, key=key)
    if array.dtype == np.uint16:
        log.info("%s: `%s` is 16-bit, scaled to 8 bits (value / 257)", path, key)
        return ((array.astype(np.uint32) + 128) // 257).astype(np.uint8)
    if array.dtype.kind == "f" and not np.isfinite(array).all():
        raise SearcherError(f"`{key}` contains NaN or infinite values; pixels must be finite", file=path, key=key)
    low, high = (float(array.min()), float(array.max())) if array.size else (0.0, 0.0)
    if low < 0 or high > 255:
        raise SearcherError(f"`{key}` has values from {low:g} to {high:g}; pixels must lie in 0–1 or 0–255 "
                            "(or be uint16 for 16-bit images)", file=path, key=key)
    factor = 255.0 if high <= 1.0 and array.dtype.kind == "f" else 1.0
    if factor == 1.0 and array.dtype.kind == "f":
        log.info("%s: `%s` values reach %g, so they are read as 0–255", path, key, high)
    out = np.empty(array.shape, np.uint8)
    flat_in, flat_out = array.reshape(len(array), -1), out.reshape(len(array), -1)
    for start in range(0, len(array), 1024):  # in slices: a float64 copy of the whole set is not needed
        flat_out[start:start + 1024] = np.rint(flat_in[start:start + 1024] * factor)
    return out


def channels_first(images: np.ndarray, channels: int, path: Path, key: str) -> np.ndarray:
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


def check_labels(labels: np.ndarray, count: int, names: tuple[str, ...] | None, path: Path,
                 key: str) -> tuple[np.ndarray, tuple[str, ...]]:
    """Labels as int64 class numbers 0..K-1 with every class present, and class names (given, or '0'..'K-1')."""

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
    huge = np.abs(labels) >= 2**62 if labels.dtype.kind != "u" else labels >= 2**62  # before int64 would wrap
    if huge.any():
        at = int(np.argmax(huge))
        value = labels[at].item()
        text = f"{value:g}" if isinstance(value, float) else str(value)
        raise bad(f"label {text} at position {at} in `{key}` is far too large; labels must be the class numbers 0 to K-1")
    labels = labels.astype(np.int64)
    if (labels < 0).any():
        at = int(np.argmax(labels < 0))
        raise bad(f"label {labels[at]} at position {at} in `{key}` is negative; labels must be class numbers from 0")
    present = np.unique(labels)
    if names is not None and present[-1] >= len(names):
        at = int(np.argmax(labels >= len(names)))
        raise bad(f"label {labels[at]} at position {at} in `{key}` is out of range; with {len(names)} class names, "
                  f"labels must be 0 to {len(names) - 1}")
    wanted = len(names) if names is not None else len(present)
    if len(present) != wanted or present[-1] != wanted - 1:
        if names is not None:
            absent = [f"{k} ({names[k]!r})" for k in sorted(set(range(wanted)) - set(present.tolist()))]
            raise bad(f"`{key}` has no image of class {', '.join(absent[:SHOWN])}; `class_names` names {wanted} "
                      f"classes, so the labels must use each of 0 to {wanted - 1}: drop the unused names")
        raise bad(f"`{key}` holds {len(present)} distinct labels ({_quoted(present)}), but labels must be the class "
                  f"numbers 0 to K-1 with none skipped: {len(present)} classes need 0 to {len(present) - 1}; "
                  "renumber them (numpy.unique(labels, return_inverse=True) does)")
    names = names if names is not None else tuple(str(i) for i in range(wanted))
    if wanted < 2:
        raise bad(f"`{key}` holds only class {names[0]!r}; a classifier needs at least 2 classes")
    return labels, names


def _name_text(name: object, path: Path) -> str:
    """A stored class name as text: bytes must be UTF-8; checked like a class folder's name."""
    try:
        text = name.decode("utf-8") if isinstance(name, bytes) else str(name)
    except UnicodeDecodeError:
        raise SearcherError(f"`class_names` holds the name {shown(name)}, which is not UTF-8 text; store the names "
                            "as text (numpy.array([...], dtype=str))", file=path, key="class_names") from None
    problem = name_problem(text)
    if problem:
        raise SearcherError(f"`class_names` holds the name {shown(text)}: {problem}", file=path, key="class_names")
    return text


def _find_key(archive: np.lib.npyio.NpzFile, keys: tuple[str, ...], what: str, path: Path) -> str:
    found = next((k for k in keys if k in archive.files), None)
    if found is None:
        raise SearcherError(f"no {what} array in the file (it has {', '.join(archive.files) or 'no arrays'}); "
                            f"name it one of {', '.join(repr(k) for k in keys)}", file=path, key=keys[0])
    return found


def _declared(archive: np.lib.npyio.NpzFile, key: str, path: Path) -> tuple[tuple[int, ...], np.dtype]:
    """The shape and type an array's header claims, checked against the bytes the archive holds for it.

    numpy allocates what the header claims before it reads a byte: a header claiming
    (10¹², 16, 16) would ask for 233 TiB. So the claim must match the member's size in the zip
    directory, that size must be one its compressed bytes can hold (deflate packs at most about
    1,032 to 1), and the array must fit in this machine's free memory.
    """
    name = key + ".npy" if key + ".npy" in archive.zip.namelist() else key
    info = archive.zip.getinfo(name)
    with archive.zip.open(info) as member:
        version = np.lib.format.read_magic(member)
        read = np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
        shape, _, dtype = read(member)
        header = member.tell()
    if dtype.hasobject:
        raise SearcherError(f"`{key}` holds Python objects (pickled), which are not read for safety; save plain "
                            "number (or string) arrays with numpy.savez", file=path, key=key)
    claimed = math.prod(shape) * dtype.itemsize
    if claimed != info.file_size - header or info.file_size > max(info.compress_size, 1) * DEFLATE_MOST + 4096:
        raise SearcherError(f"`{key}` claims shape {shape} of {dtype} ({format_bytes(claimed)}) but the file holds "
                            f"{format_bytes(info.compress_size)} for it: the file is damaged or was not written by "
                            "numpy; save it again with numpy.savez", file=path, key=key)
    if claimed > available_memory():
        raise SearcherError(f"`{key}` of shape {shape} takes {format_bytes(claimed)}, more than this machine's free "
                            f"memory ({format_bytes(available_memory())}); use fewer or smaller images", file=path,
                            key=key)
    return shape, dtype


def read_member(archive: np.lib.npyio.NpzFile, key: str, path: Path) -> np.ndarray:
    """One member, its header checked before anything is allocated, with its read failures said in the user's terms."""
    try:
        _declared(archive, key, path)
        array = archive[key]
    except SearcherError:
        raise
    except ValueError as err:
        if "allow_pickle" in str(err) or "pickled" in str(err):
            raise SearcherError(f"`{key}` holds Python objects (pickled), which are not read for safety; save plain "
                                "number (or string) arrays with numpy.savez", file=path, key=key) from err
        raise SearcherError(f"`{key}` cannot be read ({err})", file=path, key=key) from err
    except (OSError, EOFError, KeyError, zipfile.BadZipFile) as err:
        raise SearcherError(f"`{key}` cannot be read; the file looks damaged ({err})", file=path, key=key) from err
    return array if array.dtype.isnative else array.astype(array.dtype.newbyteorder("="))  # big-endian: as numbers


def _open(path: Path) -> np.lib.npyio.NpzFile:
    refused = not_regular(path, "data file", key="--data")  # a FIFO would block, a device never end
    if refused is not None:
        raise SearcherError(refused.message, file=path, key="--data")
    try:
        with open(path, "rb") as handle:
            head = handle.read(6)
    except OSError as err:
        raise SearcherError(f"cannot read the file ({err.strerror or err})", file=path) from err
    if head.startswith(b"\x93NUMPY"):
        raise SearcherError("file is a single NumPy array (.npy), not an .npz archive of named arrays; save images "
                            "and labels together with numpy.savez(file, images=..., labels=...)", file=path)
    if not head.startswith(b"PK"):
        raise SearcherError("file is not a NumPy .npz archive (it does not start as a zip file does); save it with "
                            "numpy.savez(file, images=..., labels=...)", file=path)
    try:
        return np.load(path, allow_pickle=False)
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as err:
        raise SearcherError(f"cannot read the file as .npz ({err}); save it with numpy.savez", file=path) from err


def read_npz(path: Path, channels: int) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    """(images uint8 N×C×H×W at the stored size, labels int64, class names) from a .npz file."""
    with _open(path) as archive:
        image_key = _find_key(archive, IMAGE_KEYS, "image", path)
        label_key = _find_key(archive, LABEL_KEYS, "label", path)
        raw, labels = read_member(archive, image_key, path), read_member(archive, label_key, path)
        names = None
        if "class_names" in archive.files:
            stored = read_member(archive, "class_names", path)
            if stored.dtype.kind not in "USiu":
                raise SearcherError(f"`class_names` holds {stored.dtype} values; give one name (text) per class",
                                    file=path, key="class_names")
            names = tuple(_name_text(n, path) for n in stored.ravel().tolist())
    if len(raw) == 0:
        raise SearcherError(f"`{image_key}` holds no images", file=path, key=image_key)
    if names is not None and len(set(names)) != len(names):
        raise SearcherError(f"`class_names` {list(names)[:SHOWN]} repeats a name; each class needs its own",
                            file=path, key="class_names")
    images = channels_first(raw, channels, path, image_key)
    if 0 in images.shape[2:]:
        raise SearcherError(f"`{image_key}` has shape {raw.shape}: images of {images.shape[2]}×{images.shape[3]} "
                            "pixels; each image needs at least 1×1", file=path, key=image_key)
    labels, names = check_labels(labels, len(images), names, path, label_key)
    return layout.pixel_major(to_bytes(images, path, image_key)), labels, names
