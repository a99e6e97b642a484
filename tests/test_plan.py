"""The lowered plan against torch: every layer's shapes, the padding rule and the window arithmetic.

Outside reference: torch itself (``torch.nn.functional`` convs and pools, the built module's
forward hooks, and ``nn.Conv2d(padding="same")``).
"""

from __future__ import annotations

import random

import pytest
import torch
import torch.nn.functional as F
from hypothesis import given, settings
from hypothesis import strategies as st

import searcher
from searcher.core.arch import parse_arch
from searcher.core.plan import lower, padding_of, window_output
from searcher.errors import SearcherError

from conftest import SHIPPED_SPACES

DRAWS = 12  # seeded draws per shipped space
MAX_PARAMS = 2_000_000  # larger workstation draws are skipped: building them is slow


@settings(max_examples=150, deadline=None)
@given(size=st.integers(1, 40), kernel=st.integers(1, 9), stride=st.integers(1, 4), data=st.data())
def test_window_output_equals_torch_conv(size, kernel, stride, data):
    padding = data.draw(st.integers(0, kernel))
    expected = window_output(size, kernel, stride, padding)
    x, w = torch.zeros(1, 1, size, size + 1), torch.zeros(1, 1, kernel, kernel)
    if expected < 1:
        with pytest.raises(RuntimeError):  # torch refuses a kernel larger than the padded input
            F.conv2d(x, w, stride=stride, padding=padding)
        return
    # torch.nn.functional.conv2d is the reference for the output length along each axis
    out = F.conv2d(x, w, stride=stride, padding=padding)
    assert tuple(out.shape[2:]) == (expected, window_output(size + 1, kernel, stride, padding))


@settings(max_examples=150, deadline=None)
@given(size=st.integers(1, 40), window=st.integers(1, 6), stride=st.integers(1, 6), kind=st.sampled_from(["max", "avg"]))
def test_pool_output_size_equals_torch_pool(size, window, stride, kind):
    expected = window_output(size, window, stride, 0)
    if expected < 1:
        return  # such pools are refused by cost() (see test_shrinking_below_one_pixel_is_refused)
    pool = F.max_pool2d if kind == "max" else F.avg_pool2d
    # torch's pooling in floor mode (ceil_mode=False, its default) is the reference
    out = pool(torch.zeros(1, 2, size, size), window, stride)
    assert out.shape[2] == expected


@settings(max_examples=60, deadline=None)
@given(size=st.integers(1, 30), kernel=st.sampled_from([1, 3, 5, 7, 9]))
def test_same_padding_equals_torch_same(size, kernel):
    x, w = torch.zeros(1, 1, size, size), torch.zeros(1, 1, kernel, kernel)
    # torch's padding="same" (stride 1) keeps the size; ours pads kernel // 2 on each side to the same end
    same = F.conv2d(x, w, padding="same").shape[2:]
    ours = F.conv2d(x, w, padding=padding_of(kernel, "same")).shape[2:]
    assert same == ours == (size, size)
    assert padding_of(kernel, "valid") == 0


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_every_layer_reads_and_writes_the_shapes_torch_sees(shipped, name):
    rng = random.Random(7)
    space = shipped[name]
    for _ in range(DRAWS):
        arch = space.random(rng.randrange(10**6))
        plan = lower(arch)
        if searcher.cost(arch).params > MAX_PARAMS:
            continue
        model = searcher.build(arch).eval()
        seen: dict[str, tuple] = {}
        for module_name, module in model.named_children():
            module.register_forward_hook(
                lambda m, i, o, n=module_name: seen.__setitem__(n, (tuple(i[0].shape[1:]), tuple(o.shape[1:]))))
        with torch.no_grad():
            model(torch.zeros(1, *arch.input_shape))
        # torch's forward hooks: each planned layer's module reads and writes exactly the planned shapes
        assert {layer.name: (layer.input, layer.output) for layer in plan} == \
            {n: seen[n] for n in (layer.name for layer in plan)}
        assert plan[0].input == tuple(arch.input_shape) and plan[-1].output == (arch.head.classes,)


def test_module_names_follow_the_plan():
    arch = parse_arch("1x16x16_c8k3-m2_c16k5-a2_flat-d32-d16-r0.2-o8_hardswish_bn")
    names = [n for n, _ in searcher.build(arch).named_children()]
    assert names == ["s1_conv1", "s1_bn1", "s1_act1", "s1_pool", "s2_conv1", "s2_bn1", "s2_act1", "s2_pool",
                     "flatten", "fc1", "fc1_act", "fc1_drop", "fc2", "fc2_act", "fc2_drop", "out"]
    no_hidden = parse_arch("1x8x8_c4k3_gap-r0.3-o2_relu")
    assert [n for n, _ in searcher.build(no_hidden).named_children()] == ["s1_conv1", "s1_act1", "gap", "drop", "out"]


def test_a_map_shrunk_below_one_pixel_names_the_stage():
    with pytest.raises(SearcherError, match="stage 2 conv 1 shrinks a 1x1 map"):
        lower(parse_arch("1x4x4_c4k3v-m2_c4k3v_gap-o2_relu"))
