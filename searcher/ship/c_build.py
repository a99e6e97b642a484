"""Compile the generated C with gcc, read its sections with ``size -A``, run it and time it.

Used by export (the compile check, the RAM and flash figures, the C latency) and by the tests.
A machine without gcc or binutils gets ``None`` from :func:`tools` and export says so in one line.
"""

from __future__ import annotations

import re
import shutil
import subprocess
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from searcher.ship.c_source import PREFIX, CSource

WARNINGS = ("-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic")  # the model file must pass these
OPTIMIZE = "-O2"
TIMEOUT = 120  # seconds for one compile or run

RUNNER = r"""
#define _POSIX_C_SOURCE 199309L
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

#include "model_int8.h"

/* runner IMAGES COUNT OUT REPEATS: classify COUNT images from the file IMAGES, write their int8 scores
 * then their classes (int32) to OUT; then time REPEATS passes, one call at a time, and print the
 * median nanoseconds per call. Test harness only: it is not part of the model. */
static int by_value(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

int main(int argc, char **argv)
{
    long count, repeats, i, r, n = 0;
    uint8_t *pixels;
    int8_t *scores;
    int32_t *classes;
    double *times;
    FILE *f;
    struct timespec t0, t1;
    if (argc != 5) return 2;
    count = atol(argv[2]);
    repeats = atol(argv[4]);
    pixels = malloc((size_t)count * MODEL_INPUT_BYTES);
    scores = malloc((size_t)count * MODEL_CLASSES);
    classes = malloc((size_t)count * sizeof *classes);
    times = malloc((size_t)(count * repeats + 1) * sizeof *times);
    if (!pixels || !scores || !classes || !times) return 3;
    f = fopen(argv[1], "rb");
    if (!f || fread(pixels, MODEL_INPUT_BYTES, (size_t)count, f) != (size_t)count) return 4;
    fclose(f);
    for (i = 0; i < count; ++i)
        classes[i] = model_classify(pixels + i * MODEL_INPUT_BYTES, scores + i * MODEL_CLASSES);
    f = fopen(argv[3], "wb");
    if (!f) return 5;
    fwrite(scores, MODEL_CLASSES, (size_t)count, f);
    fwrite(classes, sizeof *classes, (size_t)count, f);
    fclose(f);
    for (r = 0; r < repeats; ++r)
        for (i = 0; i < count; ++i) {
            clock_gettime(CLOCK_MONOTONIC, &t0);
            model_classify(pixels + i * MODEL_INPUT_BYTES, NULL);
            clock_gettime(CLOCK_MONOTONIC, &t1);
            times[n++] = (double)(t1.tv_sec - t0.tv_sec) * 1e9 + (double)(t1.tv_nsec - t0.tv_nsec);
        }
    if (n) {
        qsort(times, (size_t)n, sizeof *times, by_value);
        printf("%.1f\n", n % 2 ? times[n / 2] : (times[n / 2 - 1] + times[n / 2]) / 2);
    }
    return 0;
}
"""


@dataclass(frozen=True)
class Tools:
    gcc: str  # path of the C compiler
    size: str  # path of binutils' size


@dataclass(frozen=True)
class Footprint:
    """What ``size -A`` shows of the compiled model object (gcc -O2 -fdata-sections, this machine)."""

    arena: int  # .bss of the activation arena
    constants: dict[str, int]  # .rodata section of each of the model's constant arrays
    other_data: dict[str, int]  # any other data section (.data, .bss, compiler constants); expected empty
    code: int  # .text: the functions
    stack: int  # worst-case stack of model_classify: its deepest call chain's frames added up (gcc -fcallgraph-info=su)
    library: tuple[str, ...] = ()  # functions outside the file it calls (memcpy...), whose frames `stack` leaves out

    @property
    def constant_bytes(self) -> int:
        return sum(self.constants.values())

    @property
    def ram(self) -> int:
        """Arena, other writable data and the stack bound."""
        return self.arena + sum(v for k, v in self.other_data.items() if not k.startswith(".rodata")) + self.stack

    @property
    def flash(self) -> int:
        """Code plus every read-only section."""
        return self.code + self.constant_bytes + sum(v for k, v in self.other_data.items() if k.startswith(".rodata"))


def tools() -> Tools | None:
    """gcc and size if both are on PATH, else None."""
    gcc, size = shutil.which("gcc"), shutil.which("size")
    return Tools(gcc, size) if gcc and size else None


def _run(command: list[str], cwd: Path) -> str:
    done = subprocess.run(command, cwd=cwd, capture_output=True, text=True, timeout=TIMEOUT)
    if done.returncode:
        raise RuntimeError(f"{' '.join(command)} failed ({done.returncode}): {(done.stderr or done.stdout).strip()[-2000:]}")
    return done.stdout


