"""The analytic cost against the real torch module, for many seeded draws from every space.

Each check compares searcher's arithmetic with what torch itself reports for the module that
``searcher.model.build`` makes: parameter and buffer counts, FLOPs from
``torch.utils.flop_counter.FlopCounterMode``, and tensor shapes seen by forward hooks.
"""

from __future__ import annotations

import pytest
import torch
from torch.utils.flop_counter import FlopCounterMode

import searcher
from searcher.core.arch import Arch
from searcher.core.cost import Cost, cost

from conftest import SHIPPED_SPACES

DRAWS = 40  # seeded random architectures per shipped space
MAX_BUILD_PARAMS = 5_000_000  # workstation draws above this are skipped: building them is slow
SPATIAL_KINDS = ("conv", "maxpool", "avgpool", "gap", "dense")  # layers whose input+output is alive


@pytest.fixture(autouse=True, scope="module")
def one_thread():
    """Tiny forwards run faster on one thread, and do not fight other test processes for cores."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def measure(arch: Arch) -> dict:
    """Run a batch-1 forward of the built module and record what torch sees."""
    model = searcher.build(arch).eval()
    shapes: dict[str, tuple[int, ...]] = {}
    alive: dict[str, int] = {}

    def hook(name):
        def record(module, inputs, output):
            shapes[name] = tuple(output.shape[1:])
            alive[name] = inputs[0].numel() + output.numel()
        return record

    for name, module in model.named_children():
        module.register_forward_hook(hook(name))
    with torch.no_grad(), FlopCounterMode(display=False) as counter:
        model(torch.zeros(1, *arch.input_shape))
    return {
        "model": model,
        "params": sum(p.numel() for p in model.parameters()),
        "bn_stats": sum(b.numel() for n, b in model.named_buffers() if n.endswith(("running_mean", "running_var"))),
        "flops": counter.get_total_flops(),
        "shapes": shapes,
        "alive": alive,
    }


def assert_matches_torch(arch: Arch, analytic: Cost) -> None:
    real = measure(arch)
    # torch: Module.parameters() holds every trainable tensor
    assert analytic.params == real["params"], arch
    # torch: BatchNorm2d keeps running_mean and running_var buffers of C values each
    assert analytic.buffers == real["bn_stats"], arch
    # torch: FlopCounterMode counts 2 FLOPs per multiply-accumulate of conv and matmul
    assert 2 * analytic.macs == real["flops"], arch
    names = [layer.name for layer in analytic.layers]
    for layer in analytic.layers:
        assert real["shapes"][layer.name] == layer.output_shape, (arch, layer.name)
    # every module outside the cost table is an activation or dropout, with nothing to train
    for name, module in real["model"].named_children():
        if name not in names:
            assert ("_act" in name or "drop" in name) and not list(module.parameters()), name
    peak = max(real["alive"][layer.name] for layer in analytic.layers if layer.kind in SPATIAL_KINDS)
    assert analytic.peak_activation_elements == peak, arch


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_analytic_cost_equals_torch_on_random_draws(shipped, name):
    checked = 0
    for seed in range(DRAWS):
        arch = shipped[name].random(seed)
        analytic = cost(arch)
        if analytic.params > MAX_BUILD_PARAMS:
            continue
        assert_matches_torch(arch, analytic)
        checked += 1
    assert checked >= DRAWS // 2, f"only {checked} of {DRAWS} draws were small enough to build"


@pytest.mark.parametrize(
    "text",
    [
        "1x28x28_c8k3-m2_gap-o10_relu",
        "3x17x23_c5k3s2-c7k5v-a3s2_c9k1-m2s1_flat-d11-d6-r0.3-o4_hardswish_bn",
        "2x9x9_c4k4v_c3k1s3_flat-r0.5-o3_sigmoid",
        "1x8x8_flat-d5-o2_relu6",
        "1x6x6_c2k7s4_gap-d3-o2_tanh_bn",
    ],
)
def test_analytic_cost_equals_torch_on_odd_shapes(text):
    """Strides, valid padding, overlapping and non-square pooling, no stages: cases the spaces rarely draw."""
    arch = searcher.parse_arch(text)
    assert_matches_torch(arch, cost(arch))


def test_built_module_runs_a_batch_and_trains():
    arch = searcher.parse_arch("1x16x16_c4k3-m2_c8k3_flat-d16-r0.2-o3_relu_bn")
    model = searcher.build(arch).train()
    out = model(torch.randn(5, 1, 16, 16, generator=torch.Generator().manual_seed(0)))
    assert out.shape == (5, 3)
    out.sum().backward()
    assert all(p.grad is not None for p in model.parameters())
