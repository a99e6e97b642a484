"""The budget gate: caps, violations, overrides, and the weight-storage rule per precision."""

from __future__ import annotations

import pytest
from torch import nn

import searcher
from searcher.core.arch import parse_arch
from searcher.core.budget import CAP_COLUMNS, Budget, Violation
from searcher.core.cost import cost
from searcher.errors import SearcherError

ARCH = "1x16x16_c4k3-m2_c8k5_flat-d12-o3_relu_bn"


def test_check_returns_every_broken_cap_with_value_and_limit():
    budget = Budget(max_params=100, max_macs=10**9, max_activation_bytes=50, max_weight_bytes=400)
    totals = {"params": 101, "macs": 10**9, "peak_activation_bytes": 51, "weight_bytes": 9999}
    broken = budget.check(totals)
    assert broken == [
        Violation("params", 101, 100),
        Violation("peak_activation_bytes", 51, 50),
        Violation("weight_bytes", 9999, 400),
    ]  # a value equal to its cap fits
    assert broken[0].excess == pytest.approx(0.01)
    assert "params" in str(broken[0]) and "101" in str(broken[0])


def test_no_caps_means_everything_fits():
    totals = cost(parse_arch(ARCH)).totals()
    assert Budget().caps() == {} and Budget().check(totals) == []
    assert set(totals) == set(CAP_COLUMNS)


def test_check_on_a_real_cost_agrees_with_comparing_by_hand():
    result = cost(parse_arch(ARCH))
    totals = result.totals("int8")
    budget = Budget(max_params=result.params - 1, max_macs=result.macs, weight_precision="int8")
    assert [(v.cap, v.value, v.limit) for v in budget.check(budget.totals(result))] == [
        ("params", totals["params"], result.params - 1)]


def test_from_table_reads_units_and_precisions(tmp_path):
    budget = Budget.from_table({"max_params": "20k", "max_macs": "2M", "max_activation": "16KiB",
                                "max_weight": "24KiB", "weight_precision": "int8", "activation_precision": "fp16"})
    assert budget == Budget(20_000, 2_000_000, 16 * 1024, 24 * 1024, "int8", "fp16")
    assert budget.caps() == {"params": 20_000, "macs": 2_000_000, "peak_activation_bytes": 16384, "weight_bytes": 24576}
    assert "params ≤ 20k" in budget.describe() and "int8" in budget.describe()


@pytest.mark.parametrize(
    ("table", "key"),
    [({"max_params": "lots"}, "budget.max_params"), ({"max_activation": "16Kb"}, "budget.max_activation"),
     ({"weight_precision": "int4"}, "budget.weight_precision"), ({"max_param": "20k"}, "budget.max_param")],
)
def test_from_table_errors_name_file_and_key(table, key):
    with pytest.raises(SearcherError, match=key.replace(".", r"\.")) as info:
        Budget.from_table(table, file="space.toml")
    assert info.value.key == key and info.value.file == "space.toml" and "space.toml" in str(info.value)


def test_unknown_budget_key_suggests_the_closest():
    with pytest.raises(SearcherError, match="did you mean 'max_params'"):
        Budget.from_table({"max_param": "20k"})


def test_updated_replaces_only_the_keys_given_and_can_restore_defaults():
    base = Budget(max_params=20_000, max_macs=2_000_000, weight_precision="int8")
    merged = base.updated({"max_params": "5k", "activation_precision": "fp16"})
    assert merged == Budget(max_params=5_000, max_macs=2_000_000, weight_precision="int8", activation_precision="fp16")
    assert base.updated({}) == base
    # a value equal to the default is still applied: int8 back to fp32
    assert base.updated({"weight_precision": "fp32"}).weight_precision == "fp32"
    assert Budget().updated(merged.to_table()) == merged


def test_budget_totals_use_the_budgets_precisions():
    result = cost(parse_arch(ARCH))  # counted at fp32 activations
    totals = Budget(weight_precision="fp16", activation_precision="int8").totals(result)
    assert totals["peak_activation_bytes"] == result.peak_activation_elements
    assert totals["weight_bytes"] == 2 * result.params


def torch_weight_bytes(model: nn.Module, precision: str) -> int:
    """Storage counted from the torch module. fp32/fp16: every parameter at the precision. int8, the
    integer-only scheme (Jacob et al., CVPR 2018, §2.2-2.4; per-channel weights as in Krishnamoorthi
    2018): conv and dense weights at 1 byte; batch norm folded into the conv; each conv or dense
    output channel keeps an int32 bias and an int32 requantization multiplier (8 bytes)."""
    size = {"fp32": 4, "fp16": 2, "int8": 1}[precision]
    if precision != "int8":
        return size * sum(p.numel() for p in model.parameters())
    layers = [m for m in model.modules() if isinstance(m, (nn.Conv2d, nn.Linear))]
    return sum(m.weight.numel() + 8 * m.weight.shape[0] for m in layers)


@pytest.mark.parametrize("text", [ARCH, "1x16x16_c4k3-a2_gap-d5-o3_tanh", "3x8x8_c2k1_flat-o2_relu"])
@pytest.mark.parametrize("precision", ["fp32", "fp16", "int8"])
def test_weight_bytes_rule(text, precision):
    arch = parse_arch(text)
    assert cost(arch).weight_bytes(precision) == torch_weight_bytes(searcher.build(arch), precision)


def test_int8_weight_bytes_by_hand():
    # conv 1->4 3x3, batch norm folded in: 36 weights (1 B each) + 4 channels x (int32 bias + int32 multiplier);
    # dense 4->2: 8 weights (1 B) + 2 channels x 8 B
    assert cost(parse_arch("1x8x8_c4k3_gap-o2_relu_bn")).weight_bytes("int8") == 36 + 4 * 8 + 8 + 2 * 8
    # without batch norm the conv's bias takes the same 8 B per channel
    assert cost(parse_arch("1x8x8_c4k3_gap-o2_relu")).weight_bytes("int8") == 36 + 4 * 8 + 8 + 2 * 8
