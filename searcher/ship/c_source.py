"""C99 source for a quantized network: ``model_int8.c`` and ``model_int8.h``.

The file needs nothing beyond the C standard library's <stdint.h> and <stddef.h>: no malloc, no
floating point, no other file. Weights, biases and requantization multipliers are ``const``
arrays (the linker puts them in flash), activation tables 256-byte ``const int8_t`` arrays, and
every activation lives in one static arena. The layers run one after the other in the arena, the
input of one at one end and its output at the other, so the arena is exactly the largest
(input + output) of any layer: the peak activation bytes that ``searcher.core.cost`` computes at
int8. The arithmetic is that of :mod:`searcher.int8.reference`, line for line.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from searcher.core.arch import parse_arch
from searcher.core.plan import lower
from searcher.int8.quantize import IntegerNet, IntLayer

PREFIX = "model_"  # of every external symbol the file defines
PER_LINE = 20  # array values per source line


@dataclass(frozen=True)
class CSource:
    """The two files and what they hold, for the card and the checks."""

    source: str  # model_int8.c
    header: str  # model_int8.h
    arena_bytes: int  # size of the one static activation arena
    arrays: tuple[tuple[str, int], ...]  # (symbol, bytes) of every constant array, in file order
    layer_names: tuple[str, ...]  # the integer layers model_classify runs, in order
    input_bytes: int  # MODEL_INPUT_BYTES

    @property
    def constant_bytes(self) -> int:
        return sum(size for _, size in self.arrays)

    @property
    def tables(self) -> tuple[tuple[str, int], ...]:
        """The activation lookup tables among the arrays."""
        return tuple((name, size) for name, size in self.arrays if name.endswith("_table"))


# -- the fixed part: one function per kind of layer ---------------------------------------------

_REQUANTIZE = """\
/* acc * multiplier / 2^shift, rounded half away from zero (shifting only non-negative values),
 * plus the output zero point, clamped to [low, high] (relu and relu6 are this clamp). */
static int8_t requantize(acc_t acc, int32_t multiplier, int shift, int32_t zero, int32_t low, int32_t high)
{
    int64_t product = (int64_t)acc * multiplier;
    int64_t half = (int64_t)1 << (shift - 1);
    int64_t q = product >= 0 ? (product + half) >> shift : -((half - product) >> shift);
    q += zero;
    if (q < low) q = low;
    if (q > high) q = high;
    return (int8_t)q;
}
"""

_CONV = """\
/* KxK conv over C x H x W int8 maps; padded positions count as the input's zero point. One function
 * per kernel size, so the compiler sees the tap loops' length. */
