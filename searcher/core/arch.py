"""The architecture description: immutable plain data, a JSON form and a short text form.

The text form doubles as the candidate's id. Grammar (fields joined by ``_``)::

    1x32x32_c6k5v-a2_c16k5v-a2_flat-d120-d84-o10_tanh
    │       │        │         │                 └ activation, then `_bn` if batch norm
    │       │        │         └ head: flat|gap, hidden dense widths d<N>, dropout r<p>, o<classes>
    │       └ stages: convs c<out>k<kernel>[s<stride>][v] then an optional pool m<w>|a<w>[s<stride>]
    └ input channels x height x width

``v`` marks valid padding (no padding); without it padding is "same" (k // 2, odd kernels).
A pool's stride defaults to its window.
"""

from __future__ import annotations

import json
import re
from decimal import Decimal
from dataclasses import asdict, dataclass

from searcher.errors import SearcherError, is_int, one_of, shown
from searcher.limits import MAX_CLASSES, MAX_CONVS, MAX_KERNEL, MAX_SIDE, MAX_STAGES, MAX_WIDTH

ACTIVATIONS = ("relu", "relu6", "tanh", "sigmoid", "hardswish")
TABLE_ACTIVATIONS = ("hardswish", "tanh", "sigmoid")  # at int8 a 256-entry lookup; relu and relu6 are a clamp
POOLS = ("max", "avg")
FEATURES = ("flatten", "gap")
PADDINGS = ("same", "valid")


@dataclass(frozen=True)
class Conv:
    out_channels: int
    kernel: int
    stride: int = 1
    padding: str = "same"  # "same" keeps size at stride 1 (pad k // 2); "valid" pads nothing


@dataclass(frozen=True)
class Pool:
    kind: str  # "max" or "avg"
    window: int = 2
    stride: int = 2


@dataclass(frozen=True)
class Stage:
    convs: tuple[Conv, ...]
    pool: Pool | None = None  # None: no pooling after this stage


@dataclass(frozen=True)
class Head:
    features: str  # "flatten" keeps every position; "gap" averages each channel to one value
    hidden: tuple[int, ...] = ()  # widths of hidden dense layers, in order
    dropout: float = 0.0  # after each hidden layer (before the output when there is none)
    classes: int = 10


