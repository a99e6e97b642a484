"""The int8 C file on emulated Cortex-M cores: scores, sizes, stack and instruction counts.

Outside sources, named beside each check:
* Debian's arm-none-eabi-gcc and arm-none-eabi-size (the ARM object's sections, gcc's call graph);
* QEMU's qemu-system-arm: its manual's -icount (shift=0: one instruction per ns of virtual time),
  and the boards' system clocks that QEMU models from Arm's application notes (AN385/AN386/AN500:
  25 MHz; AN547: 32 MHz; from memory);
* the Arm v7-M Architecture Reference Manual: SUBS, ADDS and BNE are one instruction each;
* the integer reference (itself checked against torch and onnxruntime in tests/test_int8.py).

Emulated runs are few and small (tiny candidates, a handful of images) and every QEMU run has a timeout.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import torch

from searcher.core.arch import ACTIVATIONS, parse_arch
from searcher.core.cost import cost
from searcher.core.latency import parse_target
from searcher.int8 import reference as int8_reference
from searcher.int8.quantize import to_pixels
from searcher.ship import arm_build, c_build, deploy_files, emulate
from searcher.ship.arm_build import CORES
from searcher.ship.c_source import generate
from searcher.ship.model_card import int8_section

from conftest import SHIPPED_SPACES
from test_int8 import images_for, random_net, seeded_model, small_candidate

SMALL = "1x8x8_c4k3-m2_c8k3_flat-o3_relu_bn"  # a few thousand MACs: emulates in well under a second
M4 = CORES[1]
SYSTEM_CLOCK_HZ = {"mps2-an385": 25e6, "mps2-an386": 25e6, "mps2-an500": 25e6, "mps3-an547": 32e6}  # from memory


@pytest.fixture(scope="module")
def tools():
    found = arm_build.arm_tools()
    if found is None:
        pytest.skip("the ARM tools are needed (Debian: apt-get install gcc-arm-none-eabi libnewlib-arm-none-eabi "
                    "qemu-system-arm)")
    return found


def emulated(arch_text: str, core, tools, folder: Path, count: int = 6, profile: bool = True):
    arch = parse_arch(arch_text) if isinstance(arch_text, str) else arch_text
    _, net = random_net(arch)
    pixels = to_pixels(images_for(arch, count))
    expected = int8_reference.scores(net, pixels)
    code = generate(net)
    profiled = generate(net, profile=True) if profile else None
    run = emulate.run_core(code, profiled, core, tools, folder, pixels, expected)
    return arch, net, code, run


COUNTED = r"""
#include <stdint.h>
void counted_loop(uint32_t iterations);  /* start.S: subs, bne */
void three_loop(uint32_t iterations);    /* three.S: adds, subs, bne */
int semihost(uint32_t operation, const void *block);
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)
int main(void)
{
    static const char name[] = "out.bin";
    uint32_t block[3], t[4], i;
    int out;
    *(volatile uint32_t *)0xE000E014u = 0xFFFFFFu;
    SYST_CVR = 0;
    *(volatile uint32_t *)0xE000E010u = 5u;  /* processor clock, no interrupt: these loops stay below one wrap */
    while (SYST_CVR == 0) {}
    for (i = 0; i < 4; ++i) {
        uint32_t before = SYST_CVR;
        if (i < 2) counted_loop(i ? 1100000u : 100000u); else three_loop(i == 3 ? 1000000u : 500000u);
        t[i] = before - SYST_CVR;
    }
    block[0] = (uint32_t)name; block[1] = 4; block[2] = sizeof name - 1;
    out = semihost(0x01, block);
    block[0] = (uint32_t)out; block[1] = (uint32_t)t; block[2] = sizeof t;
    return semihost(0x05, block) || semihost(0x02, &out);
}
"""

THREE = """\
    .syntax unified
    .thumb
    .text
    .global three_loop
    .thumb_func
three_loop:
1:  adds r1, r1, #1
    subs r0, r0, #1
    bne 1b
    bx lr