static void conv_KxK(const int8_t *in, int32_t in_c, int32_t in_h, int32_t in_w, int32_t in_zero,
                     int8_t *out, int32_t out_c, int32_t out_h, int32_t out_w, int32_t stride, int32_t pad,
                     const int8_t *weights, const int32_t *bias, const int32_t *multiplier, int shift,
                     int32_t zero, int32_t low, int32_t high)
{
    int32_t oc, oy, ox, ic, ky, kx;
    for (oc = 0; oc < out_c; ++oc) {
        const int8_t *w_oc = weights + oc * in_c * K * K;
        for (oy = 0; oy < out_h; ++oy) {
            int32_t y0 = oy * stride - pad;
            int32_t ky0 = y0 < 0 ? -y0 : 0;
            int32_t ky1 = y0 + K > in_h ? in_h - y0 : K;
            for (ox = 0; ox < out_w; ++ox) {
                int32_t x0 = ox * stride - pad;
                int32_t kx0 = x0 < 0 ? -x0 : 0;
                int32_t kx1 = x0 + K > in_w ? in_w - x0 : K;
                acc_t acc = bias[oc];
                for (ic = 0; ic < in_c; ++ic) {
                    const int8_t *plane = in + ic * in_h * in_w;
                    const int8_t *w_ic = w_oc + ic * K * K;
                    if (kx0 == 0 && kx1 == K) {  /* the whole row of taps lies inside the map */
                        for (ky = ky0; ky < ky1; ++ky) {
                            const int8_t *row = plane + (y0 + ky) * in_w + x0;
                            for (kx = 0; kx < K; ++kx)
                                acc += (acc_t)(((int32_t)row[kx] - in_zero) * w_ic[ky * K + kx]);
                        }
                    } else {
                        for (ky = ky0; ky < ky1; ++ky) {
                            int32_t row = (y0 + ky) * in_w + x0;
                            for (kx = kx0; kx < kx1; ++kx)
                                acc += (acc_t)(((int32_t)plane[row + kx] - in_zero) * w_ic[ky * K + kx]);
                        }
                    }
                }
                out[(oc * out_h + oy) * out_w + ox] = requantize(acc, multiplier[oc], shift, zero, low, high);
            }
        }
    }
}
"""


def _conv_function(kernel: int) -> str:
    return re.sub(r"\bK\b", str(kernel), _CONV).replace("KxK", f"{kernel}x{kernel}")


_DENSE = """\
/* Dense layer: every output reads every input. */
static void dense(const int8_t *in, int32_t n_in, int32_t in_zero, int8_t *out, int32_t n_out,
                  const int8_t *weights, const int32_t *bias, const int32_t *multiplier, int shift,
                  int32_t zero, int32_t low, int32_t high)
{
    int32_t o, i;
    for (o = 0; o < n_out; ++o) {
        const int8_t *w = weights + o * n_in;
        acc_t acc = bias[o];
        for (i = 0; i < n_in; ++i)
            acc += (acc_t)(((int32_t)in[i] - in_zero) * w[i]);
        out[o] = requantize(acc, multiplier[o], shift, zero, low, high);
    }
}
"""

_TABLE = """\
/* hardswish, tanh or sigmoid, in place: one table entry per int8 value. */
static void lookup(int8_t *x, int32_t n, const int8_t *table)
{
    int32_t i;
    for (i = 0; i < n; ++i)
        x[i] = table[(int32_t)x[i] + 128];
}
"""

_DIVIDE = """\
/* total / count rounded half away from zero (dividing only non-negative values). */
static int8_t divide(int32_t total, int32_t count)
{
    return (int8_t)(total >= 0 ? (total + count / 2) / count : -((count / 2 - total) / count));
}
"""

_POOL = """\
/* {what} pooling, window x window, floor mode; the grid stays the input's. */
static void {kind}_pool(const int8_t *in, int32_t c, int32_t in_h, int32_t in_w, int8_t *out,
                     int32_t out_h, int32_t out_w, int32_t window, int32_t stride)
{{
    int32_t ch, oy, ox, ky, kx;
    for (ch = 0; ch < c; ++ch)
        for (oy = 0; oy < out_h; ++oy)
            for (ox = 0; ox < out_w; ++ox) {{
                const int8_t *corner = in + (ch * in_h + oy * stride) * in_w + ox * stride;
                int32_t {start};
                for (ky = 0; ky < window; ++ky)
                    for (kx = 0; kx < window; ++kx) {{
                        int32_t v = corner[ky * in_w + kx];
                        {step}
                    }}
                out[(ch * out_h + oy) * out_w + ox] = {result};
            }}
}}
"""

_GAP = """\
/* Global average pooling: one value per channel. */
static void global_average(const int8_t *in, int32_t c, int32_t hw, int8_t *out)
{
    int32_t ch, i;
    for (ch = 0; ch < c; ++ch) {
        int32_t total = 0;
        for (i = 0; i < hw; ++i)
            total += in[ch * hw + i];
        out[ch] = divide(total, hw);
    }
}
"""


def _pool_function(kind: str) -> str:
    if kind == "max":
        return _POOL.format(what="Max", kind="max", start="best = -128", step="if (v > best) best = v;",
                            result="(int8_t)best")
    return _POOL.format(what="Average", kind="avg", start="total = 0", step="total += v;",
                        result="divide(total, window * window)")


# -- the generated part ---------------------------------------------------------------------------

_PLAIN = frozenset(b"abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789 _-+.,:;=()[]{}<>!#%&'|~^@$`/")


def c_string(text: str) -> str:
    r"""``text`` as a C string literal that holds its UTF-8 bytes and nothing else.

    Every byte outside a small safe set is a three-digit octal escape, so no user-named string (a
    class folder's name) can end the literal, a comment or a line, or form a trigraph (``??/`` is a
    backslash under -std=c99) or a universal character name: the name stays data.

    >>> print(c_string('a"b??/\\ é'))
    "a\042b\077\077/\134 \303\251"
    """
    return '"' + "".join(chr(b) if b in _PLAIN else f"\\{b:03o}" for b in text.encode("utf-8")) + '"'


def _array(ctype: str, name: str, values: np.ndarray) -> str:
    flat = [str(int(v)) for v in np.asarray(values).ravel()]
    lines = [", ".join(flat[i:i + PER_LINE]) for i in range(0, len(flat), PER_LINE)]
    body = ",\n    ".join(lines)
    return f"const {ctype} {name}[{len(flat)}] = {{\n    {body}\n}};\n"


def _shape(net: IntegerNet) -> list[tuple[int, ...]]:
    """Shape of every layer's output, (C, H, W) or (features,), starting with the input (from the plan;
    flattening is a view and has no layer here)."""
    layers = [layer for layer in lower(parse_arch(net.arch)) if layer.kind != "flatten"]
    return [layers[0].input, *(layer.output for layer in layers)]


def _describe(layer: IntLayer, before: tuple[int, ...], after: tuple[int, ...]) -> str:
    dims = "x".join(map(str, before)) + " -> " + "x".join(map(str, after))
    if layer.kind == "conv":
        k = layer.weights.shape[-1]
        return f"{layer.name}: conv {k}x{k}, stride {layer.stride}, padding {layer.padding}, {dims}, {layer.activation}"
    if layer.kind == "dense":
        return f"{layer.name}: dense, {dims}, {layer.activation or 'scores'}"
    return f"{layer.name}: {layer.kind}, {dims}"


PROFILE_HOOK = "model_layer_done"  # called by a profiled build after the input copy and after each layer


def generate(net: IntegerNet, class_names: tuple[str, ...] = (), *, profile: bool = False) -> CSource:
    """Both C files for `net`; ``class_names`` go into the header as a macro (no data unless used).

    ``profile=True`` is for the emulated run only, never for the user's files: the same source with a
    call ``model_layer_done(k)`` after the input copy (k = 0) and after layer k − 1, so that a harness
    can read a clock between layers (:mod:`searcher.ship.emulate`).
    """
    shapes = _shape(net)
    sizes = [math.prod(s) for s in shapes]
    arena = max(sizes[i] + sizes[i + 1] for i in range(len(net.layers)))
    arrays: list[tuple[str, int]] = []
    data: list[str] = []
    calls: list[str] = []
    at = 0  # offset of the current tensor; the input is copied to the start
    for i, layer in enumerate(net.layers):
        before, after = shapes[i], shapes[i + 1]
        out_at = arena - sizes[i + 1] if at == 0 else 0  # the other end of the arena
        src, dst = f"a + {at}", f"a + {out_at}"
        calls.append(f"    /* {_describe(layer, before, after)} */")
        if layer.weights is not None:
            symbol = f"{PREFIX}{layer.name}"
            data.append(f"/* {_describe(layer, before, after)} */\n")
            for suffix, ctype, values in (("weights", "int8_t", layer.weights), ("bias", "int32_t", layer.bias),
                                          ("multiplier", "int32_t", layer.multiplier)):
                data.append(_array(ctype, f"{symbol}_{suffix}", values))
                arrays.append((f"{symbol}_{suffix}", values.size * values.itemsize))
            tail = (f"{symbol}_weights, {symbol}_bias, {symbol}_multiplier, {layer.shift}, "
                    f"{layer.zero}, {layer.low}, {layer.high}")
            if layer.kind == "conv":
                k = layer.weights.shape[-1]
                calls.append(f"    conv_{k}x{k}({src}, {before[0]}, {before[1]}, {before[2]}, {layer.source.zero}, {dst}, "
                             f"{after[0]}, {after[1]}, {after[2]}, {layer.stride}, {layer.padding},\n"
                             f"              {tail});")
            else:
                calls.append(f"    dense({src}, {sizes[i]}, {layer.source.zero}, {dst}, {after[0]},\n          {tail});")
            if layer.table is not None:
                data.append(_array("int8_t", f"{symbol}_table", layer.table))
                arrays.append((f"{symbol}_table", 256))
                calls.append(f"    lookup({dst}, {sizes[i + 1]}, {symbol}_table);")
        elif layer.kind == "gap":
            calls.append(f"    global_average({src}, {before[0]}, {before[1] * before[2]}, {dst});")
        else:
            calls.append(f"    {layer.kind[:3]}_pool({src}, {before[0]}, {before[1]}, {before[2]}, {dst}, "
                         f"{after[1]}, {after[2]}, {layer.window}, {layer.stride});")
        if profile:
            calls.append(f"    {PROFILE_HOOK}({i + 1});")
        at = out_at
    kinds = {layer.kind for layer in net.layers}
    functions = [_REQUANTIZE]
    functions += [_conv_function(k) for k in sorted({layer.weights.shape[-1] for layer in net.layers
                                                     if layer.kind == "conv"})]
    functions += [_DENSE]
    functions += [_TABLE] if net.tables else []
    functions += [_DIVIDE] if kinds & {"avgpool", "gap"} else []
    functions += [_pool_function("max")] if "maxpool" in kinds else []
    functions += [_pool_function("avg")] if "avgpool" in kinds else []
    functions += [_GAP] if "gap" in kinds else []
    constant = sum(size for _, size in arrays)
    table_bytes = 256 * len(net.tables)
    c, h, w = net.input_shape
    source = f"""\
