"""Requantization on edge values, against the published integer-only arithmetic.

Source: Jacob et al., "Quantization and Training of Neural Networks for Efficient Integer-Arithmetic-Only
Inference" (CVPR 2018), §2.2: the multiplier M = 2^-n·M0 is applied as a fixed-point multiplication,
in the paper's reference code (gemmlowp's fixedpoint.h) the saturating rounding doubling high
multiply followed by the rounding divide by a power of two, both transcribed below from memory.

searcher rounds once: q = round(acc·m / 2^shift), half away from zero, on the exact 64-bit product
(int8/reference.py, and requantize() in the generated C). That is the paper's rounding divide by a
power of two applied to the exact product; the paper's two-step form rounds twice (first to 31
fractional bits) and so may differ by one step where the first rounding tips a tie. Checked here:
the reference equals RoundingDivideByPOT of the exact product, the two-step form is never more than
one step away and equal wherever its first step is exact, and the C function (gcc on this machine,
and arm-none-eabi-gcc under QEMU on the emulated Cortex-M4) equals the reference on every case.
"""

from __future__ import annotations

import itertools
import subprocess
from fractions import Fraction

import numpy as np
import pytest

from searcher.int8.reference import round_shift
from searcher.ship import arm_build, c_build, emulate
from searcher.ship.c_source import requantize_source

INT32_MIN, INT32_MAX = -(2**31), 2**31 - 1


def saturating_rounding_doubling_high_mul(a: int, b: int) -> int:
    """gemmlowp SaturatingRoundingDoublingHighMul (Jacob et al. 2018's reference code, from memory)."""
    if a == b == INT32_MIN:
        return INT32_MAX
    ab = a * b
    nudge = (1 << 30) if ab >= 0 else 1 - (1 << 30)
    total = ab + nudge
    return abs(total) // (1 << 31) * (1 if total >= 0 else -1)  # C++ integer division truncates toward zero


def rounding_divide_by_pot(x: int, exponent: int) -> int:
    """gemmlowp RoundingDivideByPOT (from memory): x / 2^exponent, ties away from zero; any integer width."""
    mask = (1 << exponent) - 1
    remainder = x & mask
    threshold = (mask >> 1) + (1 if x < 0 else 0)
    return (x >> exponent) + (1 if remainder > threshold else 0)


ACCS = (INT32_MIN, INT32_MIN + 1, -(2**30) - 1, -(2**30), -65537, -10, -6, -2, -1, 0, 1, 2, 6, 10, 65537, 2**30,
        2**30 + 1, INT32_MAX - 1, INT32_MAX)
MULTIPLIERS = (1, 2, 3, 2**29, 2**30, 2**30 + 1, 1518500250, 2**31 - 1)  # powers of two make exact ties
SHIFTS = (1, 2, 16, 30, 31, 32, 33, 40, 47, 62)
OUTPUTS = ((0, -128, 127), (-128, -128, 127), (127, -128, 127), (-5, -5, 127), (-128, -128, 40))  # zero, low, high


def reference(acc: int, m: int, shift: int, zero: int, low: int, high: int) -> int:
    """What int8/reference.py computes for one output."""
    return int(np.clip(round_shift(np.array([acc], np.int64) * m, shift)[0] + zero, low, high))


def cases(accs=ACCS, multipliers=MULTIPLIERS, shifts=SHIFTS):
    rng = np.random.default_rng(0)
    grid = list(itertools.product(accs, multipliers, shifts, OUTPUTS))
    random = [(int(a), int(m), int(s), o) for a, m, s, o in zip(
        rng.integers(INT32_MIN, INT32_MAX, 300), rng.integers(1, 2**31, 300), rng.integers(31, 63, 300),
        [OUTPUTS[i] for i in rng.integers(0, len(OUTPUTS), 300)])]
    return [(a, m, s, *o) for a, m, s, o in grid + random]


def test_reference_is_the_rounding_divide_by_a_power_of_two_of_the_exact_product():
    for acc, m, shift in itertools.product(ACCS, MULTIPLIERS, SHIFTS):
        ours = round_shift(np.array([acc * m], np.int64), shift)[0]
        # Jacob et al. 2018 (gemmlowp RoundingDivideByPOT) on the exact product
        assert ours == rounding_divide_by_pot(acc * m, shift)
        exact = Fraction(acc * m, 2**shift)  # and the exact value rounded half away from zero
        assert ours == (1 if exact >= 0 else -1) * int(abs(exact) + Fraction(1, 2))


