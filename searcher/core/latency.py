"""Predicted instructions per inference of the int8 C file on Cortex-M cores, and the time they take.

What is predicted is the number of **instructions** one call of ``model_classify`` executes on a
core, as QEMU counts them (``searcher.ship.emulate``) for the C that ``searcher.ship.c_source``
writes. It is not the number of cycles on silicon: a load, a taken branch or a multiply may take
more than one cycle, and flash wait states, the bus and caches add more, differently on every part.

Each layer's count is a linear formula in counts of the work its C loops do, all read off the
layer's shapes (the lowered plan, :mod:`searcher.core.plan`): for a conv, the four-byte words of
the kernel rows inside the map, the bytes left over, the bytes of windows cut by the map's edge,
the rows, the groups of four output channels, the channels left over, the pixels; for every conv
and dense output one requantization, and one table lookup with hardswish, tanh or sigmoid; for a
pool the bytes read and the values written; for a dense layer the same words and bytes. Each
count has one coefficient per core, fitted by least squares to instruction counts of the emulated
kernels (``python benchmarks/bench_latency.py fit``) and shipped in ``latency_coefficients.json``,
with a fingerprint of the C kernels it was fitted on (a test fails when the kernels change and the
coefficients do not). The functions take ints or numpy arrays alike, as the cost formulas do: the
census applies them to a million candidates at once. Error against emulation on candidates not
fitted on: ``python benchmarks/bench_latency.py``.

**Time.** A target names a core and a clock (``cortex-m4@80MHz``); time per inference is
instructions × cycles per instruction / clock. The factor used is 1 cycle per instruction for every
core, the best case: the Cortex-M3 and M4 technical reference manuals give 1 cycle for the
data-processing and multiply(-accumulate) instructions that make up most of these kernels
(including SMLAD, SXTB16, SXTAB16, UMULL on the M4), 2 for a single load and 1 plus a pipeline
refill for a taken branch (from memory); the M7 may issue two instructions per cycle, and every
part adds flash wait states at high clocks. Treat the time as a lower bound, and keep a margin
under a hard deadline; the instruction count is the figure to compare.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from functools import cache
from importlib import resources
from typing import Any

import numpy as np

from searcher.core.arch import TABLE_ACTIVATIONS, Arch
from searcher.core.plan import lower
from searcher.errors import SearcherError, one_of, shown
from searcher.limits import CLOCK_HZ

COEFFICIENTS = "latency_coefficients.json"  # in this package: the fitted coefficients per core
_CONV = ("words", "tail_bytes", "rows", "edge_bytes", "edge_rows", "groups", "rest_bytes", "rest_channels",
         "pixels", "calls")
FIRST_LAYERS = ((3, 1), (5, 1), (3, 3), (5, 3))  # (kernel, input channels) of the usual first convs (gray, RGB)
TERMS = (  # the counts each layer's formula is linear in (see the module notes); the data file's keys
    *(f"conv.{name}" for name in _CONV), *(f"conv_narrow.{name}" for name in _CONV),
    *(f"conv_k{k}c{c}.inner" for k, c in FIRST_LAYERS),
    "dense.words", "dense.tail_bytes", "dense.groups", "dense.rest_bytes", "dense.rest_channels", "dense.calls",
    "requantize.outputs", "table.lookups",
    "maxpool.reads", "maxpool.outputs", "maxpool.pixels", "maxpool.calls",
    "avgpool.reads", "avgpool.outputs", "avgpool.pixels", "avgpool.calls",
    "gap.reads", "gap.outputs", "gap.calls",
    "input.bytes", "input.interleaved_bytes", "output.classes", "call",
)


def _ceil_div(a, b):
    return -((-a) // b)


def inside(size, out, kernel, stride, pad):
    """Output positions along one axis whose window lies wholly inside a map of `size` (no padding read)."""
    first = _ceil_div(pad, stride)
    last = np.minimum(out - 1, (size + pad - kernel) // stride)
    return np.maximum(0, last - first + 1)


def taps(size, out, kernel, stride, pad):
    """Kernel taps that land inside the map, summed over the output positions along one axis."""
    total = 0 * size
    for k in range(int(np.max(kernel))):  # position o reads tap k when 0 <= o·stride − pad + k < size
        low = np.maximum(0, _ceil_div(pad - k, stride))
        high = np.minimum(out - 1, (size - 1 + pad - k) // stride)
        total = total + np.where(k < kernel, np.maximum(0, high - low + 1), 0)
    return total


def conv_terms(in_h, in_w, in_c, out_h, out_w, out_c, kernel, stride, pad, table) -> dict[str, Any]:
    """The counts a conv layer's instructions are linear in (ints or arrays alike).

    Four output channels are summed at once over kernel rows of kernel·in_c contiguous bytes; rows
    inside the map are read four bytes at a time (``words``) with ``tail_bytes`` left over, rows cut
    by the map's edge byte by byte (``edge_bytes``); the channels beyond a multiple of four one at a
    time (``rest_bytes``). Every output is requantized, and looked up in a table when ``table``. A
    conv on fewer than four input channels (a first layer) has rows of a few bytes, which the
    compiler unrolls into other code: its counts are kept apart (``conv_narrow.*``).
    """
    pixels = out_h * out_w
    groups, rest = out_c // 4, out_c % 4
    inner = inside(in_h, out_h, kernel, stride, pad) * inside(in_w, out_w, kernel, stride, pad)
    rows_h = taps(in_h, out_h, kernel, stride, pad)  # kernel rows inside the map, over the output rows
    all_taps = rows_h * taps(in_w, out_w, kernel, stride, pad)
    span = kernel * in_c
    counts = {
        "words": inner * groups * kernel * (span // 4),
        "tail_bytes": inner * groups * kernel * (span % 4),
        "rows": inner * groups * kernel,
        "edge_bytes": groups * in_c * (all_taps - inner * kernel * kernel),
        "edge_rows": groups * (rows_h * out_w - inner * kernel),
        "groups": pixels * groups,
        "rest_bytes": rest * in_c * all_taps,
        "rest_channels": pixels * rest,
        "pixels": pixels,
        "calls": 1 + 0 * pixels,
    }
    narrow = (in_c < 4) * 1  # 0 or 1, for ints and arrays alike
    terms = {f"conv.{name}": value * (1 - narrow) for name, value in counts.items()}
    terms |= {f"conv_narrow.{name}": value * narrow for name, value in counts.items()}
    known = 0 * narrow
    for k, c in FIRST_LAYERS:  # the window inside the map as one block of code, its own cost
        here = (kernel == k) * (in_c == c)
        terms[f"conv_k{k}c{c}.inner"] = inner * groups * here
        known = known + here
    for name in ("words", "tail_bytes", "rows"):
        terms[f"conv_narrow.{name}"] = terms[f"conv_narrow.{name}"] * (1 - known)
    return terms | {"requantize.outputs": pixels * out_c, "table.lookups": pixels * out_c * table}


def dense_terms(n_in, n_out, table) -> dict[str, Any]:
    """The counts of a dense layer: four outputs at a time over the inputs, four bytes at a time."""
    groups, rest = n_out // 4, n_out % 4
    return {
        "dense.words": groups * (n_in // 4), "dense.tail_bytes": groups * (n_in % 4), "dense.groups": groups,
        "dense.rest_bytes": rest * n_in, "dense.rest_channels": rest, "dense.calls": 1 + 0 * n_in,
        "requantize.outputs": n_out, "table.lookups": n_out * table,
    }


def pool_terms(kind: str, channels, out_h, out_w, window, stride) -> dict[str, Any]:
    """The counts of a max or average pool (`kind` "maxpool" or "avgpool"): every output reads its window.
    A 1x1 window at stride 1 leaves the values as they are: no code."""
    work = 1 - (window == 1) * (stride == 1)
    outputs = out_h * out_w * channels * work
    return {f"{kind}.reads": outputs * window * window, f"{kind}.outputs": outputs,
            f"{kind}.pixels": out_h * out_w * work, f"{kind}.calls": work}


def gap_terms(channels, pixels) -> dict[str, Any]:
    """The counts of global average pooling; over a 1x1 map it leaves the values as they are: no code."""
    work = (pixels > 1) * 1
    return {"gap.reads": channels * pixels * work, "gap.outputs": channels * work, "gap.calls": work}


def input_terms(channels, pixels) -> dict[str, Any]:
    """The call, and copying the image into the arena (channels last: a plain copy for one channel)."""
    return {"input.bytes": channels * pixels, "input.interleaved_bytes": channels * pixels * (channels > 1),
            "call": 1 + 0 * pixels}


def output_terms(classes) -> dict[str, Any]:
    """Picking the class and copying the scores out."""
    return {"output.classes": classes}


@cache
def _data() -> dict[str, Any]:
    return json.loads(resources.files("searcher.core").joinpath(COEFFICIENTS).read_text(encoding="utf-8"))


def cores() -> tuple[str, ...]:
    """The cores with fitted coefficients."""
    return tuple(_data()["coefficients"])


def instructions(core: str, terms: dict[str, Any]):
    """Σ coefficient × count for one layer's `terms` on `core` (ints or arrays alike)."""
    weights = _data()["coefficients"][core]
    return sum(weights[name] * value for name, value in terms.items())


