"""C99 source for a quantized network: ``model_int8.c`` and ``model_int8.h``.

The file needs nothing beyond the C standard library's <stdint.h> and <stddef.h> (and, where the
compiler offers the Arm DSP extension, <arm_acle.h> and <string.h>): no malloc, no floating point,
no other file. Weights, biases and requantization multipliers are ``const`` arrays (the linker puts
them in flash), activation tables 256-byte ``const int8_t`` arrays, and every activation lives in
one static arena. The layers run one after the other in the arena, the input of one at one end and
its output at the other, so the arena is exactly the largest (input + output) of any layer: the
peak activation bytes that ``searcher.core.cost`` computes at int8. The arithmetic is that of
:mod:`searcher.int8.reference`: the same integers, summed in another order.

Written for Cortex-M cores (``benchmarks/bench_target.py`` counts their instructions): maps are
stored channels last and weights in the matching order, so a conv window is a few runs of
contiguous bytes; four output channels are summed at once; with ``__ARM_FEATURE_DSP`` (Cortex-M4,
M7, M33, M55) four bytes are loaded at once, widened to 16-bit pairs with the input's zero point
taken off (SXTAB16) and summed two products per instruction (SMLAD), through the ACLE intrinsics of
<arm_acle.h>; elsewhere (Cortex-M3, a desktop's gcc) the same sums in plain C99. Requantization
shifts the high word of the 64-bit product, a 32-bit shift, whenever the layer's shift is 32 or more.
"""

from __future__ import annotations

import hashlib
import math
import re
from dataclasses import dataclass

import numpy as np

from searcher.core.arch import parse_arch
from searcher.core.plan import lower
from searcher.int8.quantize import IntegerNet, IntLayer, quantize

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
#
# Maps are stored channels last (height x width x channels), so the inputs a conv multiplies for one
# output pixel are `rows` runs of `span` contiguous bytes, and its weights (stored output channel x
# kernel row x kernel column x input channel) the same runs: one dot-product routine covers every
# kernel, padding edge and dense layer. Four output channels are summed at once, so each input byte
# is read and widened once per four channels. With the DSP extension of Armv7E-M and Armv8-M
# (__ARM_FEATURE_DSP), four bytes are read at once and two products summed per instruction (SMLAD);
# elsewhere plain C99 does the same sums. Integer sums are exact in any order: every variant gives
# the same int8 scores.

_REQUANTIZE = """\
/* acc * multiplier / 2^shift rounded half away from zero (on the magnitude, so no negative value is
 * shifted), plus the output zero point, clamped to [low, high] (relu and relu6 are this clamp). A
 * magnitude above 255 is clamped first: it lands outside [low, high] either way. With shift >= 32
 * (the usual case) the high word of the 64-bit product is shifted, a 32-bit shift. */
static inline int8_t requantize(acc_t acc, int32_t multiplier, int shift, int32_t zero, int32_t low, int32_t high)
{
    int negative = acc < 0;
    magnitude_t magnitude = negative ? (magnitude_t)0 - (magnitude_t)acc : (magnitude_t)acc;
    uint64_t product = (uint64_t)magnitude * (uint32_t)multiplier + ((uint64_t)1 << (shift - 1));
    uint32_t scaled;
    int32_t q;
    if (shift >= 32) {
        scaled = (uint32_t)(product >> 32) >> (shift - 32);
    } else {
        product >>= shift;
        scaled = product > 255u ? 255u : (uint32_t)product;
    }
    q = scaled > 255u ? 255 : (int32_t)scaled;
    q = (negative ? -q : q) + zero;
    return (int8_t)(q < low ? low : q > high ? high : q);
}
"""



def requantize_source(wide: bool) -> str:
    """The accumulator types and ``requantize`` as the C file defines them (tests compile it alone)."""
    why = "a layer's sums may exceed 32 bits" if wide else "32 bits hold every sum (checked at export)"
    return (f"typedef {'int64_t' if wide else 'int32_t'} acc_t; /* accumulator: {why} */\n"
            f"typedef {'uint64_t' if wide else 'uint32_t'} magnitude_t;\n\n{_REQUANTIZE}")