@dataclass(frozen=True)
class Arch:
    """One candidate network: conv-pool stages, then a small dense head."""

    input_shape: tuple[int, int, int]  # (channels, height, width)
    stages: tuple[Stage, ...]
    head: Head
    activation: str = "relu"  # one activation for every conv and hidden dense layer
    batch_norm: bool = False  # batch norm after every conv (conv bias then dropped)

    def __post_init__(self) -> None:
        if self.activation not in ACTIVATIONS:
            raise SearcherError(f"activation {shown(self.activation)} is not known; use {one_of(self.activation, ACTIVATIONS)}")
        if self.head.features not in FEATURES:
            raise SearcherError(f"head features {shown(self.head.features)} is not known; use {one_of(self.head.features, FEATURES)}")
        if len(self.stages) > MAX_STAGES:
            raise SearcherError(f"an architecture has at most {MAX_STAGES} stages, got {len(self.stages)}")
        for stage in self.stages:
            if not 1 <= len(stage.convs) <= MAX_CONVS:
                raise SearcherError(f"every stage needs at least one conv and at most {MAX_CONVS}, got {len(stage.convs)}")
            for conv in stage.convs:
                if conv.padding not in PADDINGS:
                    raise SearcherError(f"padding {shown(conv.padding)} is not known; use {one_of(conv.padding, PADDINGS)}")
                if conv.padding == "same" and is_int(conv.kernel) and conv.kernel % 2 == 0:
                    raise SearcherError(f"'same' padding needs an odd kernel, got {conv.kernel}")
            if stage.pool and stage.pool.kind not in POOLS:
                raise SearcherError(f"pool {shown(stage.pool.kind)} is not known; use {one_of(stage.pool.kind, POOLS)}")
        for what, values, high in self._sizes():
            for v in values:
                if not is_int(v) or not 1 <= v <= high:
                    raise SearcherError(f"every {what} must be a whole number from 1 to {high:,}, got {shown(v)}")
        dropout = self.head.dropout
        if isinstance(dropout, bool) or not isinstance(dropout, (int, float)) or not 0.0 <= dropout < 1.0:
            raise SearcherError(f"dropout must be a number in [0, 1), got {shown(dropout)}")

    def _sizes(self) -> list[tuple[str, list, int]]:
        """Every whole-number field with its ceiling (searcher.limits), to check them in one loop."""
        convs = [c for s in self.stages for c in s.convs]
        pools = [s.pool for s in self.stages if s.pool]
        return [
            ("input channel count", [self.input_shape[0]] if len(self.input_shape) == 3 else [0], MAX_WIDTH),
            ("input side", list(self.input_shape[1:]) if len(self.input_shape) == 3 else [0], MAX_SIDE),
            ("conv width", [c.out_channels for c in convs], MAX_WIDTH),
            ("kernel", [c.kernel for c in convs], MAX_KERNEL),
            ("stride or pool window", [c.stride for c in convs] + [v for p in pools for v in (p.window, p.stride)],
             MAX_SIDE),
            ("hidden width", list(self.head.hidden), MAX_WIDTH),
            ("class count", [self.head.classes], MAX_CLASSES),
        ]

    # -- summaries used by tables and the search ------------------------------------------
    @property
    def depth(self) -> int:
        """Number of stages."""
        return len(self.stages)

    @property
    def conv_count(self) -> int:
        return sum(len(s.convs) for s in self.stages)

    @property
    def widths(self) -> tuple[int, ...]:
        """Output channels of each stage's last conv."""
        return tuple(s.convs[-1].out_channels for s in self.stages)

    # -- text form ------------------------------------------------------------------------
    def to_text(self) -> str:
        c, h, w = self.input_shape
        parts = [f"{c}x{h}x{w}"]
        for stage in self.stages:
            tokens = [_conv_text(conv) for conv in stage.convs]
            if stage.pool:
                p = stage.pool
                tokens.append(f"{p.kind[0]}{p.window}" + (f"s{p.stride}" if p.stride != p.window else ""))
            parts.append("-".join(tokens))
        head = [self.head.features[:4] if self.head.features == "flatten" else "gap"]
        head += [f"d{n}" for n in self.head.hidden]
        if self.head.dropout:
            head.append(f"r{_plain_float(self.head.dropout)}")
        head.append(f"o{self.head.classes}")
        parts.append("-".join(head))
        parts.append(self.activation)
        if self.batch_norm:
            parts.append("bn")
        return "_".join(parts)

    def __str__(self) -> str:
        return self.to_text()

    # -- JSON form ------------------------------------------------------------------------
    def to_dict(self) -> dict:
        return asdict(self)

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2)

    @classmethod
    def from_dict(cls, data: dict) -> Arch:
        try:
            stages = tuple(
                Stage(
                    convs=tuple(Conv(**c) for c in s["convs"]),
                    pool=Pool(**s["pool"]) if s.get("pool") else None,
                )
                for s in data["stages"]
            )
            head = dict(data["head"])
            head["hidden"] = tuple(head.get("hidden", ()))
            return cls(
                input_shape=tuple(data["input_shape"]),
                stages=stages,
                head=Head(**head),
                activation=data.get("activation", "relu"),
                batch_norm=bool(data.get("batch_norm", False)),
            )
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            if isinstance(exc, SearcherError):
                raise SearcherError(f"architecture JSON: {exc.message}") from None
            why = f"has no field {shown(exc.args[0])}" if isinstance(exc, KeyError) else f"has a field of the wrong kind ({exc})"
            raise SearcherError(f"architecture JSON {why}") from None

    @classmethod
    def from_json(cls, text: str) -> Arch:
        try:
            data = json.loads(text)
        except (ValueError, RecursionError) as exc:  # JSONDecodeError, or a number too long for int()
            raise SearcherError(f"architecture JSON does not parse: {exc}") from None
        return cls.from_dict(data)