def test_the_papers_two_step_form_is_at_most_one_step_away():
    for acc, m, shift in itertools.product(ACCS, MULTIPLIERS, [s for s in SHIFTS if s >= 31]):
        ours = rounding_divide_by_pot(acc * m, shift)
        # Jacob et al. 2018: SaturatingRoundingDoublingHighMul, then RoundingDivideByPOT
        theirs = rounding_divide_by_pot(saturating_rounding_doubling_high_mul(acc, m), shift - 31)
        assert abs(ours - theirs) <= 1
        if (acc * m) % 2**31 == 0:  # the first step is exact: one rounding either way
            assert ours == theirs
    # a case where the first step's rounding makes a tie of the second: -68278.39 is -68278, not -68279
    acc, m, shift = -485012, 1209262696, 33
    assert acc * m == -586506918712352 and -68279 < acc * m / 2**shift < -68278.39
    assert rounding_divide_by_pot(acc * m, shift) == -68278
    assert rounding_divide_by_pot(saturating_rounding_doubling_high_mul(acc, m), shift - 31) == -68279


C_MAIN = r"""
#include <stdio.h>
#include <stdint.h>

{requantize}
int main(void)
{{
    long long acc;
    long multiplier;
    int shift, zero, low, high;
    while (scanf("%lld %ld %d %d %d %d", &acc, &multiplier, &shift, &zero, &low, &high) == 6)
        printf("%d\n", requantize((acc_t)acc, (int32_t)multiplier, shift, zero, low, high));
    return 0;
}}
"""


@pytest.mark.parametrize("wide", [False, True], ids=["int32", "int64"])
def test_the_c_function_equals_the_reference_on_edge_values(tmp_path, wide):
    found = c_build.tools()
    if found is None:
        pytest.skip("gcc is needed (Debian: apt-get install gcc)")
    if wide:  # an int64 accumulator: large sums, multipliers with fewer bits (the quantizer keeps acc·m below 2^62)
        accs = (-(2**41), -(2**40) - 3, -(2**33), INT32_MIN - 1, -6, -1, 0, 1, 6, 2**33, 2**40 + 3, 2**41)
        all_cases = cases(accs, (1, 2, 2**19, 2**20 - 1), (1, 20, 31, 32, 33, 40, 61, 62))
    else:
        all_cases = cases()
    (tmp_path / "check.c").write_text(C_MAIN.format(requantize=requantize_source(wide)), encoding="utf-8")
    c_build._run([found.gcc, *c_build.WARNINGS, "-Wno-format", c_build.OPTIMIZE, "check.c", "-o", "check"], tmp_path)
    (tmp_path / "cases.txt").write_text("\n".join(" ".join(map(str, c)) for c in all_cases) + "\n")
    done = subprocess.run([str(tmp_path / "check")], stdin=open(tmp_path / "cases.txt"), capture_output=True,
                          text=True, timeout=60, check=True)
    # gcc: the C function gives exactly the reference's int8 value on every case
    assert [int(v) for v in done.stdout.split()] == [reference(*c) for c in all_cases]


ARM_MAIN = """
#include <stdint.h>

{requantize}
int semihost(uint32_t operation, const void *block);
static const int32_t cases[][6] = {{
{rows}
}};
static int8_t results[sizeof cases / sizeof cases[0]];
int main(void)
{{
    static const char name[] = "out.bin";
    uint32_t i, block[3];
    int out;
    for (i = 0; i < sizeof cases / sizeof cases[0]; ++i)
        results[i] = requantize(cases[i][0], cases[i][1], cases[i][2], cases[i][3], cases[i][4], cases[i][5]);
    block[0] = (uint32_t)name; block[1] = 4; block[2] = sizeof name - 1;
    out = semihost(0x01, block);
    block[0] = (uint32_t)out; block[1] = (uint32_t)results; block[2] = sizeof results;
    return semihost(0x05, block) || semihost(0x02, &out);
}}
"""


def test_the_c_function_equals_the_reference_on_the_m4(tmp_path):
    tools = arm_build.arm_tools()
    if tools is None:
        pytest.skip("the ARM tools are needed (Debian: apt-get install gcc-arm-none-eabi libnewlib-arm-none-eabi "
                    "qemu-system-arm)")
    all_cases = cases()
    rows = ",\n".join("{" + ", ".join(f"(int32_t){v}" if v != INT32_MIN else "INT32_MIN" for v in c) + "}"
                      for c in all_cases)
    (tmp_path / "check.c").write_text(ARM_MAIN.format(requantize=requantize_source(False), rows=rows),
                                      encoding="utf-8")
    core = arm_build.CORES[1]
    program = arm_build.link(core, tools, tmp_path, ("check.c",))
    got = np.frombuffer(emulate.run_program(tools, core, program, np.zeros((0, 1), np.uint8), timeout=60), np.int8)
    # arm-none-eabi-gcc -mcpu=cortex-m4 under QEMU: the same values as the reference
    assert got.tolist() == [reference(*c) for c in all_cases]