_DOT = """\
#ifdef MODEL_DSP
static inline uint32_t load4(const int8_t *p) /* four bytes, any alignment (one LDR where unaligned loads are allowed) */
{
    uint32_t v;
    memcpy(&v, p, 4);
    return v;
}

static inline uint32_t ror8(uint32_t v) { return (v >> 8) | (v << 24); }

/* acc + w0*x0 + w1*x1 + w2*x2 + w3*x3 for the bytes of w and the 16-bit halves even = (x0, x2), odd = (x1, x3) */
static inline int32_t mac4(int32_t acc, int32_t even, int32_t odd, uint32_t w)
{
    return __smlad(odd, __sxtb16(ror8(w)), __smlad(even, __sxtb16(w), acc));
}
#endif

/* acc[g] += sum over r < rows, i < span of (x[r * x_step + i] - zero) * w[g * w_group + r * w_step + i], g < 4 */
static void dot4(const int8_t *x, int32_t x_step, const int8_t *w, int32_t w_step, int32_t w_group,
                 int32_t rows, int32_t span, int32_t zero, acc_t *acc)
{
    acc_t a0 = acc[0], a1 = acc[1], a2 = acc[2], a3 = acc[3];
    int32_t r, i;
    for (r = 0; r < rows; ++r, x += x_step, w += w_step) {
        i = 0;
#ifdef MODEL_DSP
        {
            uint32_t offset = (uint32_t)(uint16_t)-zero * 0x10001u; /* -zero in both 16-bit halves */
            for (; i + 4 <= span; i += 4) {
                uint32_t v = load4(x + i);
                int32_t even = __sxtab16(offset, v), odd = __sxtab16(offset, ror8(v));
                a0 = mac4(a0, even, odd, load4(w + i));
                a1 = mac4(a1, even, odd, load4(w + w_group + i));
                a2 = mac4(a2, even, odd, load4(w + 2 * w_group + i));
                a3 = mac4(a3, even, odd, load4(w + 3 * w_group + i));
            }
        }
#endif
        for (; i < span; ++i) {
            int32_t v = (int32_t)x[i] - zero;
            a0 += (acc_t)(v * w[i]);
            a1 += (acc_t)(v * w[w_group + i]);
            a2 += (acc_t)(v * w[2 * w_group + i]);
            a3 += (acc_t)(v * w[3 * w_group + i]);
        }
    }
    acc[0] = a0; acc[1] = a1; acc[2] = a2; acc[3] = a3;
}

/* the same for one output channel */
static acc_t dot1(const int8_t *x, int32_t x_step, const int8_t *w, int32_t w_step, int32_t rows, int32_t span,
                  int32_t zero, acc_t acc)
{
    int32_t r, i;
    for (r = 0; r < rows; ++r, x += x_step, w += w_step) {
        i = 0;
#ifdef MODEL_DSP
        {
            uint32_t offset = (uint32_t)(uint16_t)-zero * 0x10001u;
            for (; i + 4 <= span; i += 4) {
                uint32_t v = load4(x + i);
                acc = mac4(acc, __sxtab16(offset, v), __sxtab16(offset, ror8(v)), load4(w + i));
            }
        }
#endif
        for (; i < span; ++i)
            acc += (acc_t)(((int32_t)x[i] - zero) * w[i]);
    }
    return acc;
}

/* The output channels of one pixel: `rows` runs of `span` input bytes, `x_step` apart, against each
 * channel's weights (`w_group` apart, runs `w_step` apart); requantized into out[0..channels). */
static void pixel(const int8_t *x, int32_t x_step, const int8_t *w, int32_t w_step, int32_t w_group, int32_t rows,
                  int32_t span, int32_t in_zero, int8_t *out, int32_t channels, const int32_t *bias,
                  const int32_t *multiplier, int shift, int32_t zero, int32_t low, int32_t high)
{
    int32_t c;
    for (c = 0; c < channels - channels % 4; c += 4, w += 4 * w_group) {
        acc_t acc[4];
        acc[0] = bias[c]; acc[1] = bias[c + 1]; acc[2] = bias[c + 2]; acc[3] = bias[c + 3];
        dot4(x, x_step, w, w_step, w_group, rows, span, in_zero, acc);
        out[c] = requantize(acc[0], multiplier[c], shift, zero, low, high);
        out[c + 1] = requantize(acc[1], multiplier[c + 1], shift, zero, low, high);
        out[c + 2] = requantize(acc[2], multiplier[c + 2], shift, zero, low, high);
        out[c + 3] = requantize(acc[3], multiplier[c + 3], shift, zero, low, high);
    }
    for (; c < channels; ++c, w += w_group)
        out[c] = requantize(dot1(x, x_step, w, w_step, rows, span, in_zero, bias[c]), multiplier[c], shift, zero,
                            low, high);
}
"""