def layer_terms(arch: Arch) -> list[tuple[str, dict[str, Any]]]:
    """(row name, counts) for what one inference runs: "input", each layer of the plan, "output"."""
    table = arch.activation in TABLE_ACTIVATIONS
    plan = lower(arch)
    c, h, w = arch.input_shape
    rows = [("input", input_terms(c, h * w))]
    for layer in plan:
        if layer.kind == "conv":
            (c, h, w), (c2, h2, w2) = layer.input, layer.output
            terms = conv_terms(h, w, c, h2, w2, c2, layer.kernel, layer.stride, layer.padding, table)
        elif layer.kind == "dense":
            terms = dense_terms(layer.input[0], layer.channels, table and layer.activation is not None)
        elif layer.kind in ("maxpool", "avgpool"):
            terms = pool_terms(layer.kind, layer.channels, *layer.output[1:], layer.kernel, layer.stride)
        elif layer.kind == "gap":
            terms = gap_terms(layer.input[0], layer.input[1] * layer.input[2])
        else:  # flattening is a view: no code
            continue
        rows.append((layer.name, terms))
    rows.append(("output", output_terms(arch.head.classes)))
    return rows


@dataclass(frozen=True)
class Target:
    """A core and its clock: what a latency budget is measured on."""

    core: str  # cortex-m4; one of cores()
    clock_hz: float  # 80e6

    @property
    def cycles_per_instruction(self) -> float:
        """The factor from instructions to cycles (see the module notes: 1, the best case)."""
        return float(_data()["cycles_per_instruction"][self.core])

    def seconds(self, count):
        """Time of `count` instructions on this target (ints or arrays alike)."""
        return count * self.cycles_per_instruction / self.clock_hz

    def text(self) -> str:
        """The form parse_target reads: cortex-m4@80MHz."""
        return f"{self.core}@{self.clock_hz / 1e6:g}MHz"


