"""The budget gate: one pure verdict per proposal, from exact arithmetic, before anything is built.

A proposal is judged on the budget's caps and on the training-memory guard (an estimate of
what training it would take, against a share of this machine's RAM). The verdict also carries
the one number Optuna's samplers read as a constraint (feasible when ≤ 0), so TPE and NSGA-II
learn to keep away from what does not fit.

>>> from searcher.core.arch import parse_arch
>>> from searcher.core.budget import Budget
>>> verdict = judge(parse_arch("1x8x8_c4k3_gap-o2_relu"), Budget(max_params=10), 32, memory_cap=2**30)
>>> verdict.fits, verdict.rejected_by, verdict.constraint > 0
(False, 'params', True)
"""

from __future__ import annotations

from dataclasses import dataclass

from searcher.core.arch import Arch
from searcher.core.budget import Budget, Violation
from searcher.core.cost import cost, training_bytes

TRAINING_BYTES = "training_bytes"  # the guard's column beside the budget's cost columns


@dataclass(frozen=True)
class Verdict:
    """What the gate found for one candidate."""

    totals: dict[str, int]  # cost totals at the budget's precisions, plus training_bytes
    violations: tuple[Violation, ...]  # every broken cap (the guard included); empty when it fits
    constraint: float  # > 0: summed relative overshoot; ≤ 0: the tightest relative slack

    @property
    def fits(self) -> bool:
        return not self.violations

    @property
    def reason(self) -> str:
        return "; ".join(map(str, self.violations))

    @property
    def rejected_by(self) -> str:
        """The broken caps joined by '+', as trials.csv's ``rejected_by`` column has them."""
        return "+".join(v.cap for v in self.violations)


def judge(arch: Arch, budget: Budget, batch_size: int, memory_cap: int) -> Verdict:
    """The gate's verdict on ``arch``: its costs, every broken cap, and Optuna's constraint value."""
    counted = cost(arch, budget.activation_precision)
    totals = budget.totals(counted, arch) | {TRAINING_BYTES: training_bytes(counted, batch_size)}
    caps = budget.caps() | {TRAINING_BYTES: memory_cap}
    violations = tuple(Violation(c, totals[c], limit) for c, limit in caps.items() if totals[c] > limit)
    return Verdict(totals, violations, constraint_value(violations, totals, caps))


def constraint_value(violations: tuple[Violation, ...], totals: dict[str, int], caps: dict[str, int]) -> float:
    """One number for Optuna: > 0 is the summed relative overshoot, ≤ 0 the tightest slack."""
    if violations:
        return sum(v.excess for v in violations)
    if not caps:
        return -1.0
    return max((totals[c] - limit) / limit for c, limit in caps.items())
