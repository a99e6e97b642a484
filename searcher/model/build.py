"""Architecture -> torch.nn.Module: one module per layer of the lowered plan, named as the plan and the cost rows."""

from __future__ import annotations

from collections import OrderedDict

import torch  # noqa: F401  (used by the docstring example)
from torch import nn

from searcher.core.arch import Arch
from searcher.core.plan import lower

ACTIVATION_MODULES = {
    "relu": nn.ReLU,
    "relu6": nn.ReLU6,
    "tanh": nn.Tanh,
    "sigmoid": nn.Sigmoid,
    "hardswish": nn.Hardswish,
}


def build(arch: Arch) -> nn.Sequential:
    """Build the network; module names match the plan (:func:`searcher.core.plan.lower`) and the cost rows.

    >>> from searcher.core.arch import parse_arch
    >>> model = build(parse_arch("1x28x28_c8k3-m2_gap-o10_relu"))
    >>> model(torch.zeros(1, 1, 28, 28)).shape
    torch.Size([1, 10])
    """
    layers: OrderedDict[str, nn.Module] = OrderedDict()
    for layer in lower(arch):
        if layer.kind == "conv":
            layers[layer.name] = nn.Conv2d(layer.input[0], layer.channels, layer.kernel, layer.stride, layer.padding,
                                           bias=layer.bias)
            if layer.batch_norm:
                layers[layer.batch_norm] = nn.BatchNorm2d(layer.channels)
        elif layer.kind == "dense":
            layers[layer.name] = nn.Linear(layer.input[0], layer.channels)
        elif layer.kind == "gap":
            layers[layer.name] = nn.Sequential(nn.AdaptiveAvgPool2d(1), nn.Flatten())
        elif layer.kind == "flatten":
            layers[layer.name] = nn.Flatten()
        else:
            pool = nn.MaxPool2d if layer.kind == "maxpool" else nn.AvgPool2d
            layers[layer.name] = pool(layer.kernel, layer.stride)
        if layer.activation:
            layers[layer.activation_name] = ACTIVATION_MODULES[layer.activation]()
        if layer.dropout:
            layers[layer.dropout_name] = nn.Dropout(layer.dropout)
    return nn.Sequential(layers)