_CLOCK = re.compile(r"\s*([0-9]+(?:\.[0-9]+)?)\s*(Hz|kHz|MHz|GHz)\s*", re.IGNORECASE)
_CLOCK_UNITS = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}


def _core(text: object, key: str, file: str | None) -> str:
    if not isinstance(text, str) or text.strip().lower() not in cores():
        shown_text = text.strip() if isinstance(text, str) else text
        raise SearcherError(f"`{key}` names core {shown(shown_text)}; use "
                            f"{one_of(str(shown_text).lower(), cores())}", file=file, key=key)
    return text.strip().lower()


def _clock(text: object, key: str, file: str | None) -> float:
    match = _CLOCK.fullmatch(text) if isinstance(text, str) and len(text) <= 40 else None
    if match is None:
        raise SearcherError(f"`{key}` must be a clock such as '80MHz' (units: Hz, kHz, MHz, GHz), got {shown(text)}",
                            file=file, key=key)
    hz = float(match.group(1)) * _CLOCK_UNITS[match.group(2).lower()]
    if not CLOCK_HZ[0] <= hz <= CLOCK_HZ[1]:
        raise SearcherError(f"`{key}` clock must be from 1 kHz to 10 GHz, got {shown(text)}", file=file, key=key)
    return hz


def parse_target(text: object, key: str = "--target") -> Target:
    """``cortex-m4@80MHz`` as a Target; an error naming `key` otherwise.

    >>> parse_target("cortex-m4@80MHz")
    Target(core='cortex-m4', clock_hz=80000000.0)
    """
    if not isinstance(text, str) or text.count("@") != 1:
        raise SearcherError(f"`{key}` must be a core and a clock such as 'cortex-m4@80MHz' "
                            f"(cores: {', '.join(cores())}), got {shown(text)}", key=key)
    core, clock = text.split("@")
    return Target(_core(core, key, None), _clock(clock, key, None))


def target_from_table(table: object, file: str | None = None) -> Target:
    """A space file's [target] table: ``core = "cortex-m4"`` and ``clock = "80MHz"``, both needed."""
    if not isinstance(table, dict):
        raise SearcherError(f"`target` must be a table [target] with a core and a clock, got {shown(table)}",
                            file=file, key="target")
    core = None if "core" not in table else _core(table["core"], "target.core", file)  # what is given is checked first
    clock = None if "clock" not in table else _clock(table["clock"], "target.clock", file)
    for name, value in (("core", core), ("clock", clock)):
        if value is None:
            raise SearcherError(f"`target.{name}` is missing: a [target] names a core (one of {', '.join(cores())}) "
                                "and a clock such as '80MHz'", file=file, key=f"target.{name}")
    return Target(core, clock)


@dataclass(frozen=True)
class Latency:
    """Predicted instructions of one inference on one core, per row and in total."""

    target: Target
    rows: tuple[tuple[str, float], ...]  # ("input", n), one per layer of the plan (flatten left out), ("output", n)

    @property
    def instructions(self) -> float:
        return sum(n for _, n in self.rows)

    @property
    def seconds(self) -> float:
        return self.target.seconds(self.instructions)


def predict(arch: Arch, target: Target) -> Latency:
    """Predicted instructions of one inference of `arch`'s int8 C file on the target's core.

    >>> from searcher.core.arch import parse_arch
    >>> demo = parse_arch("1x24x24_c4k3-c4k3-m2_c8k3-m2_c16k3-m2_flat-o8_relu_bn")
    >>> latency = predict(demo, parse_target("cortex-m4@80MHz"))
    >>> [name for name, _ in latency.rows][:3], 4e5 < latency.instructions < 9e5
    (['input', 's1_conv1', 's1_conv2'], True)
    """
    return Latency(target, tuple((name, float(instructions(target.core, terms))) for name, terms in layer_terms(arch)))
