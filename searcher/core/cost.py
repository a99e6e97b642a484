"""Exact analytic cost of an architecture: shapes, parameters, MACs, memory. No torch.

What is counted, and in which unit:

* **parameters** — trainable values: conv and dense weights and biases, batch-norm scale and
  shift (2 per channel). Batch-norm running mean and variance (2 per channel) are buffers,
  reported apart as ``buffers``; they are not trained.
* **MACs** — multiply-accumulates of one inference at batch 1: a conv does
  ``H_out·W_out·C_out·C_in·k²``, a dense layer ``in·out``. Bias additions, batch norm (folded into
  the preceding conv for inference, common practice), activations, pooling and global averaging are
  not multiply-accumulates and count 0. This matches half the FLOPs that
  ``torch.utils.flop_counter`` reports.
* **peak activation memory** — at batch 1 for a sequential net: the largest (input + output)
  pair of one layer, in bytes at the activation precision. Batch norm and activations work in
  place on the conv output; flattening is a view and costs nothing.
* **weight storage** — parameters in bytes at a precision. At ``int8`` each weight is 1 byte, batch
  norm is folded into its conv, and each conv or dense output channel stores an int32 bias and an
  int32 requantization multiplier: 8 bytes per channel (the integer-only scheme of Jacob et al.,
  CVPR 2018, with per-channel weight scales; ``searcher.ship`` builds exactly this and the tests
  check it on the compiled C). The per-layer shift and zero points are a few bytes of code.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from searcher.core.arch import Arch
from searcher.core.plan import lower
from searcher.errors import SearcherError, one_of, shown

PRECISION_BYTES = {"fp32": 4, "fp16": 2, "int8": 1}
INT8_CHANNEL_BYTES = 8  # per conv or dense output channel at int8: int32 bias + int32 requantization multiplier


# The formulas below take plain ints or numpy arrays alike: the census applies them to a
# million candidates at once.


def conv_params(c_in: int, c_out: int, kernel: int, bias: bool) -> tuple[int, int]:
    """(weights, biases) of a square conv: c_out·c_in·k² weights, c_out biases if any."""
    return c_out * c_in * kernel * kernel, c_out * bias


def dense_params(n_in: int, n_out: int) -> tuple[int, int]:
    """(weights, biases) of a dense layer."""
    return n_in * n_out, n_out


def weight_bytes(weights: int, biases: int, precision: str, channels: int) -> int:
    """Bytes to store weights and additive values (biases, batch-norm) at ``precision``.

    At int8, ``channels`` (output channels of the conv and dense layers) replaces ``biases``: batch
    norm folds into the conv, and each channel keeps an int32 bias and an int32 multiplier.
    """
    if precision == "int8":
        return weights + INT8_CHANNEL_BYTES * channels
    return (weights + biases) * PRECISION_BYTES[precision]


def conv_macs(c_in: int, c_out: int, kernel: int, h_out: int, w_out: int) -> int:
    """Multiply-accumulates of a conv: one c_in·k² dot product per output value."""
    return h_out * w_out * c_out * c_in * kernel * kernel


@dataclass(frozen=True)
class LayerCost:
    """One row of the per-layer table."""

    name: str  # module name in the built network, e.g. "s1_conv2"
    kind: str  # conv, batchnorm, maxpool, avgpool, gap, flatten, dense, dropout
    output_shape: tuple[int, ...]  # (C, H, W) or (features,)
    weights: int  # trainable weights (multiplicative)
    biases: int  # trainable additive values: biases, batch-norm scale and shift
    buffers: int  # untrained state: batch-norm running mean and variance
    macs: int
    activation_elements: int  # input + output values alive while this layer runs (0 if in place)

    @property
    def params(self) -> int:
        return self.weights + self.biases


@dataclass(frozen=True)
class Cost:
    """Totals and the per-layer table for one architecture."""

    layers: tuple[LayerCost, ...]
    activation_precision: str = "fp32"  # precision used for peak_activation_bytes

    @property
    def params(self) -> int:
        return sum(layer.params for layer in self.layers)

    @property
    def buffers(self) -> int:
        return sum(layer.buffers for layer in self.layers)

    @property
    def macs(self) -> int:
        return sum(layer.macs for layer in self.layers)

    @property
    def peak_activation_elements(self) -> int:
        return max(layer.activation_elements for layer in self.layers)

    @property
    def peak_activation_bytes(self) -> int:
        return self.peak_activation_elements * PRECISION_BYTES[self.activation_precision]

    def weight_bytes(self, precision: str = "fp32") -> int:
        """Bytes to store every trainable parameter at ``precision`` (see module notes for int8)."""
        check_precision(precision)
        channels = sum(x.output_shape[0] for x in self.layers if x.kind in ("conv", "dense"))
        return weight_bytes(sum(x.weights for x in self.layers), sum(x.biases for x in self.layers), precision, channels)

    def totals(self, weight_precision: str = "fp32") -> dict[str, int]:
        """The headline numbers, keyed as in trials tables and budgets."""
        return {
            "params": self.params,
            "macs": self.macs,
            "peak_activation_bytes": self.peak_activation_bytes,
            "weight_bytes": self.weight_bytes(weight_precision),
        }

    def table(self) -> list[dict]:
        """Per-layer rows as plain dicts, ready for pandas or printing."""
        return [
            {
                "layer": layer.name,
                "kind": layer.kind,
                "output": "x".join(str(v) for v in layer.output_shape),
                "params": layer.params,
                "buffers": layer.buffers,
                "macs": layer.macs,
                "activation_bytes": layer.activation_elements * PRECISION_BYTES[self.activation_precision],
            }
            for layer in self.layers
        ]


def check_precision(precision: object, key: str = "precision") -> str:
    """``precision`` when it names a known one (fp32, fp16, int8); else an error naming ``key``."""
    if not isinstance(precision, str) or precision not in PRECISION_BYTES:
        raise SearcherError(f"`{key}` must be {one_of(precision, tuple(PRECISION_BYTES))}, got {shown(precision)}",
                            key=key)
    return precision


def cost(arch: Arch, activation_precision: str = "fp32") -> Cost:
    """Count everything exactly, layer by layer of the lowered plan (:func:`searcher.core.plan.lower`).

    >>> from searcher.core.arch import parse_arch
    >>> cost(parse_arch("1x32x32_c6k5v-a2_c16k5v-a2_flat-d120-d84-o10_tanh")).params
    61706
    """
    check_precision(activation_precision, "activation_precision")
    rows: list[LayerCost] = []
    for layer in lower(arch):
        c_in, c_out = layer.input[0], layer.channels
        moved = math.prod(layer.input) + math.prod(layer.output)  # input and output alive together
        if layer.kind == "conv":
            weights, biases = conv_params(c_in, c_out, layer.kernel, bias=layer.bias)
            rows.append(LayerCost(layer.name, "conv", layer.output, weights, biases, 0,
                                  conv_macs(c_in, c_out, layer.kernel, *layer.output[1:]), moved))
            if layer.batch_norm:
                rows.append(LayerCost(layer.batch_norm, "batchnorm", layer.output, 0, 2 * c_out, 2 * c_out, 0, 0))
        elif layer.kind == "dense":
            rows.append(LayerCost(layer.name, "dense", layer.output, *dense_params(c_in, c_out), 0, c_in * c_out, moved))
        else:  # pools and global averaging copy; flattening is a view
            rows.append(LayerCost(layer.name, layer.kind, layer.output, 0, 0, 0, 0,
                                  0 if layer.kind == "flatten" else moved))
    return Cost(tuple(rows), activation_precision)


def training_bytes(cost: Cost, batch_size: int, optimizer_slots: int = 2) -> int:
    """Estimated fp32 memory to train at ``batch_size``: a guard, not an exact figure.

    Counts, per image, every layer output saved for the backward pass three times over (the
    layer's output, its batch-norm and activation copies, and its gradient), plus the input;
    then weights, their gradients and ``optimizer_slots`` optimiser tensors each (2 for Adam).
    This errs high for plain layers, which is what a guard should do.
    """
    per_image = sum(math.prod(layer.output_shape) for layer in cost.layers) * 3
    first = cost.layers[0]
    per_image += first.activation_elements - math.prod(first.output_shape)  # the input batch itself
    return 4 * (batch_size * per_image + (cost.params + cost.buffers) * (2 + optimizer_slots))
