"""int8 accuracy of a trained candidate: the call a search makes per candidate when weights are int8.

    from searcher.int8.check import int8_accuracy
    accuracy = int8_accuracy(model, arch, data.train.images, data.val.images, data.val.labels)

It quantizes the trained model as export does (calibrating on the first ``settings.images``
training images) and scores the validation split with the integer reference's fast engine, which
gives the same integers as the reference (``tests/test_int8.py`` checks that) in a fraction of
the time. ``python benchmarks/bench_int8.py`` measures its cost against the proxy training.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from searcher.core.arch import Arch
from searcher.int8 import reference as int8_reference
from searcher.int8.quantize import IntegerNet, NotFinite, QuantSettings, quantize, to_pixels


def state_arrays(model: Any) -> dict[str, np.ndarray]:
    """A torch module's state_dict as numpy arrays: what the quantizer reads."""
    return {key: value.detach().cpu().numpy() for key, value in model.state_dict().items()}


def _numpy(values: Any) -> np.ndarray:
    return values.detach().cpu().numpy() if hasattr(values, "detach") else np.asarray(values)


def unit_images(images: Any) -> np.ndarray:
    """float32 N×C×H×W in [0, 1], contiguous: from uint8 pixels as the data layer holds them, or from
    floats (torch or numpy). A pixel p becomes p/255, which to_pixels turns back into p exactly."""
    array = _numpy(images)
    floats = np.ascontiguousarray(array, dtype=np.float32)
    return floats / 255 if array.dtype == np.uint8 else floats


def quantized(model: Any, arch: Arch, train_images: Any, settings: QuantSettings = QuantSettings()) -> IntegerNet:
    """The integer network of a trained torch model, calibrated on the first training images."""
    return quantize(arch, state_arrays(model), unit_images(train_images[: settings.images]), settings)


def int8_accuracy(model: Any, arch: Arch, train_images: Any, images: Any, labels: Any, *,
                  settings: QuantSettings = QuantSettings(), fast: bool = True) -> float:
    """Share of `images` (uint8 pixels, or floats in [0, 1]; N×C×H×W, torch or numpy) the int8 network
    classifies as `labels`.

    ``fast=False`` runs the reference's int64 engine instead; the answer is the same. NaN when no int8
    network can be built (activations that overflow: the weights diverged while the scores stayed finite).
    """
    try:
        net = quantized(model, arch, train_images, settings)
    except NotFinite:
        return math.nan
    predicted = int8_reference.classify(net, to_pixels(unit_images(images)), fast=fast)
    return float(np.mean(predicted == _numpy(labels)))
