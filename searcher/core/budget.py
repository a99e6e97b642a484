"""The hardware budget and the gate every candidate passes before a model is built."""

from __future__ import annotations

from dataclasses import dataclass, replace

from searcher.core.arch import Arch
from searcher.core.cost import PRECISION_BYTES, Cost, check_precision
from searcher.core.latency import Target, predict
from searcher.errors import SearcherError, one_of, shown, spelled
from searcher.core.units import format_bytes, format_count, format_duration, parse_bytes, parse_count, parse_duration

# budget key in a space file / CLI option -> (field of Budget, column of the cost totals)
CAP_KEYS = {
    "max_params": ("max_params", "params"),
    "max_macs": ("max_macs", "macs"),
    "max_activation": ("max_activation_bytes", "peak_activation_bytes"),
    "max_weight": ("max_weight_bytes", "weight_bytes"),
    "max_latency": ("max_latency_ms", "latency_ms"),
}
BUDGET_KEYS = (*CAP_KEYS, "weight_precision", "activation_precision")
LATENCY = "latency_ms"  # predicted time per inference on the budget's target: a cost only when a target is set
CAP_COLUMNS = tuple(column for _, column in CAP_KEYS.values() if column != LATENCY)  # costs every candidate has


@dataclass(frozen=True)
class Violation:
    """One broken cap: which, by how much."""

    cap: str  # a cost column: params, macs, peak_activation_bytes, weight_bytes
    value: int
    limit: int

    @property
    def excess(self) -> float:
        """Relative overshoot, > 0; what the sampler is told as the constraint value."""
        return (self.value - self.limit) / self.limit

    def __str__(self) -> str:
        return f"{self.cap} {show_cost(self.cap, self.value)} > {show_cost(self.cap, self.limit)}"


@dataclass(frozen=True)
class Budget:
    """Caps on the deployed network; None means no cap."""

    max_params: int | None = None  # trainable parameters
    max_macs: int | None = None  # multiply-accumulates per inference
    max_activation_bytes: int | None = None  # peak activation memory at batch 1
    max_weight_bytes: int | None = None  # weight storage at weight_precision
    weight_precision: str = "fp32"  # fp32, fp16 or int8: how weights are stored
    activation_precision: str = "fp32"  # fp32, fp16 or int8: how activations are held
    max_latency_ms: float | None = None  # predicted time per inference on `target`, in milliseconds
    target: Target | None = None  # core and clock the int8 C file runs on ([target], --target); None: no latency

    def __post_init__(self) -> None:
        """A target stored with a run comes back as a plain dict (``Budget(**asdict(budget))``)."""
        if isinstance(self.target, dict):
            object.__setattr__(self, "target", Target(**self.target))

    @classmethod
    def from_table(cls, table: dict, file: str | None = None, prefix: str = "budget.") -> Budget:
        """Read a ``[budget]`` table of a space file (or CLI options with the same keys)."""
        return cls().updated(table, file, prefix)

    def updated(self, table: dict, file: str | None = None, prefix: str = "budget.") -> Budget:
        """This budget with every key that ``table`` gives replaced (None values are not given).

        ``prefix`` says where the keys come from, for messages: "budget." for a file's table,
        "--" for command-line options (named with dashes, as typed: ``--max-params``).

        >>> Budget(max_params=20_000).updated({"max_macs": "2M"}).caps()
        {'params': 20000, 'macs': 2000000}
        """
        if not isinstance(table, dict):
            section = prefix.rstrip(".")
            raise SearcherError(f"`{section}` must be a table of caps [{section}], got {shown(table)}", file=file,
                                key=section)
        values: dict = {}
        for key, raw in table.items():
            if raw is None:
                continue
            where = spelled(prefix, key)
            try:
                if key == "max_latency":
                    values["max_latency_ms"] = parse_duration(raw, key=where)
                elif key in CAP_KEYS:
                    parse = parse_bytes if key in ("max_activation", "max_weight") else parse_count
                    values[CAP_KEYS[key][0]] = parse(raw, key=where)
                elif key in ("weight_precision", "activation_precision"):
                    values[key] = check_precision(raw, where)
                else:
                    raise SearcherError(f"unknown key `{where}`; use {one_of(key, BUDGET_KEYS)}")
            except SearcherError as exc:
                raise SearcherError(exc.message, file=file, key=where) from None
        return replace(self, **values)

    def to_table(self) -> dict:
        """The budget as a [budget] table, so ``Budget(target=b.target).updated(b.to_table()) == b`` (the target
        is a table of its own)."""
        table = {key: getattr(self, name) for key, (name, _) in CAP_KEYS.items() if getattr(self, name) is not None}
        if self.max_latency_ms is not None:
            table["max_latency"] = f"{self.max_latency_ms!r}ms"
        return table | {"weight_precision": self.weight_precision, "activation_precision": self.activation_precision}

    def targeted(self, target: Target | None) -> Budget:
        """This budget judged on `target` (None keeps the one it has)."""
        return self if target is None else replace(self, target=target)

    def check_target(self, key: str, file: str | None = None) -> Budget:
        """This budget, after refusing a latency cap with no target to judge it on (`key` set the cap)."""
        if self.max_latency_ms is not None and self.target is None:
            raise SearcherError(f"`{key}` caps the time per inference, which needs a target: a [target] table "
                                "(core = \"cortex-m4\", clock = \"80MHz\") or --target cortex-m4@80MHz",
                                file=file, key=key)
        return self

    @property
    def columns(self) -> tuple[str, ...]:
        """The costs this budget judges: the four of every candidate, and the predicted latency with a target."""
        return CAP_COLUMNS + ((LATENCY,) if self.target is not None else ())

    def caps(self) -> dict[str, int]:
        """Set caps by cost column: {"params": 20000, ...}."""
        return {column: getattr(self, name) for name, column in CAP_KEYS.values() if getattr(self, name) is not None}

    def totals(self, cost: Cost, arch: Arch | None = None) -> dict[str, float]:
        """The cost numbers this budget judges, at its precisions; with a target and the architecture,
        the predicted milliseconds per inference (``latency_ms``) too."""
        totals: dict[str, float] = cost.totals(self.weight_precision)
        if cost.activation_precision != self.activation_precision:
            totals["peak_activation_bytes"] = cost.peak_activation_elements * PRECISION_BYTES[self.activation_precision]
        if self.target is not None and arch is not None:
            totals[LATENCY] = predict(arch, self.target).seconds * 1e3
        return totals

    def check(self, totals: dict[str, int]) -> list[Violation]:
        """Every broken cap, with its value and its limit; empty when the candidate fits."""
        return [Violation(c, totals[c], limit) for c, limit in self.caps().items() if totals[c] > limit]

    def describe(self) -> str:
        """One line for logs and reports: 'params ≤ 20k, macs ≤ 2M (weights int8, ...)'."""
        caps = ", ".join(f"{c} ≤ {show_cost(c, v)}" for c, v in self.caps().items()) or "no caps"
        target = f", on {self.target.text()}" if self.target is not None else ""
        return f"{caps} (weights {self.weight_precision}, activations {self.activation_precision}{target})"


def show_cost(column: str, value: float) -> str:
    """A cost value in human units: bytes for *_bytes columns, a time for latency_ms, a count otherwise."""
    if column == LATENCY:
        return format_duration(value)
    return format_bytes(value) if column.endswith("bytes") else format_count(value)
