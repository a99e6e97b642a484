"""The latency model: its counts, its data file, its targets, and its error against emulation.

Outside sources, named beside each check:
* direct enumeration of every output position and kernel tap (the counts' closed forms);
* searcher.core.cost's MACs, themselves checked against torch's FlopCounterMode (tests/test_build.py);
* QEMU's instruction counts of the C file (qemu-system-arm -icount shift=0, tests/test_target.py
  checks the counting) on candidates the coefficients were not fitted on.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from searcher.core import latency
from searcher.core.arch import parse_arch
from searcher.core.cost import cost
from searcher.core.plan import lower, window_output
from searcher.errors import SearcherError
from searcher.ship import arm_build
from searcher.ship.c_source import kernel_fingerprint

from conftest import SHIPPED_SPACES
from test_target import emulated


def test_the_coefficients_were_fitted_on_these_kernels():
    # a change to the generated C needs a new fit: python benchmarks/bench_latency.py fit
    assert latency._data()["kernels"] == kernel_fingerprint()


def test_every_emulated_core_has_every_coefficient():
    assert set(latency.cores()) == set(arm_build.CORE_NAMES)
    for core in latency.cores():
        assert set(latency._data()["coefficients"][core]) == set(latency.TERMS)
        assert all(v >= 0 for v in latency._data()["coefficients"][core].values())


@pytest.mark.parametrize("size,kernel,stride,pad", list(itertools.product((1, 2, 5, 8, 13), (1, 3, 5, 7), (1, 2, 3),
                                                                          (0, 1, 2, 3))))
def test_window_counts_equal_direct_enumeration(size, kernel, stride, pad):
    out = window_output(size, kernel, stride, pad)
    if out < 1:
        return
    starts = [o * stride - pad for o in range(out)]
    # direct enumeration: windows wholly inside, and taps that land inside, over the output positions
    assert latency.inside(size, out, kernel, stride, pad) == sum(0 <= s and s + kernel <= size for s in starts)
    assert latency.taps(size, out, kernel, stride, pad) == sum(0 <= s + k < size for s in starts for k in range(kernel))


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_conv_counts_add_up_to_the_macs_inside_the_map(shipped, name):
    """Four channels per group times the bytes read, plus the channels left over, is every in-map product:
    cost()'s MACs when nothing is padded (searcher.core.cost, checked against torch elsewhere)."""
    for seed in range(20):
        arch = shipped[name].random(seed)
        for layer in lower(arch):
            if layer.kind != "conv":
                continue
            (c, h, w), (c2, h2, w2) = layer.input, layer.output
            t = latency.conv_terms(h, w, c, h2, w2, c2, layer.kernel, layer.stride, layer.padding, False)
            family = "conv_narrow" if c < 4 else "conv"
            inner = 4 * t[f"{family}.words"] + t[f"{family}.tail_bytes"] + sum(
                t[f"conv_k{k}c{i}.inner"] * k * k * i for k, i in latency.FIRST_LAYERS)
            products = 4 * (inner + t[f"{family}.edge_bytes"]) + t[f"{family}.rest_bytes"]
            in_map = c2 * c * latency.taps(h, h2, layer.kernel, layer.stride, layer.padding) \
                * latency.taps(w, w2, layer.kernel, layer.stride, layer.padding)
            assert products == in_map
            if layer.padding == 0:
                assert in_map == h2 * w2 * c2 * c * layer.kernel ** 2


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_the_formulas_on_arrays_equal_the_formulas_on_ints(shipped, name):
    """The census applies them to arrays of candidates: each entry must equal the scalar count."""
    rows = []
    for seed in range(30):
        for layer in lower(shipped[name].random(seed)):
            if layer.kind == "conv":
                (c, h, w), (c2, h2, w2) = layer.input, layer.output
                rows.append((h, w, c, h2, w2, c2, layer.kernel, layer.stride, layer.padding, seed % 2 == 0))
    columns = [np.array(col) for col in zip(*rows)]
    batch = latency.conv_terms(*columns)
    for i, row in enumerate(rows):
        single = latency.conv_terms(*row)
        assert {k: int(v[i]) for k, v in batch.items()} == {k: int(v) for k, v in single.items()}
        assert latency.instructions("cortex-m4", single) == pytest.approx(latency.instructions("cortex-m4", batch)[i])


