"""The architecture's text form and JSON form: round trips and refusals."""

from __future__ import annotations

import json

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.core.arch import ACTIVATIONS, Arch, Conv, Head, Pool, Stage, parse_arch
from searcher.errors import SearcherError

from conftest import SHIPPED_SPACES


@st.composite
def convs(draw) -> Conv:
    padding = draw(st.sampled_from(["same", "valid"]))
    kernel = draw(st.integers(1, 4).map(lambda k: 2 * k - 1) if padding == "same" else st.integers(1, 7))
    return Conv(draw(st.integers(1, 512)), kernel, draw(st.integers(1, 3)), padding)


@st.composite
def archs(draw) -> Arch:
    """Any valid Arch object, including shapes the census would never draw (text form is shape-blind)."""
    pools = st.none() | st.builds(Pool, st.sampled_from(["max", "avg"]), st.integers(1, 4), st.integers(1, 4))
    stages = st.lists(st.builds(Stage, st.lists(convs(), min_size=1, max_size=3).map(tuple), pools), max_size=4)
    head = st.builds(
        Head,
        st.sampled_from(["flatten", "gap"]),
        st.lists(st.integers(1, 4096), max_size=3).map(tuple),
        st.floats(0.0, 1.0, exclude_max=True, allow_nan=False) | st.sampled_from([0.0, 0.25, 0.5, 1e-5]),
        st.integers(1, 1000),
    )
    return Arch(
        (draw(st.integers(1, 4)), draw(st.integers(1, 256)), draw(st.integers(1, 256))),
        tuple(draw(stages)),
        draw(head),
        draw(st.sampled_from(ACTIVATIONS)),
        draw(st.booleans()),
    )


@settings(deadline=None)
@given(archs())
def test_text_round_trip_of_any_arch(arch):
    text = arch.to_text()
    assert parse_arch(text) == arch
    assert " " not in text and text == str(arch)


@settings(deadline=None)
@given(archs())
def test_json_round_trip_of_any_arch(arch):
    assert Arch.from_json(arch.to_json()) == arch
    assert parse_arch(arch.to_json()) == arch  # JSON text is accepted wherever the text form is
    assert json.loads(arch.to_json())["activation"] == arch.activation


@pytest.mark.parametrize("name", SHIPPED_SPACES)
@settings(max_examples=60, deadline=None)
@given(seed=st.integers(0, 2**32))
def test_round_trips_of_archs_from_every_space(shipped, name, seed):
    arch = shipped[name].random(seed)
    assert parse_arch(arch.to_text()) == arch
    assert Arch.from_json(arch.to_json()) == arch


def test_text_form_reads_as_documented():
    arch = parse_arch("3x40x48_c16k3s2-c16k5v-m3s2_c32k1-a2_gap-d64-r0.25-o7_hardswish_bn")
    assert arch.input_shape == (3, 40, 48)
    assert arch.stages[0].convs == (Conv(16, 3, 2, "same"), Conv(16, 5, 1, "valid"))
    assert arch.stages[0].pool == Pool("max", 3, 2)
    assert arch.stages[1].pool == Pool("avg", 2, 2)  # stride defaults to the window
    assert arch.head == Head("gap", (64,), 0.25, 7)
    assert (arch.activation, arch.batch_norm, arch.depth, arch.conv_count, arch.widths) == (
        "hardswish", True, 2, 3, (16, 32))


def test_arch_without_stages_round_trips():
    arch = parse_arch("1x8x8_flat-o2_sigmoid")
    assert arch.stages == () and parse_arch(arch.to_text()) == arch


@pytest.mark.parametrize(
    ("text", "says"),
    [
        ("1x32x32_c8k3_gap-o10", "too few fields|activation"),
        ("1x32_c8k3_gap-o10_relu", "CxHxW"),
        ("1x32x32_c8k3_gap-o10_relu7", "did you mean 'relu'"),
        ("1x32x32_c8q3_gap-o10_relu", "neither a conv"),
        ("1x32x32_m2-c8k3_gap-o10_relu", "nothing may follow the pool"),
        ("1x32x32_m2_gap-o10_relu", "nothing may follow|has no conv"),
        ("1x32x32_c8k3_flatten-o10_relu", "head must start"),
        ("1x32x32_c8k3_gap-x5-o10_relu", "head token 'x5'"),
        ("1x32x32_c8k3_gap-d64_relu", "o<classes>"),
        ("1x32x32_c8k4_gap-o10_relu", "odd kernel"),
        ("1x32x32_c0k3_gap-o10_relu", "whole number from 1 to 4,096, got 0"),
        ("1x32x32_c8k3_gap-r1.5-o10_relu", "dropout"),
        ("{not json", "does not parse"),
        ('{"stages": []}', "has no field 'head'"),
        # sizes beyond 64 bits or beyond searcher.limits (issue 8: OverflowError, a 2 TiB allocation)
        ("1x18446744073709551617x16_c4k3_gap-o4_relu", "input side must be a whole number from 1 to 1,024"),
        ("1x16x16_c4097k3_gap-o4_relu", "conv width must be a whole number from 1 to 4,096, got 4097"),
        ("1x16x16_c4k33_gap-o4_relu", "kernel must be a whole number from 1 to 31"),
        ("1x16x16_c4k3_gap-d5000-o4_relu", "hidden width"),
        ("1x16x16_c4k3_gap-o100001_relu", "class count must be a whole number from 1 to 100,000"),
        ("1x16x16_c4k3-m1025_gap-o4_relu", "stride or pool window"),
        ("1x16x16_" + "_".join(["c4k3"] * 11) + "_gap-o4_relu", "at most 10 stages"),
        ("1x16x16_" + "-".join(["c4k3"] * 11) + "_gap-o4_relu", "at most 10, got 11"),
        ("1x1" + "9" * 5000 + "x1_gap-o2_relu", "more than 100 digits"),
        ('{"input_shape": [1, ' + "9" * 5000 + ', 8]}', "does not parse"),
        ('{"input_shape": [1, 8, 8], "stages": [], "head": [1, 2]}', "field of the wrong kind"),
        ('{"input_shape": [1, 8, 8], "stages": [{"convs": [{"out_channels": "4", "kernel": 3}]}], "head": '
         '{"features": "gap"}}', "conv width must be a whole number"),
    ],
)
def test_bad_text_raises_user_error(text, says):
    with pytest.raises(SearcherError, match=says):
        parse_arch(text)


@pytest.mark.parametrize(
    ("make", "says"),
    [
        (lambda: Arch((1, 8, 8), (), Head("gap"), activation="gelu"), "activation"),
        (lambda: Arch((1, 8, 8), (), Head("gapp")), "did you mean 'gap'"),
        (lambda: Arch((1, 8, 8), (Stage((Conv(4, 3, padding="full"),)),), Head("gap")), "padding"),
        (lambda: Arch((1, 8, 8), (Stage((Conv(4, 3),), Pool("mx")),), Head("gap")), "did you mean 'max'"),
        (lambda: Arch((1, 8, 8), (Stage(()),), Head("gap")), "at least one conv"),
        (lambda: Arch((1, 8, 8), (), Head("gap", dropout=1.0)), "dropout"),
        (lambda: Arch((1, 8, 8), (), Head("gap", classes=0)), "class count must be a whole number from 1"),
    ],
)
def test_invalid_arch_objects_are_refused(make, says):
    with pytest.raises(SearcherError, match=says):
        make()