def write_sources(code: CSource, folder: Path) -> None:
    (folder / "model_int8.c").write_text(code.source, encoding="utf-8")
    (folder / "model_int8.h").write_text(code.header, encoding="utf-8")


def compile_model(code: CSource, found: Tools, folder: Path, flags: tuple[str, ...] = ()) -> Path:
    """model_int8.o, compiled with the strict warnings, one data section per array, and its call graph
    with each function's stack frame noted; ``flags`` choose a target (a cross-compiler's -mcpu)."""
    write_sources(code, folder)
    _run([found.gcc, *WARNINGS, OPTIMIZE, *flags, "-fdata-sections", "-fcallgraph-info=su", "-c", "model_int8.c",
          "-o", "model_int8.o"], folder)
    return folder / "model_int8.o"


_NODE = re.compile(r'node: \{ title: "([^"]+)" label: "[^"]*\\n(\d+) bytes \(([\w,]+)\)')
_EDGE = re.compile(r'edge: \{ sourcename: "([^"]+)" targetname: "([^"]+)"')


def stack_bound(callgraph: str, root: str = "model_classify") -> tuple[int, tuple[str, ...]]:
    """Bytes of stack ``root`` can use at most, the deepest chain of frames in gcc's call graph
    (-fcallgraph-info=su), and the functions outside the file it may call on the way (the C library's
    memcpy or memset, where the compiler turned a loop into a call), whose frames the bound leaves out.

    Raises if a frame has no bound or a call is recursive (neither happens in the generated C).
    """
    frames = {title: (int(size), kind) for title, size, kind in _NODE.findall(callgraph)}
    calls: dict[str, list[str]] = {}
    for source, target in _EDGE.findall(callgraph):
        calls.setdefault(source, []).append(target)
    outside: set[str] = set()

    def deepest(name: str, seen: tuple[str, ...]) -> int:
        if name in seen or (name in frames and frames[name][1] not in ("static", "dynamic,bounded")):
            raise RuntimeError(f"no stack bound: {name} is {'recursive' if name in seen else 'of unbounded size'}")
        if name not in frames:
            outside.add(name)
            return 0
        return frames[name][0] + max((deepest(callee, (*seen, name)) for callee in calls.get(name, ())), default=0)

    return deepest(root, ()), tuple(sorted(outside))


def footprint(code: CSource, found: Tools, obj: Path) -> Footprint:
    """What ``size -A`` shows of the object :func:`compile_model` made, sorted into arena, arrays, code and the rest."""
    sections = {}
    for line in _run([found.size, "-A", obj.name], obj.parent).splitlines():
        parts = line.split()
        if len(parts) == 3 and parts[1].isdigit() and int(parts[1]) > 0:
            sections[parts[0]] = int(parts[1])
    arena = sections.pop(f".bss.{PREFIX}arena", 0)
    constants = {name: sections.pop(f".rodata.{name}") for name, _ in code.arrays if f".rodata.{name}" in sections}
    code_bytes = sum(v for k, v in sections.items() if k.startswith(".text"))
    other = {k: v for k, v in sections.items() if k.startswith((".data", ".bss", ".rodata"))}
    stack, library = stack_bound(obj.with_suffix(".ci").read_text(encoding="utf-8"))
    return Footprint(arena, constants, other, code_bytes, stack, library)


def build_runner(found: Tools, obj: Path) -> Path:
    """The test harness above linked with the model object into an executable."""
    folder = obj.parent
    (folder / "runner.c").write_text(RUNNER, encoding="utf-8")
    _run([found.gcc, *WARNINGS, OPTIMIZE, "runner.c", obj.name, "-o", "runner"], folder)
    return folder / "runner"


def run(runner: Path, pixels: np.ndarray, classes: int, repeats: int = 0) -> tuple[np.ndarray, np.ndarray, float | None]:
    """int8 scores and classes the C build gives for uint8 pixels (N, C, H, W); median ns per call if timed."""
    folder = runner.parent
    (folder / "images.bin").write_bytes(np.ascontiguousarray(pixels, np.uint8).tobytes())
    out = _run([str(runner), "images.bin", str(len(pixels)), "out.bin", str(repeats)], folder)
    raw = (folder / "out.bin").read_bytes()
    scores = np.frombuffer(raw[: len(pixels) * classes], np.int8).reshape(len(pixels), classes)
    labels = np.frombuffer(raw[len(pixels) * classes:], np.int32)
    return scores, labels, float(out) if repeats else None


def scratch() -> tempfile.TemporaryDirectory:
    """A throw-away folder for builds."""
    return tempfile.TemporaryDirectory(prefix="searcher-c-")