def _plain_float(value: float) -> str:
    """Shortest exact decimal without an exponent: fields are split on '-', so 1e-05 would break."""
    return format(Decimal(repr(float(value))), "f")


def _conv_text(conv: Conv) -> str:
    return (
        f"c{conv.out_channels}k{conv.kernel}"
        + (f"s{conv.stride}" if conv.stride != 1 else "")
        + ("v" if conv.padding == "valid" else "")
    )


_CONV = re.compile(r"^c(\d+)k(\d+)(?:s(\d+))?(v?)$", re.ASCII)
_POOL = re.compile(r"^([ma])(\d+)(?:s(\d+))?$", re.ASCII)
_INPUT = re.compile(r"^(\d+)x(\d+)x(\d+)$", re.ASCII)
EXAMPLE = "1x32x32_c6k5v-a2_c16k5v-a2_flat-d120-d84-o10_tanh"


def parse_arch(text: str) -> Arch:
    """Parse the text form (see the module docstring) back into an :class:`Arch`.

    >>> parse_arch("1x28x28_c8k3-m2_gap-o10_relu").depth
    1
    """
    text = text.strip()
    if text.startswith("{"):
        return Arch.from_json(text)

    def fail(why: str, form: bool = True) -> SearcherError:
        example = f"; expected a form like {EXAMPLE!r}" if form else ""
        return SearcherError(f"architecture text {shown(text)}: {why}{example}")

    if len(max(re.findall(r"(?<![.\d])\d+", text), key=len, default="")) > 100:
        raise fail("it holds a number of more than 100 digits")
    parts = text.split("_")
    batch_norm = parts[-1] == "bn"
    if batch_norm:
        parts = parts[:-1]
    if len(parts) < 3:
        raise fail("too few fields")
    found = _INPUT.match(parts[0])
    if not found:
        raise fail(f"input {shown(parts[0])} must be CxHxW")
    input_shape = tuple(int(v) for v in found.groups())
    activation = parts[-1]
    if activation not in ACTIVATIONS:
        raise fail(f"activation {shown(activation)} must be {one_of(activation, ACTIVATIONS)}")

    stages = []
    for field in parts[1:-2]:
        convs, pool = [], None
        for token in field.split("-"):
            if pool is not None:
                raise fail(f"nothing may follow the pool in stage {shown(field)}")
            if m := _CONV.match(token):
                out, k, s, v = m.groups()
                convs.append(Conv(int(out), int(k), int(s or 1), "valid" if v else "same"))
            elif m := _POOL.match(token):
                kind, window, stride = m.groups()
                pool = Pool("max" if kind == "m" else "avg", int(window), int(stride or window))
            else:
                raise fail(f"stage token {shown(token)} is neither a conv (c16k3) nor a pool (m2, a2)")
        if not convs:
            raise fail(f"stage {shown(field)} has no conv")
        stages.append(Stage(tuple(convs), pool))

    tokens = parts[-2].split("-")
    if tokens[0] not in ("flat", "gap"):
        raise fail(f"head must start with 'flat' or 'gap', got {shown(tokens[0])}")
    features = "flatten" if tokens[0] == "flat" else "gap"
    hidden, dropout, classes = [], 0.0, None
    for token in tokens[1:]:
        try:
            if not token.isascii():
                raise ValueError
            if token.startswith("d"):
                hidden.append(int(token[1:]))
            elif token.startswith("r"):
                dropout = float(token[1:])
            elif token.startswith("o"):
                classes = int(token[1:])
            else:
                raise ValueError
        except ValueError:
            raise fail(f"head token {shown(token)} must be d<width>, r<dropout> or o<classes>") from None
    if classes is None:
        raise fail("head needs the output layer o<classes>")
    try:
        return Arch(input_shape, tuple(stages), Head(features, tuple(hidden), dropout, classes), activation, batch_norm)
    except SearcherError as exc:
        raise fail(exc.message, form=False) from None
