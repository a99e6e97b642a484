"""Cross-compile the generated C for Cortex-M cores and link it into a program QEMU can run.

The cores are those QEMU emulates as whole boards (``qemu-system-arm -M help``): Cortex-M3 on
``mps2-an385``, M4 on ``mps2-an386``, M7 on ``mps2-an500``, M55 on ``mps3-an547``. The model object is
compiled as a user would (``arm-none-eabi-gcc -mcpu=... -mthumb -O2``, the strict warnings) and read
with ``arm-none-eabi-size -A``; the program around it is a small harness, its start-up code and linker
script, all written into a scratch folder (never into the user's export). The harness classifies
images read from the host through semihosting, reads SysTick around each call, and first times a
counted assembly loop so that ticks can be turned into instructions (:mod:`searcher.ship.emulate`).
"""

from __future__ import annotations

import shutil
from dataclasses import dataclass
from pathlib import Path

from searcher.ship import c_build
from searcher.ship.c_build import Footprint, Tools
from searcher.ship.c_source import PROFILE_HOOK, CSource


@dataclass(frozen=True)
class Core:
    """A core, the QEMU board that carries it, and where that board has memory for the program."""

    name: str  # as gcc's -mcpu spells it, and as metrics.json's keys carry it
    board: str  # qemu-system-arm -M
    code: tuple[int, int]  # (origin, bytes) of memory the program's code and constants are loaded into (the
    # vector table sits at address 0, where each of these boards reads it at reset)
    ram: tuple[int, int]  # (origin, bytes) of memory for data, heap and stack


VECTORS = 0x400  # bytes kept at address 0 for the vector table
_MPS2 = ((VECTORS, (4 << 20) - VECTORS), (0x20000000, 4 << 20))  # SSRAM1, SSRAM2/3 (the boards' manuals; info mtree)
CORES = (
    Core("cortex-m3", "mps2-an385", *_MPS2),
    Core("cortex-m4", "mps2-an386", *_MPS2),
    Core("cortex-m7", "mps2-an500", *_MPS2),
    Core("cortex-m55", "mps3-an547", (0x21000000, 4 << 20), (0x20000000, 512 << 10)),  # SRAM (ITCM: vectors), DTCM
)
CORE_NAMES = tuple(core.name for core in CORES)
CALIBRATION_LOOPS = (100_000, 1_100_000)  # iterations of the counted loop, two lengths: the difference cancels the call
LOOP_INSTRUCTIONS = 2  # per iteration of the counted loop: subs, bne


@dataclass(frozen=True)
class ArmTools:
    """Debian's gcc-arm-none-eabi (with libnewlib-arm-none-eabi for <stdint.h>) and qemu-system-arm."""

    gcc: str
    size: str
    qemu: str

    @property
    def compiler(self) -> Tools:
        return Tools(self.gcc, self.size)


def arm_tools() -> ArmTools | None:
    """The cross-compiler, its size and QEMU if all three are on PATH, else None."""
    found = [shutil.which(name) for name in ("arm-none-eabi-gcc", "arm-none-eabi-size", "qemu-system-arm")]
    return ArmTools(*found) if all(found) else None


def core_flags(core: Core) -> tuple[str, ...]:
    return (f"-mcpu={core.name}", "-mthumb")


