"""Augmentation: geometry on a drawn test pattern against numpy, the settings table, and where it applies."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from conftest import TINY_SPACE

from searcher.core.arch import parse_arch
from searcher.core.space_file import load_space
from searcher.core.train_settings import AugmentSettings, TrainSettings
from searcher.errors import SearcherError
from searcher.model import augment as augment_module
from searcher.model.augment import Augmenter, shift_edge, warp
from searcher.model.build import build
from searcher.model.train import train_candidate


def _pattern(n: int = 4, c: int = 3, h: int = 9, w: int = 9) -> np.ndarray:
    """A drawn test pattern with no symmetry: distinct values everywhere (uint8 N×C×H×W)."""
    return (np.arange(n * c * h * w).reshape(n, c, h, w) * 7 % 251).astype(np.uint8)


@pytest.mark.parametrize("dtype", [torch.uint8, torch.float32])
def test_shift_equals_numpy_roll_with_edges_repeated(dtype):
    # Reference: numpy.pad(mode="edge") then a crop, i.e. numpy.roll with the wrapped-in rows and
    # columns replaced by the repeated edge; away from the wrap, numpy.roll itself.
    images = _pattern()
    dy, dx = np.array([2, -1, 0, 3]), np.array([-3, 0, 1, 2])
    got = shift_edge(torch.from_numpy(images).to(dtype), torch.from_numpy(dy), torch.from_numpy(dx)).numpy()
    for i, (y, x) in enumerate(zip(dy, dx)):
        padded = np.pad(images[i], ((0, 0), (3, 3), (3, 3)), mode="edge")
        expected = padded[:, 3 - y : 3 - y + 9, 3 - x : 3 - x + 9]
        assert np.array_equal(got[i], expected)
        rolled = np.roll(images[i], (y, x), axis=(1, 2))
        inner = (slice(None), slice(max(y, 0), 9 + min(y, 0)), slice(max(x, 0), 9 + min(x, 0)))
        assert np.array_equal(got[i][inner], rolled[inner])


def test_flip_equals_numpy_flip_for_the_images_it_picks():
    images = torch.from_numpy(_pattern(n=64))
    augmenter = Augmenter(AugmentSettings(flip=True), seed=3)
    got = augmenter.before_float(images).numpy()
    flipped = [np.array_equal(g, np.flip(x, axis=-1)) for g, x in zip(got, images.numpy())]
    kept = [np.array_equal(g, x) for g, x in zip(got, images.numpy())]
    assert all(f != k for f, k in zip(flipped, kept))  # each image is either mirrored or untouched
    assert 16 < sum(flipped) < 48  # about half (a fixed seed: 64 fair coin draws)


@pytest.mark.parametrize("degrees, turns", [(90, 1), (-90, -1), (180, 2)])
def test_rotation_by_right_angles_equals_numpy_rot90(degrees, turns):
    # Rotating a square image by a right angle about its centre moves pixel centres onto pixel
    # centres, so bilinear resampling must reproduce numpy.rot90 up to float rounding.
    images = _pattern(n=2, h=8, w=8)
    x = torch.from_numpy(images).float() / 255
    n = len(x)
    got = warp(x, torch.full((n,), float(degrees)), torch.ones(n), torch.zeros(n), torch.zeros(n)).numpy()
    expected = np.rot90(images, turns, axes=(-2, -1)) / 255
    assert np.abs(got - expected).max() < 1e-5


def test_warp_without_rotation_is_the_whole_pixel_shift():
    images = _pattern(n=3)
    x = torch.from_numpy(images).float() / 255
    dy, dx = torch.tensor([1, -2, 0]), torch.tensor([0, 2, -1])
    got = warp(x, torch.zeros(3), torch.ones(3), dy, dx)
    assert torch.allclose(got, shift_edge(x, dy, dx), atol=1e-5)


def test_zoom_keeps_the_centre_and_a_flat_image_flat():
    x = torch.full((2, 1, 9, 9), 0.25)
    x[:, :, 4, 4] = 1.0  # the centre pixel of an odd image stays at the centre under zoom
    got = warp(x, torch.zeros(2), torch.tensor([1.2, 0.8]), torch.zeros(2), torch.zeros(2))
    assert torch.allclose(got[:, :, 4, 4], torch.ones(2, 1), atol=1e-5)
    assert torch.allclose(got[:, :, 0, 0], torch.full((2, 1), 0.25), atol=1e-6)


def test_brightness_and_contrast_stay_in_range_and_repeat_by_seed():
    x = torch.rand(32, 3, 8, 8, generator=torch.Generator().manual_seed(0))
    settings = AugmentSettings(brightness=0.3, contrast=0.5, rotate=10, scale=0.1, shift=2)
    a = Augmenter(settings, seed=5).after_float(x.clone())
    b = Augmenter(settings, seed=5).after_float(x.clone())
    c = Augmenter(settings, seed=6).after_float(x.clone())
    assert torch.equal(a, b) and not torch.equal(a, c)
    assert 0.0 <= a.min() and a.max() <= 1.0 and not torch.allclose(a, x)


@pytest.mark.parametrize(
    "key, value, rule",
    [("shift", -1, "a whole number of pixels from 0 to 64"), ("shift", 65, "from 0 to 64"), ("shift", 1.5, "whole"),
     ("flip", 1, "true or false"), ("rotate", float("nan"), "degrees from 0 to 180"), ("rotate", 181, "0 to 180"),
     ("scale", 0.6, "from 0 to 0.5"), ("brightness", -0.1, "from 0 to 0.5"), ("contrast", "lots", "from 0 to 0.9"),
     ("shift", 10**30, "from 0 to 64")],
)
def test_bad_augment_values_name_the_key_and_the_file(tmp_path, key, value, rule):
    with pytest.raises(SearcherError, match=f"`train.augment.{key}` must be .*{rule}.*space.toml") as caught:
        TrainSettings.from_dict({"augment": {key: value}}, file="space.toml")
    assert caught.value.key == f"train.augment.{key}" and len(str(caught.value)) < 200


def test_augment_table_in_a_space_file(tmp_path, write_space):
    path = write_space(TINY_SPACE + "\n[train.augment]\nshift = 2\nrotate = 10\n")
    space = load_space(path)
    assert TrainSettings.from_dict(space.train).augment == AugmentSettings(shift=2, rotate=10.0)
    bad = write_space(TINY_SPACE + "\n[train.augment]\nshfit = 2\n", "bad.toml")
    with pytest.raises(SearcherError, match=r"`train.augment.shfit` is not an augmentation setting.*'shift'.*bad.toml"):
        load_space(bad)


def test_augmentation_touches_training_batches_only(monkeypatch):
    seen: list[int] = []
    original = Augmenter.remap

    def spy(self, n, h, w):
        seen.append(n)
        return original(self, n, h, w)

    monkeypatch.setattr(augment_module.Augmenter, "remap", spy)
    rng = np.random.default_rng(0)
    images = rng.integers(0, 256, (96, 1, 8, 8), dtype=np.uint8)
    labels = np.arange(96) % 3
    settings = TrainSettings(epochs=2, batch_size=32, augment=AugmentSettings(shift=1, flip=True))
    model = build(parse_arch("1x8x8_c4k3-m2_gap-o3_relu"))
    train_candidate(model, images, labels, images[:40], labels[:40], settings, seed=1)
    assert seen == [32] * 6  # 3 training batches a pass, 2 passes; the 40 validation images never


def test_augmented_training_repeats_by_seed():
    rng = np.random.default_rng(1)
    images = rng.integers(0, 256, (64, 3, 8, 8), dtype=np.uint8)
    labels = np.arange(64) % 2
    settings = TrainSettings(epochs=1, batch_size=16, augment=AugmentSettings(shift=1, rotate=15, brightness=0.1))
    weights = []
    for seed in (4, 4, 5):
        model = build(parse_arch("3x8x8_c4k3-m2_gap-o2_relu"))
        train_candidate(model, images, labels, images, labels, settings, seed=seed, threads=1)
        weights.append(torch.cat([p.detach().flatten() for p in model.parameters()]))
    assert torch.equal(weights[0], weights[1]) and not torch.equal(weights[0], weights[2])


def test_batches_cut_from_pixel_major_bytes_with_a_remap_equal_the_plain_gathers():
    # The trainer folds shift and flip into the copy that cuts a batch from pixel-major bytes; the
    # result must equal cutting the batch plainly and then shifting (numpy-checked shift_edge above).
    from searcher.data.layout import pixel_major
    from searcher.model.train import Batches

    images = pixel_major(_pattern(n=10, c=3, h=7, w=6))
    batches = Batches(torch.from_numpy(images), torch.channels_last)
    index = torch.tensor([4, 0, 9, 4])
    augmenter = Augmenter(AugmentSettings(shift=2, flip=True), seed=11)
    remap = augmenter.remap(4, 7, 6)
    got = batches(index, remap)
    plain = torch.from_numpy(np.ascontiguousarray(images))[index]
    assert got.is_contiguous(memory_format=torch.channels_last)
    assert torch.equal(got, augment_module.remap_images(plain, remap)) and torch.equal(batches(index), plain)
