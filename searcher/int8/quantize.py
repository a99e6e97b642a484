"""Post-training integer quantization of a trained candidate: pure numpy, no torch.

The scheme is the integer-arithmetic-only one of Jacob et al., "Quantization and Training of Neural
Networks for Efficient Integer-Arithmetic-Only Inference" (CVPR 2018), with per-output-channel
symmetric int8 weights as in Krishnamoorthi, "Quantizing deep convolutional networks for efficient
inference: A whitepaper" (2018):

* a real value r is held as an int8 q on a grid, r = scale·(q − zero) (Jacob et al., eq. 1);
* batch norm is folded into the conv before it (Jacob et al. §3.2, Krishnamoorthi §3.2);
* weights: zero 0, one scale per output channel, q in [−127, 127] (Krishnamoorthi §2.2);
* activations: one asymmetric grid per tensor, its range read off training images (see
  :class:`QuantSettings`); the input grid is fixed by the pixels, scale 1/255 and zero −128, so
  q = pixel − 128 and no input statistics are needed;
* biases: int32 on the grid scale_in·scale_w[c], zero 0 (Jacob et al. §2.4), added to the int32
  accumulator of (q_x − zero_x)·q_w;
* requantization (Jacob et al. §2.2): q_out = zero_out + round(acc·M[c]), M[c] =
  scale_in·scale_w[c]/scale_out, held as an int32 multiplier m[c] and one right shift per layer,
  M[c] ≈ m[c]·2⁻ˢʰⁱᶠᵗ, rounding half away from zero. One shift per layer (the largest M[c] gets
  31 bits, smaller ones keep fewer) means each output channel costs exactly two int32 values,
  its bias and its multiplier: the 8 bytes per channel that ``searcher.core.cost`` counts at int8;
* relu and relu6 are the clamp of that result (Jacob et al. §2.4); hardswish, tanh and sigmoid are
  a 256-entry table from the pre-activation grid to the output grid;
* max pooling keeps the grid; average pooling and global averaging divide the integer sum,
  rounding half away from zero, and keep the grid; dense layers are a conv on a 1×1 map.

:mod:`searcher.int8.reference` runs the result; it is the golden model that the ONNX and C
files are checked against.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from searcher.core.arch import TABLE_ACTIVATIONS, Arch
from searcher.core.plan import lower
from searcher.errors import SearcherError, one_of

BN_EPS = 1e-5  # torch.nn.BatchNorm2d's default, which searcher.model.build uses
BIAS_LIMIT = 2**30  # |int32 bias| stays below this (a weight scale is raised if need be)
ACCUMULATOR_BITS = 31  # magnitude bits of an int32 accumulator; a layer that may need more is "wide"
CALIBRATIONS = ("minmax", "percentile")
CHUNK_VALUES = 1 << 20  # patch-matrix values per block of images: bounds memory, keeps temporaries in cache


@dataclass(frozen=True)
class QuantSettings:
    """How activation ranges are read off the calibration images.

    The default is ``minmax``: each tensor's grid spans the smallest and largest value seen. The
    alternative measured against it is a percentile range (the grid spans the (100 − p)th to the
    p-th percentile; rarer values saturate). ``python benchmarks/bench_int8.py calibration`` on 16
    trained candidates (8 of the stamp-inspection space on the demo, 8 of examples/digits.toml on
    the UCI digits) gave, as change of held-out accuracy from fp32: min/max +0.00 points on average
    (worst −1.1), 99.99th percentile +0.09 (worst −0.45), 99.9th percentile −0.15 (worst −1.8).
    Min/max and the 99.99th percentile are the same within a few held-out images; min/max was
    chosen because it is cheaper (a percentile partitions every activation value: measured +0.05
    to +0.2 s per candidate, 25-70% more calibration time, which the per-candidate int8 check of a
    search pays) and because these small nets, behind relus and pooling, have few outliers to clip.
    """

    calibration: str = "minmax"  # "minmax" or "percentile"
    percentile: float = 99.99  # with "percentile": the range spans the (100 − p)th to the p-th percentile
    images: int = 256  # calibration images taken from the start of the training split

    def __post_init__(self) -> None:
        if self.calibration not in CALIBRATIONS:
            raise SearcherError(f"`calibration` must be {one_of(self.calibration, CALIBRATIONS)}, "
                                f"got {self.calibration!r}", key="calibration")
        if not 50 < self.percentile <= 100:
            raise SearcherError(f"`percentile` must be in (50, 100], got {self.percentile!r}", key="percentile")
        if not isinstance(self.images, int) or self.images < 1:
            raise SearcherError(f"`images` must be an int ≥ 1, got {self.images!r}", key="images")


@dataclass(frozen=True)
class Grid:
    """The int8 grid of one tensor: real = scale·(q − zero)."""

    scale: float
    zero: int

    def real(self, q: np.ndarray) -> np.ndarray:
        return self.scale * (np.asarray(q, np.float64) - self.zero)


INPUT_GRID = Grid(1 / 255, -128)  # pixels 0..255 as q = pixel − 128


@dataclass(frozen=True, eq=False)
class FoldedLayer:
    """One float layer after batch-norm folding: what calibration runs."""

    name: str  # the cost row it stands for: s1_conv1, s1_pool, gap, fc1, out
    kind: str  # conv, dense, maxpool, avgpool, gap
    weight: np.ndarray | None = None  # float64 (out, in, k, k) or (out, in)
    bias: np.ndarray | None = None  # float64 (out,)
    stride: int = 1  # conv or pool stride
    padding: int = 0  # conv zero padding on each side
    window: int = 0  # pool window
    activation: str | None = None  # after a conv or hidden dense layer; None on the output layer


@dataclass(frozen=True, eq=False)
class IntLayer:
    """One integer layer: everything the reference, the ONNX writer and the C generator need."""

    name: str  # the cost row: s1_conv1, s1_pool, gap, fc1, out
    kind: str  # conv, dense, maxpool, avgpool, gap
    source: Grid  # grid of the input
    target: Grid  # grid of the output, after the activation
    stride: int = 1  # conv or pool stride
    padding: int = 0  # conv padding; padded positions hold the input's zero, i.e. real 0
    window: int = 0  # pool window (a conv's kernel is weights.shape[-1])
    weights: np.ndarray | None = None  # int8 (out, in, k, k) or (out, in)
    weight_scale: np.ndarray | None = None  # float64 (out,): real weight = weight_scale[c]·q
    bias: np.ndarray | None = None  # int32 (out,) on the grid source.scale·weight_scale[c], zero 0
    multiplier: np.ndarray | None = None  # int32 (out,): M[c] ≈ multiplier[c]·2^-shift
    shift: int = 0  # right shift after the multiply, rounding half away from zero
    zero: int = 0  # added after the shift: zero of the grid the accumulator lands on
    low: int = -128  # clamp after requantizing (relu and relu6 live here)
    high: int = 127
    activation: str | None = None  # the float activation this layer stands for
    pre: Grid | None = None  # with a table: the pre-activation grid the table reads
    table: np.ndarray | None = None  # int8 (256,): output for pre-activation q, indexed q + 128
    span: int = 0  # largest possible |Σ (q_x − zero_x)·q_w| of any output, bias left out
    wide: bool = False  # the accumulator may need more than 32 bits (then C accumulates in int64_t)

    @property
    def channels(self) -> int:
        """Output channels of a conv or dense layer."""
        return 0 if self.weights is None else len(self.weights)


@dataclass(frozen=True, eq=False)
class IntegerNet:
    """A quantized network: integer layers in order, from pixels to int8 scores."""

    arch: str  # the architecture's text form
    input_shape: tuple[int, int, int]  # (C, H, W)
    layers: tuple[IntLayer, ...]
    output: Grid  # grid of the int8 scores
    settings: QuantSettings

    @property
    def classes(self) -> int:
        return self.layers[-1].channels

    @property
    def wide(self) -> bool:
        return any(layer.wide for layer in self.layers)

    @property
    def tables(self) -> tuple[IntLayer, ...]:
        """Layers that carry a 256-entry activation table."""
        return tuple(layer for layer in self.layers if layer.table is not None)


# -- float side: folding and the calibration pass ------------------------------------------------

def fold(arch: Arch, state: Mapping[str, np.ndarray]) -> list[FoldedLayer]:
    """Float layers of a trained network with batch norm folded in; ``state`` is its state_dict as numpy.

    Folding (Jacob et al. §3.2): w' = w·γ/√(σ² + ε) per output channel, b' = (b − μ)·γ/√(σ² + ε) + β.
    Dropout is the identity at inference and flattening is a view, so neither appears.
    """

    def get(key: str, shape: tuple[int, ...] | None = None) -> np.ndarray:
        if key not in state:
            raise SearcherError(f"weights lack {key!r}, which architecture {arch} needs", key=key)
        value = np.asarray(state[key], np.float64)
        if shape is not None and value.shape != shape:
            raise SearcherError(f"weights {key!r} have shape {value.shape}, architecture {arch} needs {shape}", key=key)
        return value

    layers: list[FoldedLayer] = []
    for layer in lower(arch):
        if layer.kind == "flatten":
            continue
        if not layer.affine:
            layers.append(FoldedLayer(layer.name, layer.kind, stride=layer.stride, window=layer.kernel))
            continue
        c_out, c_in = layer.channels, layer.input[0]
        shape = (c_out, c_in, layer.kernel, layer.kernel) if layer.kind == "conv" else (c_out, c_in)
        weight = get(f"{layer.name}.weight", shape)
        bias = get(f"{layer.name}.bias", (c_out,)) if layer.bias else np.zeros(c_out)
        if layer.batch_norm:
            gamma, beta, mean, var = (get(f"{layer.batch_norm}.{k}", (c_out,))
                                      for k in ("weight", "bias", "running_mean", "running_var"))
            factor = gamma / np.sqrt(var + BN_EPS)
            weight, bias = weight * factor[:, None, None, None], (bias - mean) * factor + beta
        layers.append(FoldedLayer(layer.name, layer.kind, weight, bias, layer.stride, layer.padding,
                                  activation=layer.activation))
    return layers


def activate(kind: str | None, x: np.ndarray) -> np.ndarray:
    """The float activation, as torch.nn defines it (ReLU6 = clamp to [0, 6], Hardswish = x·relu6(x + 3)/6)."""
    if kind is None:
        return x
    if kind == "relu":
        return np.maximum(x, 0)
    if kind == "relu6":
        return np.clip(x, 0, 6)
    if kind == "tanh":
        return np.tanh(x)
    if kind == "sigmoid":
        return 0.5 * (1 + np.tanh(x / 2))  # = 1 / (1 + e^-x), without overflow for large |x|
    if kind == "hardswish":
        return x * np.clip(x + 3, 0, 6) / 6
    raise ValueError(f"no activation {kind!r}")


def patches(x: np.ndarray, kernel: int, stride: int, padding: int) -> tuple[np.ndarray, int, int]:
    """(N, C, H, W) -> (N, C·k·k, Ho·Wo): every conv window as a column, rows in the order of the
    conv's weights; copied a map row at a time, which keeps the copy fast.

    Pads with 0: callers pass values with the grid's zero already taken off, so padding is real 0.
    """
    if padding:
        x = np.pad(x, ((0, 0), (0, 0), (padding, padding), (padding, padding)))
    windows = sliding_window_view(x, (kernel, kernel), axis=(2, 3))[:, :, ::stride, ::stride]
    n, c, ho, wo = windows.shape[:4]
    return windows.transpose(0, 1, 4, 5, 2, 3).reshape(n, c * kernel * kernel, ho * wo), ho, wo


def affine(x: np.ndarray, kind: str, kernel: int, stride: int, padding: int,
           apply: Callable[[np.ndarray], np.ndarray]) -> np.ndarray:
    """Conv (N, C, H, W) -> (N, out, Ho, Wo) or dense (N, ...) -> (N, out).

    ``apply`` maps a block of patch columns (n, C·k·k, L) to outputs (n, out, L): the matrix
    product, bias and whatever follows, per channel along axis 1 (a dense layer is L = 1). The float
    pass and the integer engines share this layout code; blocks of images bound the memory.
    """
    if kind == "dense":
        return apply(x.reshape(len(x), -1, 1))[:, :, 0]
    per_image = x.shape[1] * kernel * kernel * x.shape[2] * x.shape[3]
    block = max(1, CHUNK_VALUES // max(1, per_image))
    parts = []
    for start in range(0, len(x), block):
        chunk = x[start:start + block]
        cols, ho, wo = patches(chunk, kernel, stride, padding)
        parts.append(apply(cols).reshape(len(chunk), -1, ho, wo))
    return np.concatenate(parts)


def pool(x: np.ndarray, kind: str, window: int, stride: int) -> np.ndarray:
    """Max or sum over each window of (N, C, H, W), floor mode like torch's pools: one elementwise
    step per window offset over strided views, faster than reducing window views."""
    ho, wo = (x.shape[2] - window) // stride + 1, (x.shape[3] - window) // stride + 1
    out = None
    for dy in range(window):
        for dx in range(window):
            part = x[:, :, dy:dy + stride * (ho - 1) + 1:stride, dx:dx + stride * (wo - 1) + 1:stride]
            out = part.copy() if out is None else (np.maximum(out, part) if kind == "max" else out + part)
    return out


def _float_pool(layer: FoldedLayer, x: np.ndarray) -> np.ndarray:
    if layer.kind == "gap":
        return x.mean(axis=(2, 3))
    if layer.kind == "maxpool":
        return pool(x, "max", layer.window, layer.stride)
    return pool(x, "sum", layer.window, layer.stride) / (layer.window * layer.window)


def float_forward(layers: list[FoldedLayer], images: np.ndarray) -> Iterator[tuple[FoldedLayer, np.ndarray, np.ndarray]]:
    """Run the folded float network on float images; yield each layer with its output before and after the activation."""
    x = np.asarray(images, np.float32)
    for layer in layers:
        if layer.weight is None:
            x = _float_pool(layer, x)
            yield layer, x, x
            continue
        matrix = layer.weight.reshape(len(layer.weight), -1).astype(np.float32)
        bias = layer.bias.astype(np.float32)[:, None]
        pre = affine(x, layer.kind, layer.weight.shape[-1], layer.stride, layer.padding, lambda cols: matrix @ cols + bias)
        x = activate(layer.activation, pre)
        yield layer, pre, x


# -- the integer side -----------------------------------------------------------------------------

class NotFinite(ValueError):
    """A trained network whose activations overflow: training diverged without its loss showing it."""


def value_range(values: np.ndarray, settings: QuantSettings) -> tuple[float, float]:
    """The (low, high) a tensor's grid must span, always including 0 (so padding and relu's floor are exact)."""
    flat = values.ravel()
    if settings.calibration == "percentile":
        low, high = np.percentile(flat, [100 - settings.percentile, settings.percentile])
    else:
        low, high = flat.min(), flat.max()
    if not (math.isfinite(low) and math.isfinite(high)):
        raise NotFinite("activations reach NaN or infinity on the calibration images (float32, batch norm folded in): "
                        "the trained weights are too large for any int8 grid")
    return min(float(low), 0.0), max(float(high), 0.0)


def grid_for(low: float, high: float) -> Grid:
    """The int8 grid whose 256 steps span [low, high] (low ≤ 0 ≤ high), with 0 exactly on it (Jacob et al. §2.1)."""
    scale = max(high - low, 1e-6) / 255  # a tensor that is all zero still gets a usable grid
    return Grid(scale, int(np.clip(round(-128 - low / scale), -128, 127)))


def fixed_point(multipliers: np.ndarray, bits: int) -> tuple[np.ndarray, int]:
    """Multipliers M[c] > 0 as integers m[c] < 2^bits and one shift: M[c] ≈ m[c]·2^-shift.

    The largest M[c] gets the full `bits`; Jacob et al. §2.2 normalise each multiplier the same way.
    """
    _, exponent = math.frexp(float(multipliers.max()))  # max = f·2^exponent, f in [0.5, 1)
    shift = bits - exponent
    while shift > 1 and np.rint(multipliers.max() * 2.0**shift) >= 2**bits:  # f rounded up to 1
        shift -= 1
    shift = min(shift, 62)  # a tiny multiplier keeps fewer bits rather than shifting past 64-bit arithmetic
    if shift < 1:
        raise ValueError(f"requantization multiplier {multipliers.max():g} is outside what 64-bit arithmetic holds")
    return np.rint(multipliers * 2.0**shift).astype(np.int64), shift


def lookup_table(kind: str, pre: Grid, target: Grid) -> np.ndarray:
    """The activation as 256 int8 outputs, one for each pre-activation q from −128 to 127."""
    real = activate(kind, pre.real(np.arange(-128, 128)))
    return np.clip(np.rint(real / target.scale) + target.zero, -128, 127).astype(np.int8)


def _quantize_affine(layer: FoldedLayer, source: Grid, pre: Grid | None, target: Grid) -> IntLayer:
    """Weights per output channel, int32 bias, fixed-point requantization and the activation's clamp or table."""
    flat = layer.weight.reshape(len(layer.weight), -1)
    scale = np.abs(flat).max(axis=1) / 127
    # a channel whose weights are all near 0 but whose bias is not would overflow an int32 bias
    scale = np.maximum(scale, np.abs(layer.bias) / (source.scale * BIAS_LIMIT))
    scale[scale == 0] = 1.0
    weights = np.clip(np.rint(flat / scale[:, None]), -127, 127).astype(np.int8)
    bias = np.rint(layer.bias / (source.scale * scale)).astype(np.int64)
    reach = max(127 - source.zero, source.zero + 128)  # largest |q_x − zero_x|
    spans = reach * np.abs(weights.astype(np.int64)).sum(axis=1)
    bound = int((spans + np.abs(bias)).max())
    lands = pre if pre is not None else target
    multiplier, shift = fixed_point(source.scale * scale / lands.scale, min(31, 62 - bound.bit_length()))
    low, high = -128, 127
    if layer.activation in ("relu", "relu6"):
        low = target.zero
        if layer.activation == "relu6":
            high = int(min(127, target.zero + round(6 / target.scale)))
    table = lookup_table(layer.activation, pre, target) if pre is not None else None
    return IntLayer(layer.name, layer.kind, source, target, layer.stride, layer.padding,
                    weights=weights.reshape(layer.weight.shape), weight_scale=scale, bias=bias.astype(np.int32),
                    multiplier=multiplier.astype(np.int32), shift=shift, zero=lands.zero, low=low, high=high,
                    activation=layer.activation, pre=pre, table=table, span=int(spans.max()),
                    wide=bound.bit_length() > ACCUMULATOR_BITS)