"""


@pytest.mark.parametrize("core", CORES[1:2] + CORES[3:4], ids=lambda c: c.name)
def test_counted_loops_turn_ticks_into_instructions(tools, core, tmp_path):
    """The two-instruction loop gives instructions per SysTick tick; a three-instruction loop of known length,
    timed the same way, then counts its own instructions."""
    (tmp_path / "counted.c").write_text(COUNTED, encoding="utf-8")
    (tmp_path / "three.S").write_text(THREE, encoding="utf-8")
    program = arm_build.link(core, tools, tmp_path, ("counted.c", "three.S"))
    ticks = np.frombuffer(emulate.run_program(tools, core, program, np.zeros((0, 1), np.uint8), timeout=60), "<u4")
    rate = arm_build.LOOP_INSTRUCTIONS * 1_000_000 / (int(ticks[1]) - int(ticks[0]))
    # QEMU's manual: -icount shift=0 runs one instruction per ns; SysTick counts the board's system clock
    assert rate == pytest.approx(1e9 / SYSTEM_CLOCK_HZ[core.board], abs=0.01)
    # Arm v7-M ARM: adds, subs, bne are one instruction each: 3 per iteration, within one tick
    assert (int(ticks[3]) - int(ticks[2])) * rate == pytest.approx(3 * 500_000, abs=2 * rate)


def test_m4_gives_the_reference_scores_and_the_analytic_sizes(tools, tmp_path):
    arch, net, code, run = emulated(SMALL, M4, tools, tmp_path)
    assert isinstance(run, emulate.CoreRun) and run.images == 6  # run_core raises on any score that differs
    analytic = cost(arch, "int8")
    # arm-none-eabi-size -A: .bss of the arena and .rodata of the arrays equal the analytic figures
    assert run.footprint.arena == analytic.peak_activation_bytes
    assert run.footprint.constant_bytes == analytic.weight_bytes("int8") + 256 * len(code.tables)
    assert run.footprint.code > 0 and not any(k.startswith((".data", ".bss")) for k in run.footprint.other_data)
    # the painted stack the call overwrote stays within gcc's call-graph bound, and is not far below it
    assert 0.5 * run.footprint.stack <= run.stack_used <= run.footprint.stack
    assert run.per_tick == 40.0  # AN386: 25 MHz; QEMU -icount shift=0: 1 ns per instruction
    # one row per layer, plus the input copy and the output; they add up to the total (the profiled
    # build adds a clock reading per layer, a few dozen instructions each, and the clock ticks every 40)
    assert [name for name, _ in run.layers] == ["input", *(layer.name for layer in net.layers), "output"]
    total = sum(n for _, n in run.layers)
    assert abs(total - run.instructions) <= 60 * len(run.layers)
    assert run.fewest <= run.instructions <= run.most


def test_instruction_counts_repeat_exactly(tools, tmp_path):
    # QEMU -icount: the count depends on the instructions executed only, never on the host's timing
    first = emulated(SMALL, M4, tools, tmp_path / "a", profile=False)[3]
    second = emulated(SMALL, M4, tools, tmp_path / "b", profile=False)[3]
    assert (first.instructions, first.fewest, first.most) == (second.instructions, second.fewest, second.most)


@pytest.mark.slow
@pytest.mark.parametrize("core", CORES, ids=lambda c: c.name)
def test_every_core_gives_the_reference_scores(tools, core, tmp_path):
    arch, _, _, run = emulated("1x9x9_c4k3-a3s2_c6k3v-m2_gap-d5-o3_hardswish", core, tools, tmp_path, count=4)
    assert run.footprint.arena == cost(arch, "int8").peak_activation_bytes
    assert run.per_tick == pytest.approx(1e9 / SYSTEM_CLOCK_HZ[core.board], abs=0.01)


@pytest.mark.slow
@pytest.mark.parametrize("activation", ACTIVATIONS)
@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_every_shipped_space_and_activation_gives_the_reference_scores_on_the_m4(tools, shipped, name, activation,
                                                                                  tmp_path):
    """The DSP kernels (SMLAD) on the emulated M4, as tests/test_int8.py checks the plain C99 ones with gcc."""
    arch = small_candidate(shipped[name], activation, seed=1)
    _, _, code, run = emulated(arch, M4, tools, tmp_path, count=3, profile=False)
    assert run.images == 3  # run_core raises on any score that differs from the reference
    analytic = cost(arch, "int8")
    assert run.footprint.arena == analytic.peak_activation_bytes
    assert run.footprint.constant_bytes == analytic.weight_bytes("int8") + 256 * len(code.tables)


def test_a_program_that_never_ends_is_stopped(tools, tmp_path):
    (tmp_path / "spin.c").write_text("int main(void) { for (;;) {} }\n", encoding="utf-8")
    program = arm_build.link(M4, tools, tmp_path, ("spin.c",))
    with pytest.raises(RuntimeError, match="still ran after 2 s"):
        emulate.run_program(tools, M4, program, np.zeros((0, 1), np.uint8), timeout=2)


def test_a_fault_ends_the_run_at_once(tools, tmp_path):
    # a read from an address no board maps faults; the start-up code's handler exits QEMU with status 1
    (tmp_path / "fault.c").write_text("int main(void) { return *(volatile int *)0xF0000000u; }\n", encoding="utf-8")
    program = arm_build.link(M4, tools, tmp_path, ("fault.c",))
    with pytest.raises(RuntimeError, match="harness failed"):
        emulate.run_program(tools, M4, program, np.zeros((0, 1), np.uint8), timeout=60)


def test_stack_bound_is_the_deepest_chain_of_gcc_frames(tmp_path):
    """gcc -fstack-usage: the bound is the frames of the deepest chain, not every frame added up."""
    found = c_build.tools()
    if found is None:
        pytest.skip("gcc is needed (Debian: apt-get install gcc)")
    (tmp_path / "chain.c").write_text(
        "#define NOINLINE __attribute__((noinline))\n"
        "NOINLINE static int leaf(volatile char *p) { volatile char b[300]; b[0] = p[0]; return b[0]; }\n"
        "NOINLINE static int middle(void) { volatile char b[200]; b[1] = 1; return leaf(b) + b[1]; }\n"
        "NOINLINE static int side(void) { volatile char b[1000]; b[2] = 2; return b[2]; }\n"
        "int model_classify(void) { return middle() + side(); }\n", encoding="utf-8")
    c_build._run([found.gcc, "-O2", "-fstack-usage", "-fcallgraph-info=su", "-c", "chain.c"], tmp_path)
    frames = {line.split("\t")[0].split(":")[-1].split(".")[0]: int(line.split("\t")[1])
              for line in (tmp_path / "chain.su").read_text().splitlines()}
    bound, library = c_build.stack_bound((tmp_path / "chain.ci").read_text())
    assert library == ()
    assert bound == frames["model_classify"] + max(frames["middle"] + frames["leaf"], frames["side"])
    assert bound < sum(frames.values())


def test_without_the_arm_tools_the_check_is_skipped(monkeypatch):
    monkeypatch.setattr(arm_build, "arm_tools", lambda: None)
    arch = parse_arch(SMALL)
    _, net = random_net(arch)
    runs, line = deploy_files.check_arm(generate(net), net, np.zeros((1, *arch.input_shape), np.uint8),
                                        np.zeros((1, net.classes), np.int8))
    assert runs == () and line.startswith("ARM check skipped") and "apt-get install gcc-arm-none-eabi" in line


def test_deploy_files_report_every_core_in_metrics_and_card(tools, tmp_path):
    arch = parse_arch(SMALL)
    model = seeded_model(arch, 0)
    images = torch.rand(6, *arch.input_shape, generator=torch.Generator().manual_seed(0))
    report = deploy_files.write_deploy_files(tmp_path, model, arch, images, images, torch.zeros(6, dtype=torch.int64),
                                             ("a", "b", "c"))
    metrics = json.loads(json.dumps(report.metrics()))
    for core in CORES:
        key = core.name.replace("-", "_")
        assert metrics[f"instructions_{key}"] > 0
        assert metrics[f"bss_bytes_{key}"] == cost(arch, "int8").peak_activation_bytes
        layers = {"input", "s1_conv1", "s1_pool", "s2_conv1", "out", "output"}
        assert set(metrics[f"instructions_per_layer_{key}"]) == layers
    assert metrics["int8"]["arm_check"].startswith("ARM builds checked")
    card = int8_section(report, arch, parse_target("cortex-m4@80MHz"))
    assert "On Cortex-M cores (emulated)" in card and "| cortex-m55 (mps3-an547) |" in card
    assert "instructions emulated | predicted |" in card and "On the target, cortex-m4@80MHz:" in card
    m4 = metrics["instructions_cortex_m4"]
    # the latency model (searcher.core.latency) beside QEMU's count; tests/test_latency.py bounds its error
    assert metrics["predicted_instructions_cortex_m4"] == pytest.approx(m4, rel=0.25)
    conv_row = next(line for line in card.splitlines() if line.startswith("| s1_conv1 | "))
    assert conv_row.count(" / ") == len(CORES)  # per layer and core: emulated / predicted
    assert not any(p.name in ("start.S", "link.ld", "harness.c") for p in tmp_path.iterdir())  # scratch only
