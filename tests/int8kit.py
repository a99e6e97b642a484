"""Helpers for the int8 tests and benchmarks/bench_int8.py: data sets, trained candidates, an outside PTQ.

Outside references used here:
* the UCI optical handwritten digits shipped with scikit-learn (``sklearn.datasets.load_digits``);
* PyTorch's own post-training quantization (``torch.ao.quantization``, FX graph mode) with
  per-channel symmetric int8 weights and per-tensor affine uint8 activations from min/max
  observers: an independent implementation of the same published scheme (it fuses batch norm,
  picks its own scales and zero points, and runs its own integer kernels).
"""

from __future__ import annotations

import copy
import dataclasses
import warnings
from typing import Any

import numpy as np
import torch

from searcher.int8.check import unit_images
from searcher.core.arch import Arch
from searcher.data.load import Dataset, Split, load_dataset, resize_images, split_indices
from searcher.model.build import build
from searcher.model.train import TrainResult, TrainSettings, train_candidate

DEMO_SHAPE = (1, 32, 32)  # the stamp-inspection space's largest input


def demo_data(shape: tuple[int, int, int] = DEMO_SHAPE) -> Dataset:
    """The built-in demo, split with seed 0, at `shape` (resized as a search resizes it)."""
    data = load_dataset("demo", DEMO_SHAPE, seed=0)
    parts = {p: Split(resize_images(getattr(data, p).images, *shape[1:]), getattr(data, p).labels)
             for p in ("train", "val", "test")}
    return dataclasses.replace(data, **parts)


def digits_data() -> Dataset:
    """The UCI digits (scikit-learn): 1797 8×8 images, pixels 0..16 scaled to 0..255, split with seed 0."""
    from sklearn.datasets import load_digits

    digits = load_digits()
    pixels = np.round(digits.images * (255 / 16)).astype(np.uint8)
    images = torch.from_numpy(pixels[:, None].astype(np.float32) / 255)
    labels = torch.from_numpy(digits.target.astype(np.int64))
    indices = split_indices(digits.target, seed=0)
    parts = {p: Split(images[torch.from_numpy(i)], labels[torch.from_numpy(i)]) for p, i in indices.items()}
    return Dataset(**parts, class_names=tuple(map(str, range(10))), source="digits", fingerprint="",
                   skipped=0, indices=indices)


def trained(arch: Arch, data: Dataset, settings: TrainSettings = TrainSettings(), seed: int = 0) -> tuple[Any, TrainResult]:
    """A candidate after its proxy training on the training split (validation on the validation split)."""
    model = build(arch)
    result = train_candidate(model, data.train.images, data.train.labels, data.val.images, data.val.labels,
                             settings, seed=seed, threads=1)
    return model.eval(), result


def torch_ptq_accuracy(model: Any, calibration: Any, images: Any, labels: Any) -> float:
    """Accuracy of PyTorch's own FX post-training int8 quantization of `model` (see the module notes).

    The qnnpack engine: fbgemm's x86 kernels multiply uint8 by int8 in 16-bit pairs that can
    saturate with full 8-bit ranges (why its default configuration reduces the activation range
    to 7 bits); qnnpack keeps full ranges exact.
    """
    from torch.ao.quantization import MinMaxObserver, PerChannelMinMaxObserver, QConfig, QConfigMapping
    from torch.ao.quantization.quantize_fx import convert_fx, prepare_fx

    calibration, images = (torch.from_numpy(unit_images(x)) for x in (calibration, images))
    labels = torch.as_tensor(np.asarray(labels))
    qconfig = QConfig(
        activation=MinMaxObserver.with_args(dtype=torch.quint8, qscheme=torch.per_tensor_affine),
        weight=PerChannelMinMaxObserver.with_args(dtype=torch.qint8, qscheme=torch.per_channel_symmetric))
    before = torch.backends.quantized.engine
    torch.backends.quantized.engine = "qnnpack"
    try:
        with warnings.catch_warnings():  # torch.ao.quantization announces its move to torchao
            warnings.simplefilter("ignore")
            prepared = prepare_fx(copy.deepcopy(model).eval(), QConfigMapping().set_global(qconfig),
                                  example_inputs=(calibration[:1],))
            with torch.inference_mode():
                prepared(calibration)
            quantized = convert_fx(prepared)
            with torch.inference_mode():
                predicted = torch.cat([quantized(images[i:i + 256]).argmax(1) for i in range(0, len(images), 256)])
    finally:
        torch.backends.quantized.engine = before
    return float((predicted == labels).float().mean())