HARNESS = r"""
/* Test harness, not part of the model. Bare metal, no C library: it classifies the images in
 * images.bin, read from the host by semihosting, and writes to out.bin per image the SysTick ticks
 * of the call, the stack it used, its class, the SysTick wraps during it and its scores (and with
 * PROFILE the ticks of each layer);
 * first, the ticks of a counted loop at two lengths. */
#include <stdint.h>

#include "model_int8.h"

#define SYST_CSR (*(volatile uint32_t *)0xE000E010u)
#define SYST_RVR (*(volatile uint32_t *)0xE000E014u)
#define SYST_CVR (*(volatile uint32_t *)0xE000E018u)
#define SYST_MAX 0xFFFFFFu
#define PAINT 0xA5A5A5A5u

void counted_loop(uint32_t iterations); /* start.S: two instructions per iteration */
int semihost(uint32_t operation, const void *block); /* start.S: bkpt 0xab */
extern volatile uint32_t wraps; /* start.S: SysTick wraps so far */
int main(void);

static uint8_t pixels[MODEL_INPUT_BYTES];
static int8_t scores[MODEL_CLASSES];

static uint32_t ticks(void)
{
    uint32_t w, v;
    do { w = wraps; v = SYST_CVR; } while (w != wraps);
    return w * (SYST_MAX + 1u) + (SYST_MAX - v); /* modulo 2^32: differences stay right */
}

static int open_file(const char *name, uint32_t length, uint32_t mode) /* SYS_OPEN; mode 0 "rb", 4 "wb" */
{
    uint32_t block[3];
    block[0] = (uint32_t)name; block[1] = mode; block[2] = length;
    return semihost(0x01, block);
}
#define OPEN(name, mode) open_file(name, sizeof name - 1, mode)

static int transfer(uint32_t operation, int handle, const void *data, uint32_t bytes) /* SYS_WRITE 5, SYS_READ 6 */
{
    uint32_t block[3];
    block[0] = (uint32_t)handle; block[1] = (uint32_t)data; block[2] = bytes;
    return semihost(operation, block); /* bytes not transferred */
}

#ifdef PROFILE
static uint32_t marks[MODEL_LAYERS + 1];
void HOOK(int32_t layer, int8_t *arena) { (void)arena; marks[layer] = ticks(); }
#endif

int main(void)
{
    uint32_t t0, t1, count = 0, record[4], loops[2];
    volatile uint32_t *sp, *low; /* volatile: a call to memset would use the stack it paints */
    int in, out;

    SYST_RVR = SYST_MAX;
    SYST_CVR = 0;
    SYST_CSR = 7u; /* processor clock, interrupt on wrap, enable */
    while (SYST_CVR == 0) {} /* the first reload */
    t0 = ticks(); counted_loop(LOOP_SHORT); t1 = ticks(); loops[0] = t1 - t0;
    t0 = ticks(); counted_loop(LOOP_LONG); t1 = ticks(); loops[1] = t1 - t0;
    in = OPEN("images.bin", 0);
    out = OPEN("out.bin", 4);
    if (in < 0 || out < 0 || transfer(0x05, out, loops, sizeof loops)) return 1;
    while (count < IMAGES && transfer(0x06, in, pixels, MODEL_INPUT_BYTES) == 0) {
        __asm volatile ("mov %0, sp" : "=r"(sp));
        for (low = sp - PAINT_WORDS; low < sp; ++low) *low = PAINT;
        record[3] = wraps;
        t0 = ticks();
        record[2] = (uint32_t)model_classify(pixels, scores);
        t1 = ticks();
        record[3] = wraps - record[3]; /* a wrap's interrupt left its 32-byte frame on the painted stack */
        for (low = sp - PAINT_WORDS; low < sp && *low == PAINT; ++low) {}
        record[0] = t1 - t0;
        record[1] = (uint32_t)(sp - low) * 4u;
        if (transfer(0x05, out, record, sizeof record) || transfer(0x05, out, scores, sizeof scores)) return 1;
#ifdef PROFILE
        {
            uint32_t i, layers[MODEL_LAYERS + 2];
            layers[0] = marks[0] - t0;
            for (i = 1; i <= MODEL_LAYERS; ++i) layers[i] = marks[i] - marks[i - 1];
            layers[MODEL_LAYERS + 1] = t1 - marks[MODEL_LAYERS];
            if (transfer(0x05, out, layers, sizeof layers)) return 1;
        }
#endif
        ++count;
    }
    return semihost(0x02, &out) || count != IMAGES; /* SYS_CLOSE flushes out.bin */
}
"""

