"""Architecture -> torch.nn.Module, layer for layer as :mod:`searcher.core.cost` counts it."""

from __future__ import annotations

from collections import OrderedDict

import torch  # noqa: F401  (used by the docstring example)
from torch import nn

from searcher.core.arch import Arch
from searcher.core.cost import cost

ACTIVATION_MODULES = {
    "relu": nn.ReLU,
    "relu6": nn.ReLU6,
    "tanh": nn.Tanh,
    "sigmoid": nn.Sigmoid,
    "hardswish": nn.Hardswish,
}


def build(arch: Arch) -> nn.Sequential:
    """Build the network; module names match the rows of ``cost(arch).layers``.

    >>> from searcher.core.arch import parse_arch
    >>> model = build(parse_arch("1x28x28_c8k3-m2_gap-o10_relu"))
    >>> model(torch.zeros(1, 1, 28, 28)).shape
    torch.Size([1, 10])
    """
    act = ACTIVATION_MODULES[arch.activation]
    layers: OrderedDict[str, nn.Module] = OrderedDict()
    channels = arch.input_shape[0]
    for i, stage in enumerate(arch.stages, start=1):
        for j, conv in enumerate(stage.convs, start=1):
            padding = conv.kernel // 2 if conv.padding == "same" else 0
            layers[f"s{i}_conv{j}"] = nn.Conv2d(
                channels, conv.out_channels, conv.kernel, conv.stride, padding, bias=not arch.batch_norm
            )
            if arch.batch_norm:
                layers[f"s{i}_bn{j}"] = nn.BatchNorm2d(conv.out_channels)
            layers[f"s{i}_act{j}"] = act()
            channels = conv.out_channels
        if stage.pool:
            pool = nn.MaxPool2d if stage.pool.kind == "max" else nn.AvgPool2d
            layers[f"s{i}_pool"] = pool(stage.pool.window, stage.pool.stride)
    if arch.head.features == "gap":
        layers["gap"] = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten())
        features = channels
    else:
        layers["flatten"] = nn.Flatten()
        _, h, w = _feature_map(arch)
        features = channels * h * w
    if arch.head.dropout and not arch.head.hidden:
        layers["drop"] = nn.Dropout(arch.head.dropout)
    for k, width in enumerate(arch.head.hidden, start=1):
        layers[f"fc{k}"] = nn.Linear(features, width)
        layers[f"fc{k}_act"] = act()
        if arch.head.dropout:
            layers[f"fc{k}_drop"] = nn.Dropout(arch.head.dropout)
        features = width
    layers["out"] = nn.Linear(features, arch.head.classes)
    return nn.Sequential(layers)


def _feature_map(arch: Arch) -> tuple[int, ...]:
    """Shape of the last stage's output, from the analytic walk (one source of truth)."""
    last_spatial = [layer for layer in cost(arch).layers if len(layer.output_shape) == 3]
    return last_spatial[-1].output_shape if last_spatial else arch.input_shape
