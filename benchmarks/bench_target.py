"""Instructions per MAC of the int8 C file on emulated Cortex-M cores, before and after, side by side in one run.

Run: python benchmarks/bench_target.py [--before REV] [--cores cortex-m4,...] [--images N]

For README's demo export (``DEMO``: 2,844 parameters, 187,776 MACs, the size the issue measured) and
the first seeded draw of each shipped space that meets that space's budget, with seeded random
weights, the C file of commit REV (``searcher/ship/c_source.py`` read with ``git show``; default: the
last commit with the first, portable kernels) and today's are both cross-compiled
(arm-none-eabi-gcc -O2 -mthumb) and run under qemu-system-arm -icount shift=0 on the same images;
both must give the integer reference's scores exactly. Printed per candidate and core: MACs,
instructions per inference and per MAC, before and after, and the ratio (goal: ≤ 4 per MAC on the
M4 for the demo export). Last, the time export's emulated check adds for the demo export on its
held-out split (goal: ≤ 30 s).
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
import types
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # run from a checkout without installing
sys.path.insert(0, str(ROOT / "tests"))  # the tests' helpers

import numpy as np  # noqa: E402

from int8kit import demo_data  # noqa: E402  (tests/ is on the path)
from searcher.core.arch import Arch, parse_arch  # noqa: E402
from searcher.core.cost import cost  # noqa: E402
from searcher.core.space_file import builtin_space, load_space  # noqa: E402
from searcher.int8 import reference as int8_reference  # noqa: E402
from searcher.int8.check import state_arrays, unit_images  # noqa: E402
from searcher.int8.quantize import IntegerNet, quantize, to_pixels  # noqa: E402
from searcher.model.build import build  # noqa: E402
from searcher.model.train import reset_weights  # noqa: E402
from searcher.ship import arm_build, c_source, deploy_files, emulate  # noqa: E402

DEMO = "1x24x24_c4k3-c4k3-m2_c8k3-m2_c16k3-m2_flat-o8_relu_bn"  # README's demo export: 2,844 params, 187,776 MACs
SPACES = ("mcu", "workstation", "classic", "edge_rgb")
BEFORE = "b7946ee"  # the emulated run, with the first (portable) kernels


def fitting_draws(space_file: Path, count: int, seed: int = 0) -> list[Arch]:
    """The first `count` draws from `seed` on that meet every cap of the space's budget."""
    space = load_space(space_file)
    found = []
    for draw in range(seed, seed + 100_000):
        arch = space.random(draw)
        if not space.budget.check(space.budget.totals(cost(arch, space.budget.activation_precision))):
            found.append(arch)
            if len(found) == count:
                return found
    raise RuntimeError(f"too few draws of {space_file} fit its budget")


def tools_and_cores(names: str) -> tuple[arm_build.ArmTools, list[arm_build.Core]]:
    """The ARM tools (or exit saying how to get them) and the cores named, comma-separated."""
    tools = arm_build.arm_tools()
    if tools is None:
        sys.exit("needs arm-none-eabi-gcc, arm-none-eabi-size and qemu-system-arm (Debian: apt-get install "
                 "gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm)")
    return tools, [core for core in arm_build.CORES if core.name in names.split(",")]


def random_net(arch: Arch, seed: int = 0) -> IntegerNet:
    """The candidate with seeded random weights, calibrated on seeded random images (instruction counts
    barely depend on the values)."""
    model = build(arch)
    reset_weights(model, seed)
    calibration = np.random.default_rng(seed).random((16, *arch.input_shape), dtype=np.float32)
    return quantize(arch, state_arrays(model.eval()), calibration)


def generator_at(rev: str) -> types.ModuleType | None:
    """searcher/ship/c_source.py as it was at commit `rev`, loaded as a module; None without git or the commit."""
    try:
        text = subprocess.run(["git", "show", f"{rev}:searcher/ship/c_source.py"], cwd=ROOT, capture_output=True,
                              text=True, check=True).stdout
    except (OSError, subprocess.CalledProcessError):
        return None
    module = types.ModuleType(f"c_source_{rev}")
    sys.modules[module.__name__] = module  # dataclasses look their module up
    exec(compile(text, f"{rev}:searcher/ship/c_source.py", "exec"), module.__dict__)
    return module


def per_mac(generate, net: IntegerNet, core, tools, pixels: np.ndarray, expected: np.ndarray) -> float | str:
    with tempfile.TemporaryDirectory(prefix="bench-target-") as folder:
        run = emulate.run_core(generate(net), None, core, tools, Path(folder), pixels, expected)
    if isinstance(run, str):
        return run
    return run.instructions / cost(parse_arch(net.arch)).macs


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--before", default=BEFORE, help=f"commit whose C generator is 'before' (default {BEFORE})")
    parser.add_argument("--cores", default=",".join(arm_build.CORE_NAMES), help="cores to emulate, comma-separated")
    parser.add_argument("--images", type=int, default=4, help="images per candidate and core")
    args = parser.parse_args()
    tools, cores = tools_and_cores(args.cores)
    old = generator_at(args.before)
    if old is None:
        print(f"no 'before' column: git show {args.before}:searcher/ship/c_source.py failed")
    candidates = [("demo export", parse_arch(DEMO))] + [(name, fitting_draws(builtin_space(name), 1)[0]) for name in SPACES]
    print(f"{'candidate':<14} {'MACs':>11} {'core':<11} {'before':>8} {'after':>8} {'ratio':>6}"
          "  (instructions per MAC)")
    for label, arch in candidates:
        net = random_net(arch)
        pixels = to_pixels(np.random.default_rng(1).random((args.images, *arch.input_shape), dtype=np.float32))
        expected = int8_reference.scores(net, pixels)
        for core in cores:
            after = per_mac(c_source.generate, net, core, tools, pixels, expected)
            before = per_mac(old.generate, net, core, tools, pixels, expected) if old else float("nan")
            head = f"{label:<14} {cost(arch).macs:>11,} {core.name:<11}"
            if isinstance(after, str) or isinstance(before, str):
                print(head, after if isinstance(after, str) else before)
                continue
            print(f"{head} {before:>8.2f} {after:>8.2f} {before / after:>5.2f}x")
        print(f"  {label}: {arch.to_text()}")
    arch = parse_arch(DEMO)
    net = random_net(arch)
    pixels = to_pixels(unit_images(demo_data(arch.input_shape).test.images))
    expected = int8_reference.scores(net, pixels)
    start = time.perf_counter()
    runs, line = deploy_files.check_arm(c_source.generate(net), net, pixels, expected)
    print(f"export's emulated check on the demo export's {len(pixels)} held-out images, {len(runs)} cores: "
          f"{time.perf_counter() - start:.1f} s (goal: ≤ 30 s)\n  {line}")


if __name__ == "__main__":
    main()
