"""Run the int8 C model on emulated Cortex-M cores: its scores, and its instructions per inference.

``qemu-system-arm -icount shift=0`` advances the board's virtual clock one step per instruction
executed, so SysTick, clocked from the processor clock, ticks once per fixed number of
instructions. That number is measured in every run, not assumed: the harness first times a counted
loop of two instructions per iteration at two lengths, and the difference of the two readings gives
instructions per tick. The count is deterministic (no timing of the host enters it), so tests may
compare it exactly. QEMU counts instructions, not cycles: see :mod:`searcher.core.latency` for what
that means on silicon.

The per-layer counts come from a second program built from the profiled source
(``generate(..., profile=True)``), which reads the clock after each layer; the total per inference
comes from the exact file the user gets.
"""

from __future__ import annotations

import subprocess
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from searcher.ship import arm_build
from searcher.ship.arm_build import CALIBRATION_LOOPS, LOOP_INSTRUCTIONS, ArmTools, Core
from searcher.ship.c_build import Footprint
from searcher.ship.c_source import CSource

EMULATOR_TIMEOUT = 120  # seconds for one QEMU run; a run that takes longer is killed and reported
PROFILED_IMAGES = 4  # images the per-layer program classifies (counts barely vary with the image)
PARALLEL = 2  # cores built and emulated at once


@dataclass(frozen=True)
class CoreRun:
    """What one emulated core showed."""

    core: Core
    footprint: Footprint  # arm-none-eabi-size -A of model_int8.o: .text, .rodata, .bss; worst-case stack
    instructions: int  # per inference, mean over the images (the exact file)
    fewest: int  # of one inference, over the images
    most: int
    layers: tuple[tuple[str, int], ...]  # ("input", n), one row per layer, ("output", n): mean per inference
    per_tick: float  # instructions per SysTick tick, measured by the counted loop
    images: int  # images classified, each with the reference's scores exactly
    stack_used: int | None  # bytes of stack a call was seen to use (painted), within footprint.stack; None if every
    # call was interrupted by a SysTick wrap (over 2^24 ticks: hundreds of millions of instructions)


def command(tools: ArmTools, core: Core, program: Path) -> list[str]:
    """The QEMU command line that runs `program` on `core`'s board with semihosting and counted instructions."""
    return [tools.qemu, "-M", core.board, "-nographic", "-monitor", "none", "-serial", "none", "-icount", "shift=0",
            "-semihosting-config", "enable=on,target=native", "-kernel", str(program)]


def run_program(tools: ArmTools, core: Core, program: Path, pixels: np.ndarray,
                timeout: float = EMULATOR_TIMEOUT) -> bytes:
    """What a harness program wrote to out.bin after classifying `pixels` (uint8, N×C×H×W) under QEMU
    (both files beside the program); raises if QEMU fails or outlasts `timeout` seconds, killing it."""
    folder = program.parent
    (folder / "images.bin").write_bytes(np.ascontiguousarray(pixels, np.uint8).tobytes())
    try:
        done = subprocess.run(command(tools, core, program), cwd=folder, capture_output=True, text=True,
                              timeout=timeout)
    except subprocess.TimeoutExpired:
        raise RuntimeError(f"{core.name} ({core.board}): QEMU still ran after {timeout:g} s and was stopped") from None
    if done.returncode:
        raise RuntimeError(f"{core.name} ({core.board}): the harness failed (QEMU status {done.returncode}) "
                           f"{(done.stderr or done.stdout).strip()[-1000:]}".strip())
    return (folder / "out.bin").read_bytes()


@dataclass(frozen=True)
class Readings:
    """What the harness wrote: the counted loop's ticks, then per image."""

    loop_ticks: tuple[int, int]  # ticks of CALIBRATION_LOOPS iterations of the counted loop
    ticks: np.ndarray  # (N,) SysTick ticks of one call
    stack: np.ndarray  # (N,) bytes of painted stack the call overwrote
    wrapped: np.ndarray  # (N,) SysTick wraps during the call (each pushed an interrupt frame onto that stack)
    classes: np.ndarray  # (N,) the class it returned
    scores: np.ndarray  # (N, classes) int8
    layers: np.ndarray  # (N, layers + 2) ticks of the input copy, each layer and the output; (N, 0) unprofiled

    @property
    def per_tick(self) -> float:
        """Instructions per SysTick tick: the counted loop's extra instructions over its extra ticks."""
        short, long = self.loop_ticks
        if long <= short:
            raise RuntimeError(f"the counted loop's readings make no sense: {self.loop_ticks}")
        return LOOP_INSTRUCTIONS * (CALIBRATION_LOOPS[1] - CALIBRATION_LOOPS[0]) / (long - short)