/* model_int8.c: image classifier {net.arch}, integer arithmetic only.
 *
 * Written by searcher's export from the trained network: batch norm folded in, int8 weights with
 * one scale per output channel, int8 activations with one grid per tensor, int32 biases,
 * fixed-point requantization (Jacob et al., CVPR 2018). C99; needs only <stdint.h> and <stddef.h>;
 * no malloc, no floating point.
 *
 * Constant data: {constant} bytes ({constant - table_bytes} weights, biases and multipliers{
    f", {table_bytes} in {len(net.tables)} activation tables" if table_bytes else ""}).
 * RAM: one static arena of {arena} bytes; the image is copied into it first.
 */
#include <stddef.h>
#include <stdint.h>

#include "model_int8.h"

{f"void {PROFILE_HOOK}(int32_t layer); /* the harness's clock: profiled builds only */{chr(10)}" if profile else ""}typedef {"int64_t" if net.wide else "int32_t"} acc_t; /* accumulator: {"a layer's sums may exceed 32 bits" if net.wide else "32 bits hold every sum (checked at export)"} */

{"".join(data)}
static int8_t {PREFIX}arena[{arena}];

{chr(10).join(functions)}
int model_classify(const uint8_t *pixels, int8_t *scores)
{{
    int8_t *const a = {PREFIX}arena;
    const int8_t *result;
    int32_t i;
    int best = 0;

    for (i = 0; i < {sizes[0]}; ++i)
        a[i] = (int8_t)((int32_t)pixels[i] - 128);
{f"    {PROFILE_HOOK}(0);{chr(10)}" if profile else ""}{chr(10).join(calls)}

    result = a + {at};
    for (i = 1; i < {net.classes}; ++i)
        if (result[i] > result[best])
            best = (int)i;
    if (scores != NULL)
        for (i = 0; i < {net.classes}; ++i)
            scores[i] = result[i];
    return best;
}}
"""
    names = ", ".join(c_string(n) for n in class_names)
    header = f"""\
