"""Tests of the data layer: demo generator, loaders, errors, stratified split."""

from __future__ import annotations

import logging
import re
from pathlib import Path

import numpy as np
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from conftest import named
from PIL import Image

from searcher.data.load import (
    fingerprint_of,
    load_arrays,
    load_dataset,
    load_split,
    save_split,
    split_indices,
)
from searcher.data.demo import CLASS_NAMES, make_demo
from searcher.errors import SearcherError



@pytest.fixture(scope="module")
def demo() -> object:
    return load_dataset("demo", (1, 32, 32), seed=0)


# --- demo generator -------------------------------------------------------------------


def test_demo_repeats_for_a_seed_and_changes_with_it():
    a_images, a_labels, _ = make_demo(120, (20, 20), seed=5)
    b_images, b_labels, _ = make_demo(120, (20, 20), seed=5)
    c_images, _, _ = make_demo(120, (20, 20), seed=6)
    assert np.array_equal(a_images, b_images) and np.array_equal(a_labels, b_labels)
    assert not np.array_equal(a_images, c_images)


def test_demo_is_balanced_and_in_range():
    images, labels, names = make_demo(1003, (24, 40), seed=1)
    assert images.shape == (1003, 24, 40) and images.dtype == np.uint8
    assert labels.dtype == np.int64 and names == CLASS_NAMES and len(set(names)) == 8
    counts = np.bincount(labels, minlength=8)
    assert counts.max() - counts.min() <= 1 and counts.sum() == 1003
    # Every image has some contrast, and the set uses most of the 0–255 range.
    assert images.reshape(len(images), -1).std(axis=1).min() > 1.0
    assert images.min() < 40 and images.max() > 215


def test_demo_loads_as_bytes_and_repeats_gray_for_three_channels():
    images, labels, names, skipped = load_arrays("demo", (3, 16, 16))
    assert images.shape == (3000, 3, 16, 16) and images.dtype == np.uint8
    assert labels.dtype == np.int64 and skipped == 0 and len(names) == 8
    assert np.array_equal(images[:, 0], images[:, 2])
    assert np.array_equal(images[:, 0], make_demo(3000, (16, 16), 0)[0])


def test_demo_is_not_trivially_easy(demo):
    # A nearest-centroid classifier on raw pixels (the textbook baseline, common practice)
    # must beat chance (1/8) clearly but stay far from perfect, or a search would have
    # nothing to separate.
    train = torch.from_numpy(demo.train.images).flatten(1).float()
    test = torch.from_numpy(demo.test.images).flatten(1).float()
    centroids = torch.stack([train[demo.train.labels == c].mean(0) for c in range(demo.num_classes)])
    accuracy = (torch.cdist(test, centroids).argmin(1).numpy() == demo.test.labels).mean()
    print(f"nearest-centroid accuracy on the demo test split: {accuracy:.3f}")
    assert 1 / 8 + 0.1 < accuracy < 0.8


# --- .npz files -------------------------------------------------------------------------


def _labelled(rng: np.random.Generator, count: int = 24, classes: int = 3) -> np.ndarray:
    return rng.permutation(np.arange(count) % classes).astype(np.int64)


@pytest.mark.parametrize("layout", ["nhw", "nhwc", "nchw"])
def test_npz_layouts_load_as_n_c_h_w(tmp_path, layout):
    rng = np.random.default_rng(0)
    channels = 1 if layout == "nhw" else 3
    pixels = rng.integers(0, 256, (24, channels, 6, 5), dtype=np.uint8)  # N×C×H×W reference
    stored = {"nhw": pixels[:, 0], "nhwc": pixels.transpose(0, 2, 3, 1), "nchw": pixels}[layout]
    labels = _labelled(rng)
    np.savez(tmp_path / "d.npz", images=stored, labels=labels)
    images, got_labels, names, _ = load_arrays(str(tmp_path / "d.npz"), (channels, 6, 5))
    assert images.dtype == np.uint8 and np.array_equal(images, pixels)
    assert np.array_equal(got_labels, labels) and names == ("0", "1", "2")


def test_npz_float_data_in_unit_range_and_in_0_255(tmp_path, caplog):
    rng = np.random.default_rng(1)
    unit = rng.random((24, 4, 4)).astype(np.float32)
    np.savez(tmp_path / "unit.npz", x=unit, y=_labelled(rng))
    np.savez(tmp_path / "wide.npz", x=unit * 255, y=_labelled(rng))
    a = load_arrays(str(tmp_path / "unit.npz"), (1, 4, 4))[0]
    with caplog.at_level(logging.INFO, logger="searcher.data"):
        b = load_arrays(str(tmp_path / "wide.npz"), (1, 4, 4))[0]
    # Held as bytes: 0–1 floats are scaled by 255 and rounded, 0–255 floats rounded.
    assert np.array_equal(a[:, 0], np.rint(unit * 255)) and np.array_equal(a, b)
    assert "0–255" in caplog.text