def readings(raw: bytes, classes: int, layers: int = 0) -> Readings:
    """Parse out.bin (little-endian, as the harness writes it); ``layers`` counts a profiled run's layer rows."""
    record = np.dtype([("ticks", "<u4"), ("stack", "<u4"), ("best", "<i4"), ("wrapped", "<u4"),
                       ("scores", "i1", (classes,)), ("layers", "<u4", (layers + 2 if layers else 0,))])
    loops = np.frombuffer(raw[:8], "<u4")
    rows = np.frombuffer(raw[8:], record)
    return Readings((int(loops[0]), int(loops[1])), rows["ticks"].astype(np.int64), rows["stack"].astype(np.int64),
                    rows["wrapped"].astype(np.int64), rows["best"].astype(np.int64), rows["scores"],
                    rows["layers"].astype(np.int64))


def run_core(code: CSource, profiled: CSource | None, core: Core, tools: ArmTools, folder: Path,
             pixels: np.ndarray, expected: np.ndarray) -> CoreRun | str:
    """Build for `core` in `folder`, classify `pixels` (uint8 N×C×H×W) under QEMU and
    require `expected` int8 scores exactly; a line saying why when the model does not fit the board."""
    built = arm_build.build(code, profiled, core, tools, folder, len(pixels), min(len(pixels), PROFILED_IMAGES))
    if built.program is None:
        return f"{core.name} ({core.board}) not run: {built.skipped}"
    seen = readings(run_program(tools, core, built.program, pixels), expected.shape[1])
    rate = seen.per_tick
    if len(seen.scores) != len(pixels) or not np.array_equal(seen.scores, expected) \
            or not np.array_equal(seen.classes, expected.argmax(1)):
        wrong = len(pixels) if len(seen.scores) != len(pixels) else int((seen.scores != expected).any(axis=1).sum())
        raise RuntimeError(f"{core.name} ({core.board}): the ARM build's scores differ from the integer reference "
                           f"on {wrong} of {len(pixels)} held-out images")
    quiet = seen.stack[seen.wrapped == 0]  # calls no SysTick interrupt came into
    stack_used = int(quiet.max()) if len(quiet) else None
    if stack_used is not None and stack_used > built.footprint.stack:
        raise RuntimeError(f"{core.name}: the call used {stack_used} B of stack, beyond the bound of "
                           f"{built.footprint.stack} B from gcc's call graph")
    layers: tuple[tuple[str, int], ...] = ()
    if built.profiled is not None:
        profiled_images = pixels[:PROFILED_IMAGES]
        per_layer = readings(run_program(tools, core, built.profiled, profiled_images), expected.shape[1],
                             len(code.layer_names)).layers
        names = ("input", *code.layer_names, "output")
        layers = tuple((name, round(float(n) * rate)) for name, n in zip(names, per_layer.mean(axis=0), strict=True))
    counts = seen.ticks * rate
    return CoreRun(core, built.footprint, round(float(counts.mean())), round(float(counts.min())),
                   round(float(counts.max())), layers, rate, len(pixels), stack_used)


def run_cores(code: CSource, profiled: CSource | None, pixels: np.ndarray, expected: np.ndarray, tools: ArmTools,
              folder: Path, cores: tuple[Core, ...] = arm_build.CORES) -> tuple[CoreRun | str, ...]:
    """:func:`run_core` on each core, :data:`PARALLEL` at a time, building in `folder`."""
    with ThreadPoolExecutor(PARALLEL) as pool:
        return tuple(pool.map(lambda core: run_core(code, profiled, core, tools, folder, pixels, expected), cores))