def test_prediction_has_a_row_per_layer_and_grows_with_the_work():
    target = latency.parse_target("cortex-m4@80MHz")
    small = latency.predict(parse_arch("1x24x24_c4k3-m2_c8k3-m2_flat-o8_relu_bn"), target)
    large = latency.predict(parse_arch("1x24x24_c8k3-m2_c16k3-m2_flat-o8_relu_bn"), target)
    plan = [x.name for x in lower(parse_arch("1x24x24_c4k3-m2_c8k3-m2_flat-o8_relu_bn")) if x.kind != "flatten"]
    assert [name for name, _ in small.rows] == ["input", *plan, "output"]
    assert 0 < small.instructions < large.instructions
    assert small.seconds == pytest.approx(small.instructions / 80e6)  # one cycle per instruction at 80 MHz


@pytest.mark.parametrize("text,core,hz", [("cortex-m4@80MHz", "cortex-m4", 80e6),
                                          ("Cortex-M7@216MHz", "cortex-m7", 216e6),
                                          (" cortex-m55 @ 0.4GHz ", "cortex-m55", 4e8),
                                          ("cortex-m3@48000kHz", "cortex-m3", 48e6)])
def test_targets_are_read(text, core, hz):
    assert latency.parse_target(text) == latency.Target(core, hz)
    assert latency.parse_target(latency.parse_target(text).text()) == latency.parse_target(text)


@pytest.mark.parametrize("text,says", [("cortex-m4", "a core and a clock"), ("cortex-m4@", "a clock such as"),
                                       ("cortex-m0@48MHz", "cortex-m3"), ("cortex-m4@80", "a clock such as"),
                                       ("cortex-m4@0Hz", "from 1 kHz"), (80, "a core and a clock"),
                                       ("cortex-m4@80MHz@1GHz", "a core and a clock")])
def test_bad_targets_are_refused_naming_the_key(text, says):
    with pytest.raises(SearcherError, match=f"`--target`.*{says}"):
        latency.parse_target(text, "--target")


UNSEEN_SEED = 900_000  # the fit drew from 100,000 on; the fitted architectures are listed in the data file
DRAWS = 200  # the two candidates emulated per space are the smallest of this many unseen draws: quick to emulate


@pytest.mark.slow
@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_prediction_is_within_ten_percent_of_emulation_on_unseen_candidates(shipped, name, tmp_path):
    """QEMU's count of the exact C file on the M4 and the M3 against the model, for two small candidates of
    each shipped space that the coefficients were not fitted on (benchmarks/bench_latency.py checks 25)."""
    tools = arm_build.arm_tools()
    if tools is None:
        pytest.skip("the ARM tools are needed (Debian: apt-get install gcc-arm-none-eabi libnewlib-arm-none-eabi "
                    "qemu-system-arm)")
    fitted = set(latency._data()["fitted_on"])
    draws = [shipped[name].random(seed) for seed in range(UNSEEN_SEED, UNSEEN_SEED + DRAWS)]
    picked = sorted((arch for arch in draws if arch.to_text() not in fitted), key=lambda arch: cost(arch).macs)[:2]
    for arch, core in itertools.product(picked, (arm_build.CORES[1], arm_build.CORES[0])):
        run = emulated(arch, core, tools, tmp_path / f"{core.name}-{len(list(tmp_path.iterdir()))}", count=1,
                       profile=False)[3]
        predicted = latency.predict(arch, latency.Target(core.name, 1e8)).instructions
        assert abs(predicted / run.instructions - 1) <= 0.10, (arch.to_text(), core.name, predicted, run.instructions)


def test_a_target_table_is_read_and_its_mistakes_named(tmp_path):
    assert latency.target_from_table({"core": "cortex-m7", "clock": "216MHz"}) == latency.Target("cortex-m7", 216e6)
    for table, key in (({"core": "cortex-m7"}, "target.clock"), ({"clock": "80MHz"}, "target.core"),
                       ({"core": "m4", "clock": "80MHz"}, "target.core"), ({"core": "cortex-m4", "clock": 80}, "target.clock")):
        with pytest.raises(SearcherError, match=f"`{key}`") as caught:
            latency.target_from_table(table, "space.toml")
        assert caught.value.file == "space.toml"