def test_npz_class_names_and_resize(tmp_path):
    rng = np.random.default_rng(2)
    pixels = np.full((24, 8, 8), 200, np.uint8)
    np.savez(tmp_path / "d.npz", images=pixels, labels=_labelled(rng), class_names=np.array(["nut", "bolt", "washer"]))
    images, _, names, _ = load_arrays(str(tmp_path / "d.npz"), (1, 16, 12))
    assert names == ("nut", "bolt", "washer") and images.shape == (24, 1, 16, 12)
    assert (images == 200).all()  # a flat image stays flat


# --- image folders --------------------------------------------------------------------


def _write_folder(root: Path, rng: np.random.Generator, per_class: int = 4, size: int = 8) -> dict[str, list[np.ndarray]]:
    drawn: dict[str, list[np.ndarray]] = {}
    for name in ("scratch", "dent", "good"):
        (root / name).mkdir(parents=True)
        drawn[name] = []
        for i in range(per_class):
            pixels = rng.integers(0, 256, (size, size, 3), dtype=np.uint8)
            drawn[name].append(pixels)
            suffix = ".jpg" if i == 0 else ".png"  # one JPEG per class, the rest PNG
            Image.fromarray(pixels).save(root / name / f"{i}{suffix}")
    return drawn


def test_folder_of_png_and_jpeg(tmp_path):
    drawn = _write_folder(tmp_path, np.random.default_rng(3))
    (tmp_path / "good" / "notes.txt").write_text("not an image")
    images, labels, names, skipped = load_arrays(str(tmp_path), (3, 8, 8))
    assert names == ("dent", "good", "scratch") and skipped == 0  # sorted folder names
    assert images.shape == (12, 3, 8, 8) and np.bincount(labels).tolist() == [4, 4, 4]
    # Files are read in sorted order: 0.jpg first, then the PNGs, which are lossless.
    assert np.array_equal(images[1], drawn["dent"][1].transpose(2, 0, 1))
    gray = load_arrays(str(tmp_path), (1, 4, 4))[0]
    assert gray.shape == (12, 1, 4, 4) and gray.dtype == np.uint8


def test_folder_unreadable_image_is_named_or_skipped(tmp_path):
    _write_folder(tmp_path, np.random.default_rng(4))
    broken = tmp_path / "good" / "9.png"
    broken.write_bytes(b"\x89PNG\r\n\x1a\n not really")
    with pytest.raises(SearcherError, match=named("cannot read image", broken)):
        load_arrays(str(tmp_path), (1, 8, 8))
    images, _, _, skipped = load_arrays(str(tmp_path), (1, 8, 8), skip_unreadable=True)
    assert skipped == 1 and len(images) == 12
    assert load_dataset(str(tmp_path), (1, 8, 8), skip_unreadable=True, fractions=(0.5, 0.25, 0.25)).skipped == 1


# --- errors -----------------------------------------------------------------------------


def _npz(tmp_path: Path, **arrays) -> Path:
    path = tmp_path / "bad.npz"
    np.savez(path, **arrays)
    return path


NINE = np.zeros((9, 4, 4), np.uint8)  # nine blank images for the label checks


