"""The hardware budget and the gate every candidate passes before a model is built."""

from __future__ import annotations

from dataclasses import dataclass, replace

from searcher.core.cost import PRECISION_BYTES, Cost, check_precision
from searcher.errors import SearcherError, one_of, shown, spelled
from searcher.core.units import format_bytes, format_count, parse_bytes, parse_count

# budget key in a space file / CLI option -> (field of Budget, column of the cost totals)
CAP_KEYS = {
    "max_params": ("max_params", "params"),
    "max_macs": ("max_macs", "macs"),
    "max_activation": ("max_activation_bytes", "peak_activation_bytes"),
    "max_weight": ("max_weight_bytes", "weight_bytes"),
}
BUDGET_KEYS = (*CAP_KEYS, "weight_precision", "activation_precision")
CAP_COLUMNS = tuple(column for _, column in CAP_KEYS.values())


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
                if key in CAP_KEYS:
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
        """The budget as a [budget] table, so ``Budget().updated(b.to_table()) == b``."""
        table = {key: getattr(self, name) for key, (name, _) in CAP_KEYS.items() if getattr(self, name) is not None}
        return table | {"weight_precision": self.weight_precision, "activation_precision": self.activation_precision}

    def caps(self) -> dict[str, int]:
        """Set caps by cost column: {"params": 20000, ...}."""
        return {column: getattr(self, name) for name, column in CAP_KEYS.values() if getattr(self, name) is not None}

    def totals(self, cost: Cost) -> dict[str, int]:
        """The cost numbers this budget judges, at its precisions."""
        totals = cost.totals(self.weight_precision)
        if cost.activation_precision != self.activation_precision:
            totals["peak_activation_bytes"] = cost.peak_activation_elements * PRECISION_BYTES[self.activation_precision]
        return totals

    def check(self, totals: dict[str, int]) -> list[Violation]:
        """Every broken cap, with its value and its limit; empty when the candidate fits."""
        return [Violation(c, totals[c], limit) for c, limit in self.caps().items() if totals[c] > limit]

    def describe(self) -> str:
        """One line for logs and reports: 'params ≤ 20k, macs ≤ 2M (weights int8, ...)'."""
        caps = ", ".join(f"{c} ≤ {show_cost(c, v)}" for c, v in self.caps().items()) or "no caps"
        return f"{caps} (weights {self.weight_precision}, activations {self.activation_precision})"


def show_cost(column: str, value: float) -> str:
    """A cost value in human units: bytes for *_bytes columns, a count otherwise."""
    return format_bytes(value) if column.endswith("bytes") else format_count(value)