_CONV = """\
/* KxK conv over a height x width x IC int8 map; padded positions count as the input's zero point,
 * that is, they are left out of the sums. One function per kernel size and input width: inside the
 * map a window is K runs of K * IC bytes, loops whose lengths the compiler knows; at the edges the
 * runs are shorter or fewer. */
static void conv_KxK_ICc(const int8_t *in, int32_t in_h, int32_t in_w, int32_t in_zero, int8_t *out, int32_t out_h,
                         int32_t out_w, int32_t out_c, int32_t stride, int32_t pad, const int8_t *weights,
                         const int32_t *bias, const int32_t *multiplier, int shift, int32_t zero, int32_t low,
                         int32_t high)
{
    const int32_t x_step = in_w * IC;
#ifdef MODEL_DSP
    const uint32_t offset = (uint32_t)(uint16_t)-in_zero * 0x10001u; /* -in_zero in both 16-bit halves */
#endif
    int32_t oy, ox, c, r, i;
    for (oy = 0; oy < out_h; ++oy) {
        int32_t y0 = oy * stride - pad;
        int32_t ky0 = y0 < 0 ? -y0 : 0;
        int32_t ky1 = y0 + K > in_h ? in_h - y0 : K;
        for (ox = 0; ox < out_w; ++ox, out += out_c) {
            int32_t x0 = ox * stride - pad;
            int32_t kx0 = x0 < 0 ? -x0 : 0;
            int32_t kx1 = x0 + K > in_w ? in_w - x0 : K;
            const int8_t *x = in + (y0 * in_w + x0) * IC; /* the window's top left corner, perhaps outside the map */
            const int8_t *w = weights;
            int inside = ky0 == 0 && ky1 == K && kx0 == 0 && kx1 == K;
            for (c = 0; c < out_c - out_c % 4; c += 4, w += 4 * K * K * IC) {
                acc_t a0 = bias[c], a1 = bias[c + 1], a2 = bias[c + 2], a3 = bias[c + 3];
                if (inside) {
                    const int8_t *xr = x, *wr = w;
                    for (r = 0; r < K; ++r, xr += x_step, wr += K * IC) {
                        i = 0;
#ifdef MODEL_DSP
                        for (; i + 4 <= K * IC; i += 4) {
                            uint32_t v = load4(xr + i);
                            int32_t even = __sxtab16(offset, v), odd = __sxtab16(offset, ror8(v));
                            a0 = mac4(a0, even, odd, load4(wr + i));
                            a1 = mac4(a1, even, odd, load4(wr + K * K * IC + i));
                            a2 = mac4(a2, even, odd, load4(wr + 2 * K * K * IC + i));
                            a3 = mac4(a3, even, odd, load4(wr + 3 * K * K * IC + i));
                        }
#endif
                        for (; i < K * IC; ++i) {
                            int32_t v = (int32_t)xr[i] - in_zero;
                            a0 += (acc_t)(v * wr[i]);
                            a1 += (acc_t)(v * wr[K * K * IC + i]);
                            a2 += (acc_t)(v * wr[2 * K * K * IC + i]);
                            a3 += (acc_t)(v * wr[3 * K * K * IC + i]);
                        }
                    }
                } else {
                    for (r = ky0; r < ky1; ++r) {
                        const int8_t *xr = x + r * x_step, *wr = w + r * K * IC;
                        for (i = kx0 * IC; i < kx1 * IC; ++i) {
                            int32_t v = (int32_t)xr[i] - in_zero;
                            a0 += (acc_t)(v * wr[i]);
                            a1 += (acc_t)(v * wr[K * K * IC + i]);
                            a2 += (acc_t)(v * wr[2 * K * K * IC + i]);
                            a3 += (acc_t)(v * wr[3 * K * K * IC + i]);
                        }
                    }
                }
                out[c] = requantize(a0, multiplier[c], shift, zero, low, high);
                out[c + 1] = requantize(a1, multiplier[c + 1], shift, zero, low, high);
                out[c + 2] = requantize(a2, multiplier[c + 2], shift, zero, low, high);
                out[c + 3] = requantize(a3, multiplier[c + 3], shift, zero, low, high);
            }
            for (; c < out_c; ++c, w += K * K * IC)
                out[c] = requantize(dot1(x + (ky0 * in_w + kx0) * IC, x_step, w + (ky0 * K + kx0) * IC, K * IC,
                                         ky1 - ky0, (kx1 - kx0) * IC, in_zero, bias[c]),
                                    multiplier[c], shift, zero, low, high);
        }
    }
}
"""