@pytest.mark.parametrize(
    ("arrays", "shape", "pattern"),
    [
        ({"pixels": NINE, "labels": np.arange(9) % 3}, (1, 4, 4), "no image array.*pixels.*'images', 'x'"),
        ({"images": NINE, "target": np.arange(9) % 3}, (1, 4, 4), "no label array.*target.*'labels', 'y'"),
        ({"images": NINE, "labels": np.array([0, 1, 2, 0, 1, 2, 0, 1, -1])}, (1, 4, 4), "label -1 at position 8 in `labels` is negative"),
        ({"images": NINE, "y": np.arange(9) % 3 + 0.5}, (1, 4, 4), "label 0.5 at position 0 in `y` is not a whole number"),
        ({"x": NINE, "y": np.arange(9) % 3, "class_names": np.array(["a", "b"])}, (1, 4, 4), "label 2 at position 2 in `y` is out of range; with 2 class names"),
        ({"images": NINE, "labels": np.arange(8) % 3}, (1, 4, 4), "8 labels for 9 images"),
        ({"images": np.zeros((9, 4, 4, 3), np.uint8), "labels": np.arange(9) % 3}, (1, 4, 4), "3 channel.*wants 1"),
        ({"images": NINE, "labels": np.arange(9) % 3}, (3, 4, 4), "1 channel.*wants 3"),
        ({"images": NINE, "labels": np.zeros(9, int)}, (1, 4, 4), "only class '0'.*at least 2 classes"),
        ({"images": np.zeros((9, 5, 6, 7)), "labels": np.arange(9) % 3}, (1, 4, 4), r"shape \(9, 5, 6, 7\).*no channel axis"),
        ({"images": NINE.astype(float) + 300, "labels": np.arange(9) % 3}, (1, 4, 4), "values from 300 to 300"),
        ({"images": NINE[:0], "labels": np.arange(0)}, (1, 4, 4), "holds no images"),
    ],
)
def test_npz_mistakes_name_the_file_and_key(tmp_path, arrays, shape, pattern):
    path = _npz(tmp_path, **arrays)
    with pytest.raises(SearcherError, match=named(pattern, path)) as caught:
        load_arrays(str(path), shape)
    assert caught.value.file == str(path)


def test_source_mistakes(tmp_path):
    with pytest.raises(SearcherError, match="'nowhere.npz' does not exist; give 'demo'"):
        load_arrays("nowhere.npz", (1, 8, 8))
    (tmp_path / "d.csv").write_text("1,2")
    with pytest.raises(SearcherError, match=named("'.csv' is not supported", tmp_path / "d.csv")):
        load_arrays(str(tmp_path / "d.csv"), (1, 8, 8))
    (tmp_path / "junk.npz").write_bytes(b"not a zip")
    with pytest.raises(SearcherError, match=named("not a NumPy .npz archive", tmp_path / "junk.npz")):
        load_arrays(str(tmp_path / "junk.npz"), (1, 8, 8))
    with pytest.raises(SearcherError, match="has 2 channels; channels must be 1, 3 or 4"):
        load_arrays("demo", (2, 8, 8))
    with pytest.raises(SearcherError, match="must be three positive whole numbers"):
        load_arrays("demo", (1, 0, 8))


def test_folder_mistakes(tmp_path):
    with pytest.raises(SearcherError, match=named("no class sub-folders", tmp_path)):
        load_arrays(str(tmp_path), (1, 8, 8))
    (tmp_path / "only").mkdir()
    Image.new("L", (8, 8)).save(tmp_path / "only" / "a.png")
    with pytest.raises(SearcherError, match=named("only the class 'only'", tmp_path)):
        load_arrays(str(tmp_path), (1, 8, 8))
    (tmp_path / "empty").mkdir()
    with pytest.raises(SearcherError, match=named("'empty' has no PNG or JPEG files", tmp_path / "empty")):
        load_arrays(str(tmp_path), (1, 8, 8))


def test_class_with_too_few_examples_to_split(tmp_path):
    labels = np.array([0] * 10 + [1] * 2)
    path = _npz(tmp_path, images=np.zeros((12, 4, 4), np.uint8), labels=labels, class_names=np.array(["ok", "rare"]))
    with pytest.raises(SearcherError, match="class 'rare' has 2 image.*needs at least 3 per class"):
        load_dataset(str(path), (1, 4, 4))
    assert load_dataset(str(path), (1, 4, 4), fractions=(0.8, 0.2, 0.0)).test.labels.size == 0


@pytest.mark.parametrize("fractions", [(0.7, 0.3), (0.5, 0.5, 0.5), (0.0, 0.5, 0.5), (1.2, -0.1, -0.1)])
def test_bad_fractions(fractions):
    with pytest.raises(SearcherError, match=re.escape(repr(fractions)) + " must be three shares"):
        split_indices(np.arange(30) % 3, seed=0, fractions=fractions)


# --- split -------------------------------------------------------------------------------


def test_split_is_stratified():
    labels = np.repeat(np.arange(4), [200, 80, 40, 20])
    parts = split_indices(labels, seed=0)
    overall = np.bincount(labels) / len(labels)
    for name, share in zip(("train", "val", "test"), (0.7, 0.15, 0.15)):
        counts = np.bincount(labels[parts[name]], minlength=4)
        assert counts.min() >= 1  # every class in every part
        assert abs(len(parts[name]) / len(labels) - share) < 0.01
        # Each class keeps its share of the part, up to one image of rounding per class.
        assert np.all(np.abs(counts / len(parts[name]) - overall) <= 1.5 / len(parts[name]))


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(3, 40), min_size=2, max_size=6), st.integers(0, 2**31))
def test_split_parts_are_disjoint_cover_everything_and_hold_every_class(sizes, seed):
    labels = np.random.default_rng(seed).permutation(np.repeat(np.arange(len(sizes)), sizes))
    parts = split_indices(labels, seed=seed)
    every = np.concatenate(list(parts.values()))
    assert np.array_equal(np.sort(every), np.arange(len(labels)))
    assert all(len(np.unique(labels[p])) == len(sizes) for p in parts.values())