START = """\
    .syntax unified
    .thumb
    .section .vectors, "a"
    .word __stack_top           /* initial stack pointer */
    .word reset
    .rept 13
    .word fault                 /* NMI, faults, SVCall, PendSV: end the run at once */
    .endr
    .word tick_wrap             /* SysTick */

    .text
    .global reset
    .thumb_func
reset:                          /* clear .bss, run main, exit QEMU with its outcome */
    ldr r0, =__bss_start__
    ldr r1, =__bss_end__
    movs r2, #0
1:  cmp r0, r1
    bhs 2f
    str r2, [r0], #4
    b 1b
2:  bl main
    cmp r0, #0
    bne fault
    movs r0, #0x18              /* SYS_EXIT, ADP_Stopped_ApplicationExit: QEMU exits with 0 */
    ldr r1, =0x20026
    bkpt 0xab
    .thumb_func
fault:
    movs r0, #0x18              /* SYS_EXIT, ADP_Stopped_RunTimeErrorUnknown: QEMU exits with 1 */
    ldr r1, =0x20023
    bkpt 0xab
3:  b 3b

    .thumb_func
tick_wrap:                      /* SysTick: count the wraps of its 24-bit counter */
    ldr r0, =wraps
    ldr r1, [r0]
    adds r1, r1, #1
    str r1, [r0]
    bx lr

    .global semihost
    .thumb_func
semihost:                       /* r0 operation, r1 parameter block; result in r0 */
    bkpt 0xab
    bx lr

    .global memcpy              /* the C library functions a compiler may call for a loop: byte by byte, */
    .global memmove             /* no stack (the model's stack bound leaves the library's frames out) */
    .thumb_func
memcpy:                         /* r0 destination, r1 source, r2 bytes; returns the destination */
memmove:
    mov r3, r0
    cmp r0, r1
    bhi 3f                      /* destination above the source: copy from the end */
1:  cbz r2, 2f
    ldrb r12, [r1], #1
    strb r12, [r3], #1
    subs r2, r2, #1
    b 1b
2:  bx lr
3:  subs r2, r2, #1
    bmi 2b
    ldrb r12, [r1, r2]
    strb r12, [r0, r2]
    b 3b

    .global memset
    .thumb_func
memset:                         /* r0 destination, r1 value, r2 bytes; returns the destination */
    mov r3, r0
1:  cbz r2, 2f
    strb r1, [r3], #1
    subs r2, r2, #1
    b 1b
2:  bx lr

    .global counted_loop
    .thumb_func
counted_loop:                   /* r0 iterations of two instructions */
1:  subs r0, r0, #1
    bne 1b
    bx lr

    .bss
    .align 2
    .global wraps
wraps:
    .space 4
"""

LINKER = """\
/* Code and constants where the board loads them; data, .bss and the stack in RAM. QEMU loads each
 * ELF segment at its link address, so .data needs no copy; the start-up code clears .bss. */
MEMORY {{
  VECTORS (rx) : ORIGIN = 0, LENGTH = {vectors:#x}
  CODE (rx) : ORIGIN = {code_at:#x}, LENGTH = {code_bytes:#x}
  RAM (rwx) : ORIGIN = {ram_at:#x}, LENGTH = {ram_bytes:#x}
}}
ENTRY(reset)
SECTIONS {{
  .vectors : {{ KEEP(*(.vectors)) }} > VECTORS
  .text : {{ *(.text*) *(.rodata*) }} > CODE
  .data : {{ *(.data*) }} > RAM
  .bss : {{ . = ALIGN(4); __bss_start__ = .; *(.bss*) *(COMMON) . = ALIGN(4); __bss_end__ = .; }} > RAM
  __stack_top = ORIGIN(RAM) + LENGTH(RAM);
}}
"""