def to_pixels(images: np.ndarray) -> np.ndarray:
    """Float images in [0, 1] as the uint8 pixels a camera delivers (round to nearest)."""
    return np.rint(np.clip(np.asarray(images, np.float32), 0.0, 1.0) * 255).astype(np.uint8)


def quantize(arch: Arch, state: Mapping[str, np.ndarray], calibration: np.ndarray,
             settings: QuantSettings = QuantSettings()) -> IntegerNet:
    """Quantize a trained network; `calibration` holds float N×C×H×W training images in [0, 1].

    >>> from searcher.core.arch import parse_arch
    >>> arch = parse_arch("1x4x4_c2k3_gap-o2_relu")
    >>> rng = np.random.default_rng(0)
    >>> state = {"s1_conv1.weight": rng.normal(size=(2, 1, 3, 3)), "s1_conv1.bias": np.zeros(2),
    ...          "out.weight": rng.normal(size=(2, 2)), "out.bias": np.zeros(2)}
    >>> net = quantize(arch, state, rng.random((8, 1, 4, 4)))
    >>> [layer.kind for layer in net.layers], net.layers[0].weights.dtype
    (['conv', 'gap', 'dense'], dtype('int8'))
    """
    images = np.asarray(calibration)[: settings.images]
    if images.ndim != 4 or images.shape[1:] != tuple(arch.input_shape) or len(images) == 0:
        raise SearcherError(f"calibration images must be N×{'×'.join(map(str, arch.input_shape))}, "
                            f"got shape {images.shape}", key="calibration")
    pixels = to_pixels(images).astype(np.float32) / 255  # what the integer network will see
    source = INPUT_GRID
    layers: list[IntLayer] = []
    for layer, pre, post in float_forward(fold(arch, state), pixels):
        if layer.weight is None:
            layers.append(IntLayer(layer.name, layer.kind, source, source, layer.stride, window=layer.window))
            continue
        target = grid_for(*value_range(post, settings))
        pre_grid = grid_for(*value_range(pre, settings)) if layer.activation in TABLE_ACTIVATIONS else None
        layers.append(_quantize_affine(layer, source, pre_grid, target))
        source = target
    return IntegerNet(arch.to_text(), tuple(arch.input_shape), tuple(layers), source, settings)