def test_split_repeats_by_seed_and_round_trips(tmp_path):
    labels = np.arange(300) % 5
    first, again, other = (split_indices(labels, seed=s) for s in (7, 7, 8))
    assert all(np.array_equal(first[p], again[p]) for p in first)
    assert not np.array_equal(first["train"], other["train"])
    save_split(tmp_path / "split.npz", first, "abc123")
    loaded, stored = load_split(tmp_path / "split.npz")
    assert stored == "abc123" and all(np.array_equal(first[p], loaded[p]) for p in first)


def test_stored_split_is_reused_and_checked(demo, tmp_path):
    again = load_dataset("demo", (1, 32, 32), split=demo.indices, fingerprint=demo.fingerprint)
    assert np.array_equal(again.val.images, demo.val.images) and again.fingerprint == demo.fingerprint
    with pytest.raises(SearcherError, match="refers to image 3000, but the data has images 0 to 2999"):
        load_dataset("demo", (1, 32, 32), split={**demo.indices, "test": np.array([3000])})
    with pytest.raises(SearcherError, match="uses an image twice"):
        load_dataset("demo", (1, 32, 32), split={**demo.indices, "test": demo.indices["train"][:3]})
    with pytest.raises(SearcherError, match="fingerprint .* differs from the stored 0000"):
        load_dataset("demo", (1, 32, 32), fingerprint="0000")
    (tmp_path / "s.npz").write_bytes(b"")
    with pytest.raises(SearcherError, match=named("cannot read the stored split", tmp_path / "s.npz")):
        load_split(tmp_path / "s.npz")


def test_fingerprint_follows_the_data(tmp_path):
    rng = np.random.default_rng(5)
    pixels, labels = rng.integers(0, 256, (24, 4, 4), dtype=np.uint8), _labelled(rng)
    path = tmp_path / "d.npz"
    np.savez(path, images=pixels, labels=labels)
    first = load_dataset(str(path), (1, 4, 4))
    pixels[0, 0, 0] ^= 1
    np.savez(path, images=pixels, labels=labels, class_names=np.array(["a", "b", "c"]))  # new size: no stale cache
    second = load_dataset(str(path), (1, 4, 4))
    assert first.fingerprint != second.fingerprint
    assert second.fingerprint == fingerprint_of(pixels[:, None], labels)


def test_demo_dataset_parts(demo):
    sizes = [len(getattr(demo, p).labels) for p in ("train", "val", "test")]
    assert sum(sizes) == 3000 and demo.num_classes == 8 and demo.source == "demo"
    assert all(np.bincount(getattr(demo, p).labels).min() > 0 for p in ("train", "val", "test"))
    assert demo.train.images.shape[1:] == (1, 32, 32)


# --- an outside data set: scikit-learn's digits -------------------------------------------


@pytest.mark.slow
def test_sklearn_digits_via_npz_and_png_folder(tmp_path):
    from sklearn.datasets import load_digits

    # UCI optical handwritten digits as shipped with scikit-learn: 1797 images of 8×8 with
    # values 0–16 in 10 classes (source: scikit-learn documentation of load_digits).
    digits = load_digits()
    pixels = np.round(digits.images * 255 / 16).astype(np.uint8)
    np.savez(tmp_path / "digits.npz", images=pixels, labels=digits.target)
    for i, (image, label) in enumerate(zip(pixels, digits.target)):
        folder = tmp_path / "png" / f"digit{label}"
        folder.mkdir(parents=True, exist_ok=True)
        Image.fromarray(image).save(folder / f"{i:04d}.png")
    expected = np.bincount(digits.target)
    from_npz = load_dataset(tmp_path / "digits.npz", (1, 8, 8))  # a Path works as well as a str
    from_png = load_dataset(str(tmp_path / "png"), (1, 8, 8))
    for data in (from_npz, from_png):
        total = sum(np.bincount(getattr(data, p).labels, minlength=10) for p in ("train", "val", "test"))
        assert data.num_classes == 10 and total.sum() == len(digits.images) == 1797
        assert np.array_equal(total, expected)
    # PNG is lossless: both routes decode to the same pixels. The folder lists files by
    # class, then by name, so image i of the folder is image order[i] of the array.
    npz_images, npz_labels = _reassemble(from_npz)
    png_images, png_labels = _reassemble(from_png)
    order = np.argsort(digits.target, kind="stable")
    assert np.array_equal(png_labels, npz_labels[order]) and np.array_equal(png_images, npz_images[order])
    assert np.array_equal(npz_images[:, 0], pixels)