@dataclass(frozen=True)
class ArmBuild:
    """The model object's sections on one core and the programs that run it."""

    core: Core
    footprint: Footprint  # arm-none-eabi-size -A of model_int8.o and its worst-case stack
    program: Path | None  # the exact model file with the harness; None when it does not fit the board
    profiled: Path | None  # the profiled model file with the harness (per-layer clock readings)
    skipped: str | None = None  # why nothing was linked


def link(core: Core, tools: ArmTools, folder: Path, sources: tuple[str, ...], defines: tuple[str, ...] = ()) -> Path:
    """program.elf in `folder`: `sources` (files there) with the start-up code and the linker script for
    `core`'s board, no C library."""
    (folder / "start.S").write_text(START, encoding="utf-8")
    script = LINKER.format(vectors=VECTORS, code_at=core.code[0], code_bytes=core.code[1], ram_at=core.ram[0],
                           ram_bytes=core.ram[1])
    (folder / "link.ld").write_text(script, encoding="utf-8")
    c_build._run([tools.gcc, *core_flags(core), c_build.OPTIMIZE, "-nostdlib", "-T", "link.ld", *defines,
                  "start.S", *sources, "-lgcc", "-o", "program.elf"], folder)
    return folder / "program.elf"


def _harness(core: Core, tools: ArmTools, obj: Path, layers: int, images: int, paint: int, profile: bool) -> Path:
    """The harness linked with the model object `obj`, beside it."""
    (obj.parent / "harness.c").write_text(HARNESS, encoding="utf-8")
    defines = (f"-DMODEL_LAYERS={layers}", f"-DIMAGES={images}", f"-DPAINT_WORDS={paint // 4}",
               f"-DLOOP_SHORT={CALIBRATION_LOOPS[0]}u", f"-DLOOP_LONG={CALIBRATION_LOOPS[1]}u")
    if profile:
        defines += ("-DPROFILE", f"-DHOOK={PROFILE_HOOK}")
    return link(core, tools, obj.parent, ("harness.c", obj.name), defines)


HARNESS_MARGIN = 64 << 10  # board memory kept for the harness, its buffers and the stack


def fits(core: Core, footprint: Footprint, pixels: int) -> str | None:
    """Why the model cannot run in the harness on `core`'s board, or None when it can."""
    if footprint.flash + HARNESS_MARGIN > core.code[1]:
        return f"its {footprint.flash:,} B of code and constants do not fit the {core.board}'s {core.code[1] >> 10} KiB"
    if footprint.ram + pixels + HARNESS_MARGIN > core.ram[1]:
        return f"its {footprint.ram:,} B of RAM do not fit the {core.board}'s {core.ram[1] >> 10} KiB"
    return None


def build(code: CSource, profiled: CSource | None, core: Core, tools: ArmTools, folder: Path,
          images: int, profiled_images: int) -> ArmBuild:
    """Compile `code` for `core` (sizes, stack) and, if it fits the board, link the programs in
    sub-folders of `folder`; ``profiled`` is the same network generated with ``profile=True``
    (None: no per-layer readings).

    The harness paints four times the stack bound below its own frame and reports how much of it
    the call overwrote: the measured stack, which must stay within the bound.
    """
    objects = []
    for name, source in (("exact", code), ("profiled", profiled)):
        place = folder / core.name / name
        place.mkdir(parents=True)
        objects.append(source and c_build.compile_model(source, tools.compiler, place, core_flags(core)))
    footprint = c_build.footprint(code, tools.compiler, objects[0])
    why = fits(core, footprint, code.input_bytes)
    if why:
        return ArmBuild(core, footprint, None, None, why)
    paint = 4 * footprint.stack + 256
    layers = len(code.layer_names)
    programs = [None if obj is None else _harness(core, tools, obj, layers, count, paint, profile)
                for obj, count, profile in zip(objects, (images, profiled_images), (False, True))]
    return ArmBuild(core, footprint, *programs)
