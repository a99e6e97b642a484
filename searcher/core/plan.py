"""The lowered plan: the layers an architecture runs, in order, with their shapes. Written once.

An :class:`~searcher.core.arch.Arch` says what a candidate is; :func:`lower` says what it runs:
every conv, pool, global average, flatten and dense layer with its input and output shape, kernel
or window, stride, padding, the activation after it and whether a batch norm follows (and folds
into it at inference). Everything downstream reads this list rather than walking the
architecture again: the cost rows (:mod:`searcher.core.cost`), the torch modules
(:mod:`searcher.model.build`), the integer layers (:mod:`searcher.int8.quantize`), the C file
and the latency model. The padding rule and the feature-map arithmetic live here only; both take
ints or numpy arrays, so the census applies them to a million candidates at once.
"""

from __future__ import annotations

from dataclasses import dataclass

from searcher.core.arch import Arch
from searcher.errors import SearcherError

KINDS = ("conv", "maxpool", "avgpool", "gap", "flatten", "dense")


def padding_of(kernel, padding: str):
    """Zero padding on each side: "same" pads ``kernel // 2`` (odd kernels keep the size at stride 1),
    "valid" pads nothing. ``kernel`` may be an int or a numpy array."""
    return kernel // 2 if padding == "same" else 0 * kernel


def window_output(size, window, stride, padding=0):
    """Output length along one axis of a conv or pool window, floor mode (as torch computes it)."""
    return (size + 2 * padding - window) // stride + 1


@dataclass(frozen=True)
class Layer:
    """One layer of the plan. Shapes are (C, H, W) for maps and (features,) after the maps end."""

    name: str  # module name in the built network and cost row: s1_conv1, s1_pool, gap, flatten, fc1, out
    kind: str  # one of KINDS
    input: tuple[int, ...]  # shape of what the layer reads
    output: tuple[int, ...]  # shape of what it writes
    kernel: int = 0  # conv kernel side, or pool window side
    stride: int = 1
    padding: int = 0  # zeros added on each side (conv only)
    activation: str | None = None  # applied to the output (convs and hidden dense layers); None: none
    batch_norm: str | None = None  # name of the batch norm that follows a conv (folded in at inference)
    bias: bool = False  # the layer has its own additive bias (convs without batch norm, every dense layer)
    dropout: float = 0.0  # dropout after this layer while training (identity at inference)

    @property
    def channels(self) -> int:
        """Output channels (features for dense layers)."""
        return self.output[0]

    @property
    def affine(self) -> bool:
        """A layer with weights: conv or dense."""
        return self.kind in ("conv", "dense")

    @property
    def activation_name(self) -> str:
        """Module name of the activation after this layer (s1_act1, fc1_act)."""
        return self.name.replace("_conv", "_act") if self.kind == "conv" else f"{self.name}_act"

    @property
    def dropout_name(self) -> str:
        """Module name of the dropout after this layer (fc1_drop; ``drop`` before an output layer
        that has no hidden layer before it)."""
        return f"{self.name}_drop" if self.kind == "dense" else "drop"


def lower(arch: Arch) -> tuple[Layer, ...]:
    """The layers ``arch`` runs, in order; refuses a map shrunk below 1x1, naming the stage.

    >>> from searcher.core.arch import parse_arch
    >>> [(x.name, x.output) for x in lower(parse_arch("1x8x8_c4k3-m2_gap-o3_relu"))]
    [('s1_conv1', (4, 8, 8)), ('s1_pool', (4, 4, 4)), ('gap', (4,)), ('out', (3,))]
    """
    layers: list[Layer] = []
    c, h, w = arch.input_shape
    for i, stage in enumerate(arch.stages, start=1):
        for j, conv in enumerate(stage.convs, start=1):
            pad = padding_of(conv.kernel, conv.padding)
            h2, w2 = (window_output(v, conv.kernel, conv.stride, pad) for v in (h, w))
            if h2 < 1 or w2 < 1:
                raise SearcherError(f"{arch}: stage {i} conv {j} shrinks a {h}x{w} map below 1x1")
            layers.append(Layer(f"s{i}_conv{j}", "conv", (c, h, w), (conv.out_channels, h2, w2), conv.kernel,
                                conv.stride, pad, arch.activation, f"s{i}_bn{j}" if arch.batch_norm else None,
                                bias=not arch.batch_norm))
            c, h, w = conv.out_channels, h2, w2
        if stage.pool:
            p = stage.pool
            h2, w2 = (window_output(v, p.window, p.stride) for v in (h, w))
            if h2 < 1 or w2 < 1:
                raise SearcherError(f"{arch}: stage {i} pool shrinks a {h}x{w} map below 1x1")
            layers.append(Layer(f"s{i}_pool", f"{p.kind}pool", (c, h, w), (c, h2, w2), p.window, p.stride))
            h, w = h2, w2
    hidden, dropout = arch.head.hidden, arch.head.dropout
    features = c if arch.head.features == "gap" else c * h * w
    layers.append(Layer(arch.head.features if arch.head.features == "gap" else "flatten",
                        "gap" if arch.head.features == "gap" else "flatten", (c, h, w), (features,),
                        dropout=0.0 if hidden else dropout))
    for k, width in enumerate((*hidden, arch.head.classes), start=1):
        last = k == len(hidden) + 1
        layers.append(Layer("out" if last else f"fc{k}", "dense", (features,), (width,),
                            activation=None if last else arch.activation, bias=True,
                            dropout=0.0 if last else dropout))
        features = width
    return tuple(layers)