/* model_int8.h: image classifier {net.arch}, int8 (see model_int8.c). */
#ifndef MODEL_INT8_H
#define MODEL_INT8_H

#include <stdint.h>

#define MODEL_INPUT_CHANNELS {c}
#define MODEL_INPUT_HEIGHT {h}
#define MODEL_INPUT_WIDTH {w}
#define MODEL_INPUT_BYTES {c * h * w} /* pixels, channels x height x width, 0..255 */
#define MODEL_CLASSES {net.classes}
#define MODEL_ARENA_BYTES {arena} /* the static activation arena (RAM) */
#define MODEL_CONSTANT_BYTES {constant} /* weights, biases, multipliers, tables (flash) */
/* A score q stands for the real value MODEL_SCORE_SCALE * (q - MODEL_SCORE_ZERO). */
#define MODEL_SCORE_SCALE {net.output.scale!r}
#define MODEL_SCORE_ZERO {net.output.zero}
{f"#define MODEL_CLASS_NAMES {{{names}}}" if class_names else ""}

/* Classify one image: pixels 0..255 in channel x height x width order (as a camera delivers them).
 * Returns the class index (the first largest score); writes MODEL_CLASSES int8 scores when
 * scores is not NULL. Not reentrant: it uses one static arena. */
int model_classify(const uint8_t *pixels, int8_t *scores);

#endif /* MODEL_INT8_H */
"""
    return CSource(source, header, arena, tuple(arrays), tuple(layer.name for layer in net.layers), sizes[0])
