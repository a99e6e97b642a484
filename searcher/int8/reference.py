"""The integer reference: runs an :class:`~searcher.int8.quantize.IntegerNet` on uint8 pixels, in integers.

This is the golden model. The C file must give exactly its int8 scores, the int8 ONNX file its top-1.
Every step is integer arithmetic (numpy int64), written out as the C code does it:

    acc    = bias[c] + Σ (q_x − zero_x)·q_w          (int32; int64 only for a layer marked wide)
    q_out  = clamp(zero + round(acc·m[c] / 2^shift), low, high), rounding half away from zero
    q_out  = table[q_out + 128]                        (hardswish, tanh, sigmoid)

``fast=True`` gives the same integers sooner: it does the sum Σ (q_x − zero_x)·q_w by a float32
matrix product (BLAS) where every partial sum is an integer below 2²⁴, float64 where below 2⁵³
(floats hold such integers exactly, whatever the order of summation), int64 otherwise; the bias,
requantization, tables and pooling stay in int64. ``tests/test_int8.py`` checks the two agree.
"""

from __future__ import annotations

import numpy as np

from searcher.int8.quantize import IntegerNet, IntLayer, affine, pool

BATCH = 256  # images per pass; bounds memory


def round_shift(values: np.ndarray, shift: int) -> np.ndarray:
    """values / 2^shift rounded half away from zero, shifting non-negative numbers only (as the C code)."""
    half = np.int64(1) << np.int64(shift - 1)
    magnitude = (np.abs(values) + half) >> shift
    return np.where(values < 0, -magnitude, magnitude)


def round_divide(total: np.ndarray, count: int) -> np.ndarray:
    """total / count rounded half away from zero, dividing non-negative numbers only (as the C code)."""
    magnitude = (np.abs(total) + count // 2) // count
    return np.where(total < 0, -magnitude, magnitude)


def _engine(layer: IntLayer, fast: bool) -> type:
    """The dtype the sum of products is done in: exact in every case."""
    if fast and layer.span < 2**24:
        return np.float32
    if fast and layer.span < 2**53:
        return np.float64
    return np.int64


def _affine(layer: IntLayer, x: np.ndarray, fast: bool) -> np.ndarray:
    dtype = _engine(layer, fast)
    matrix = layer.weights.reshape(layer.channels, -1).astype(dtype)
    bias, multiplier = layer.bias.astype(np.int64)[:, None], layer.multiplier.astype(np.int64)[:, None]

    def apply(cols: np.ndarray) -> np.ndarray:  # (n, C·k·k, L) -> (n, out, L)
        if dtype is np.int64:  # numpy's integer matmul has no BLAS; its einsum loop is several times faster here
            sums = np.einsum("ok,nkl->nol", matrix, cols)
        else:
            sums = (matrix @ cols).astype(np.int64)
        acc = sums + bias
        q = np.clip(round_shift(acc * multiplier, layer.shift) + layer.zero, layer.low, layer.high)
        return (q if layer.table is None else layer.table[q + 128]).astype(np.int8)

    centred = x.astype(dtype) - dtype(layer.source.zero)  # padding then adds real 0
    return affine(centred, layer.kind, layer.weights.shape[-1] if layer.kind == "conv" else 1, layer.stride,
                  layer.padding, apply)


def _pool(layer: IntLayer, x: np.ndarray) -> np.ndarray:
    if layer.kind == "maxpool":
        return pool(x, "max", layer.window, layer.stride)
    if layer.kind == "avgpool":
        return round_divide(pool(x.astype(np.int32), "sum", layer.window, layer.stride),
                            layer.window * layer.window).astype(np.int8)
    return round_divide(x.astype(np.int32).sum(axis=(2, 3)), x.shape[2] * x.shape[3]).astype(np.int8)  # gap


def scores(net: IntegerNet, pixels: np.ndarray, *, fast: bool = False) -> np.ndarray:
    """int8 scores (N, classes) for uint8 pixels (N, C, H, W), as ``model_classify`` writes them."""
    pixels = np.asarray(pixels)
    if pixels.dtype != np.uint8 or pixels.ndim != 4 or pixels.shape[1:] != net.input_shape:
        raise ValueError(f"pixels must be uint8 N×{'×'.join(map(str, net.input_shape))}, "
                         f"got {pixels.dtype} {pixels.shape}")
    out = []
    for start in range(0, len(pixels), BATCH):
        x = (pixels[start:start + BATCH].astype(np.int16) - 128).astype(np.int8)
        for layer in net.layers:
            x = _pool(layer, x) if layer.weights is None else _affine(layer, x, fast)
        out.append(x)
    return np.concatenate(out) if out else np.zeros((0, net.classes), np.int8)


def classify(net: IntegerNet, pixels: np.ndarray, *, fast: bool = False) -> np.ndarray:
    """Class index per image: the first largest int8 score, as ``model_classify`` returns it."""
    return scores(net, pixels, fast=fast).argmax(axis=1)