def _conv_function(kernel: int, in_channels: int) -> str:
    text = re.sub(r"\bK\b", str(kernel), _CONV)
    text = re.sub(r"\bIC\b", str(in_channels), text)
    return text.replace("KxK_ICc", f"{kernel}x{kernel}_{in_channels}c")


_DENSE = """\
/* Dense layer: every output reads every input. */
static void dense(const int8_t *in, int32_t n_in, int32_t in_zero, int8_t *out, int32_t n_out,
                  const int8_t *weights, const int32_t *bias, const int32_t *multiplier, int shift,
                  int32_t zero, int32_t low, int32_t high)
{
    pixel(in, 0, weights, 0, n_in, 1, n_in, in_zero, out, n_out, bias, multiplier, shift, zero, low, high);
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
/* {what} pooling, window x window, floor mode, over a height x width x c map; the grid stays the input's. */
static void {kind}_pool(const int8_t *in, int32_t c, int32_t in_w, int8_t *out, int32_t out_h, int32_t out_w,
                     int32_t window, int32_t stride)
{{
    int32_t oy, ox, ch, ky, kx;
    for (oy = 0; oy < out_h; ++oy)
        for (ox = 0; ox < out_w; ++ox)
            for (ch = 0; ch < c; ++ch) {{
                const int8_t *corner = in + ((oy * stride) * in_w + ox * stride) * c + ch;
                int32_t {start};
                for (ky = 0; ky < window; ++ky)
                    for (kx = 0; kx < window; ++kx) {{
                        int32_t v = corner[(ky * in_w + kx) * c];
                        {step}
                    }}
                *out++ = {result};
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
            total += in[i * c + ch];
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


def _channels_last(weights: np.ndarray, before: tuple[int, ...]) -> np.ndarray:
    """Weights in the order the channels-last maps are read: a conv's (out, in, k, k) as (out, k, k, in); a
    dense layer over a flattened C x H x W map as (out, H, W, C); a dense layer over a vector unchanged."""
    if weights.ndim == 4:
        return weights.transpose(0, 2, 3, 1)
    if len(before) == 3:
        return weights.reshape(len(weights), *before).transpose(0, 2, 3, 1)
    return weights


def _describe(layer: IntLayer, before: tuple[int, ...], after: tuple[int, ...]) -> str:
    dims = "x".join(map(str, before)) + " -> " + "x".join(map(str, after))
    if layer.kind == "conv":
        k = layer.weights.shape[-1]
        return f"{layer.name}: conv {k}x{k}, stride {layer.stride}, padding {layer.padding}, {dims}, {layer.activation}"
    if layer.kind == "dense":
        return f"{layer.name}: dense, {dims}, {layer.activation or 'scores'}"
    return f"{layer.name}: {layer.kind}, {dims}"


PROFILE_HOOK = "model_layer_done"  # called by a profiled build after the input copy and after each layer


def kernel_fingerprint() -> str:
    """A hash of the C this module writes (every fixed function, and the whole file for two sample
    networks): the latency model's coefficients were fitted on the kernels with this hash
    (``searcher.core.latency``; a test compares the two)."""
    samples = []
    for text in ("1x9x9_c4k3-m2_c6k5-a2_flat-d5-o3_tanh", "1x4x4_c4k3-m2_c8k3-m2_gap-o3_relu_bn"):
        arch = parse_arch(text)
        state = {f"{name}.{kind}": np.full(shape, 0.5) for name, kind, shape in _parameters(arch)}
        samples.append(generate(quantize(arch, state, np.linspace(0, 1, arch.input_shape[1] ** 2 * 2)
                                         .reshape(2, *arch.input_shape))).source)
    fixed = (_REQUANTIZE, _DOT, _CONV, _DENSE, _TABLE, _DIVIDE, _POOL, _GAP)
    return hashlib.sha256("".join((*fixed, *samples)).encode("utf-8")).hexdigest()[:16]


def _parameters(arch) -> list[tuple[str, str, tuple[int, ...]]]:
    """(module name, parameter, shape) of every tensor a trained network's state holds (batch norm as fresh)."""
    out = []
    for layer in lower(arch):
        if not layer.affine:
            continue
        shape = (layer.channels, layer.input[0], layer.kernel, layer.kernel) if layer.kind == "conv" else \
            (layer.channels, layer.input[0])
        out.append((layer.name, "weight", shape))
        if layer.bias:
            out.append((layer.name, "bias", (layer.channels,)))
        if layer.batch_norm:
            out += [(layer.batch_norm, kind, (layer.channels,))
                    for kind in ("weight", "bias", "running_mean", "running_var")]
    return out


