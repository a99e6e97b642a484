"""The stratified train/validation/test split, kept as index arrays and stored with a run."""

from __future__ import annotations

import io
import zipfile
from pathlib import Path

import numpy as np

from searcher.data.npz import read_member
from searcher.errors import SearcherError
from searcher.files import not_regular
from searcher.files import write_atomic

PARTS = ("train", "val", "test")  # names of the three parts, in order


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


def check_split(indices: dict[str, np.ndarray], count: int) -> dict[str, np.ndarray]:
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
    refused = not_regular(path, "stored split", key="split")
    if refused is not None:
        raise refused
    try:
        with np.load(path, allow_pickle=False) as archive:
            stored = {k: read_member(archive, k, Path(path)) for k in archive.files}  # headers checked first
    except SearcherError:
        raise
    except (OSError, ValueError, EOFError, zipfile.BadZipFile) as err:
        raise SearcherError(f"cannot read the stored split ({err})", file=path, key="split") from err
    if "fingerprint" not in stored:
        raise SearcherError("stored split has no fingerprint; store it with save_split", file=path, key="fingerprint")
    return {p: stored[p] for p in PARTS if p in stored}, str(stored["fingerprint"])