def _reassemble(data) -> tuple[np.ndarray, np.ndarray]:
    """All images and labels of a Dataset in their original order, from its parts and indices."""
    count = sum(len(i) for i in data.indices.values())
    images = np.empty((count, *data.train.images.shape[1:]), np.uint8)
    labels = np.empty(count, dtype=np.int64)
    for name, where in data.indices.items():
        images[where], labels[where] = getattr(data, name).images, getattr(data, name).labels
    return images, labels


# --- .npz defects (each refused with the file and the key named) ---------------------------


def test_npz_that_is_not_an_archive_says_so(tmp_path):
    text, single = tmp_path / "notes.npz", tmp_path / "single.npz"
    text.write_text("images,labels\n1,2\n")
    np.save(tmp_path / "single.npy", np.zeros((4, 4, 4), np.uint8))
    (tmp_path / "single.npy").rename(single)
    with pytest.raises(SearcherError, match=named("not a NumPy .npz archive", text)):
        load_arrays(str(text), (1, 4, 4))
    with pytest.raises(SearcherError, match=named(r"single NumPy array \(.npy\), not an .npz archive", single)):
        load_arrays(str(single), (1, 4, 4))


@pytest.mark.parametrize("key", ["images", "labels", "class_names"])
def test_npz_holding_pickled_objects_is_refused_without_unpickling(tmp_path, key):
    arrays = {"images": NINE, "labels": np.arange(9) % 3, "class_names": np.array(["a", "b", "c"])}
    arrays[key] = np.array([object()] * len(arrays[key]), dtype=object)
    path = _npz(tmp_path, **arrays)
    with pytest.raises(SearcherError, match=named(f"`{key}` holds Python objects \\(pickled\\)", path)):
        load_arrays(str(path), (1, 4, 4))


def test_labels_must_be_0_to_k_minus_1_before_anything_is_built(tmp_path):
    gap = _npz(tmp_path, images=NINE, labels=np.array([0, 1, 3] * 3))
    with pytest.raises(SearcherError, match=r"3 distinct labels \(0, 1, 3\), but labels must be the class numbers "
                                            r"0 to K-1 with none skipped: 3 classes need 0 to 2"):
        load_arrays(str(gap), (1, 4, 4))
    # One label of 10^11 is reported at once: no list of 10^11 class names is built first.
    huge = _npz(tmp_path, images=NINE, labels=np.array([0, 1, 2] * 2 + [0, 1, 10**11]))
    with pytest.raises(SearcherError, match=r"\(0, 1, 2, 100000000000\).*4 classes need 0 to 3"):
        load_arrays(str(huge), (1, 4, 4))
    named = _npz(tmp_path, images=NINE, labels=np.arange(9) % 2, class_names=np.array(["ok", "dent", "scratch"]))
    with pytest.raises(SearcherError, match=r"no image of class 2 \('scratch'\).*drop the unused names"):
        load_arrays(str(named), (1, 4, 4))


def test_16_bit_npz_is_scaled(tmp_path):
    deep = (np.arange(9 * 16).reshape(9, 4, 4) * 455).astype(np.uint16)
    path = _npz(tmp_path, images=deep, labels=np.arange(9) % 3)
    images = load_arrays(str(path), (1, 4, 4))[0]
    assert np.array_equal(images[:, 0], np.round(deep / 257).astype(np.uint8))  # 65535 -> 255, as for PNG


def test_a_second_load_shares_the_parts_or_cuts_a_new_split_from_them():
    demo = load_dataset("demo", (1, 32, 32), seed=0)
    same = load_dataset("demo", (1, 32, 32), seed=0)
    assert same.train.images is demo.train.images  # held once in memory, not copied per load
    other = load_dataset("demo", (1, 32, 32), seed=1)
    assert other.fingerprint == demo.fingerprint and not np.array_equal(other.indices["test"], demo.indices["test"])
    # The new split is cut from the same bytes: image i is the same image whichever part holds it.
    assert np.array_equal(other.rows(0, 3000)[0], demo.rows(0, 3000)[0])
    assert np.array_equal(demo.rows(0, 3000)[0][:, 0], make_demo(3000, (32, 32), 0)[0])