def generate(net: IntegerNet, class_names: tuple[str, ...] = (), *, profile: bool = False) -> CSource:
    """Both C files for `net`; ``class_names`` go into the header as a macro (no data unless used).

    ``profile=True`` is for the emulated run only, never for the user's files: the same source with a
    call ``model_layer_done(k, arena)`` after the input copy (k = 0) and after layer k − 1, so that a
    harness can read a clock between layers (:mod:`searcher.ship.emulate`). The arena is passed to
    it so that the compiler cannot move a layer's work on the arena past the call.
    """
    shapes = _shape(net)
    sizes = [math.prod(s) for s in shapes]
    arena = max(sizes[i] + sizes[i + 1] for i in range(len(net.layers)))
    arrays: list[tuple[str, int]] = []
    data: list[str] = []
    calls: list[str] = []
    convs: set[tuple[int, int]] = set()  # (kernel, input channels) of each conv function needed
    kinds = {layer.kind for layer in net.layers if layer.weights is not None}  # and the other functions needed
    at = 0  # offset of the current tensor; the input is copied to the start
    for i, layer in enumerate(net.layers):
        before, after = shapes[i], shapes[i + 1]
        out_at = arena - sizes[i + 1] if at == 0 else 0  # the other end of the arena
        src, dst = f"a + {at}", f"a + {out_at}"
        calls.append(f"    /* {_describe(layer, before, after)} */")
        if layer.weights is not None:
            symbol = f"{PREFIX}{layer.name}"
            data.append(f"/* {_describe(layer, before, after)} */\n")
            for suffix, ctype, values in (("weights", "int8_t", _channels_last(layer.weights, before)),
                                          ("bias", "int32_t", layer.bias), ("multiplier", "int32_t", layer.multiplier)):
                data.append(_array(ctype, f"{symbol}_{suffix}", values))
                arrays.append((f"{symbol}_{suffix}", values.size * values.itemsize))
            tail = (f"{symbol}_weights, {symbol}_bias, {symbol}_multiplier, {layer.shift}, "
                    f"{layer.zero}, {layer.low}, {layer.high}")
            if layer.kind == "conv":
                k = layer.weights.shape[-1]
                convs.add((k, before[0]))
                calls.append(f"    conv_{k}x{k}_{before[0]}c({src}, {before[1]}, {before[2]}, {layer.source.zero}, {dst}, "
                             f"{after[1]}, {after[2]}, {after[0]}, {layer.stride}, {layer.padding},\n"
                             f"              {tail});")
            else:
                calls.append(f"    dense({src}, {sizes[i]}, {layer.source.zero}, {dst}, {after[0]},\n          {tail});")
            if layer.table is not None:
                data.append(_array("int8_t", f"{symbol}_table", layer.table))
                arrays.append((f"{symbol}_table", 256))
                calls.append(f"    lookup({dst}, {sizes[i + 1]}, {symbol}_table);")
        elif sizes[i] == sizes[i + 1]:  # averaging a 1x1 map, pooling 1x1 windows at stride 1: the values stay
            calls.append("    /* the same values: nothing to do */")
            out_at = at
        elif layer.kind == "gap":
            calls.append(f"    global_average({src}, {before[0]}, {before[1] * before[2]}, {dst});")
            kinds.add("gap")
        else:
            calls.append(f"    {layer.kind[:3]}_pool({src}, {before[0]}, {before[2]}, {dst}, "
                         f"{after[1]}, {after[2]}, {layer.window}, {layer.stride});")
            kinds.add(layer.kind)
        if profile:
            calls.append(f"    {PROFILE_HOOK}({i + 1}, a);")
        at = out_at
    functions = [requantize_source(net.wide), _DOT]
    functions += [_conv_function(k, c) for k, c in sorted(convs)]
    functions += [_DENSE] if "dense" in kinds else []
    functions += [_TABLE] if net.tables else []
    functions += [_DIVIDE] if kinds & {"avgpool", "gap"} else []
    functions += [_pool_function("max")] if "maxpool" in kinds else []
    functions += [_pool_function("avg")] if "avgpool" in kinds else []
    functions += [_GAP] if "gap" in kinds else []
    constant = sum(size for _, size in arrays)
    table_bytes = 256 * len(net.tables)
    c, h, w = net.input_shape
    dsp = "" if net.wide else """
#if defined(__ARM_FEATURE_DSP) && __ARM_FEATURE_DSP /* Armv7E-M, Armv8-M with the DSP extension */
#include <arm_acle.h>
#include <string.h>
#define MODEL_DSP 1
#endif
"""
    source = f"""\
/* model_int8.c: image classifier {net.arch}, integer arithmetic only.
 *
 * Written by searcher's export from the trained network: batch norm folded in, int8 weights with
 * one scale per output channel, int8 activations with one grid per tensor, int32 biases,
 * fixed-point requantization (Jacob et al., CVPR 2018). C99; needs only <stdint.h> and <stddef.h>
 * (and, where the compiler offers the Arm DSP extension, <arm_acle.h> and <string.h>); no malloc,
 * no floating point.
 *
 * Constant data: {constant} bytes ({constant - table_bytes} weights, biases and multipliers{
    f", {table_bytes} in {len(net.tables)} activation tables" if table_bytes else ""}).
 * RAM: one static arena of {arena} bytes; the image is copied into it first, channels last.
 */
#include <stddef.h>
#include <stdint.h>
{dsp}
#include "model_int8.h"

{f"void {PROFILE_HOOK}(int32_t layer, int8_t *arena); /* the harness's clock: profiled builds only; the arena{chr(10)}"
   f" * is passed so that the compiler moves no work on it from one layer to the next */{chr(10)}" if profile else ""}\

{"".join(data)}
static int8_t {PREFIX}arena[{arena}];

{chr(10).join(functions)}
int model_classify(const uint8_t *pixels, int8_t *scores)
{{
    int8_t *const a = {PREFIX}arena;
    const int8_t *result;
    int32_t i, ch;
    int best = 0;

    for (i = 0; i < {h * w}; ++i) /* channels x height x width in, height x width x channels in the arena */
        for (ch = 0; ch < {c}; ++ch)
            a[i * {c} + ch] = (int8_t)((int32_t)pixels[ch * {h * w} + i] - 128);
{f"    {PROFILE_HOOK}(0, a);{chr(10)}" if profile else ""}{chr(10).join(calls)}

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
