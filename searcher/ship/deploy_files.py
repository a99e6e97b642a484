"""The deployable forms export writes beside the torch files, each checked as it is written.

* ``model.onnx``: fp32, compared with the torch model in onnxruntime on the held-out images;
* ``model_int8.onnx``: QuantizeLinear/DequantizeLinear on the integer reference's grids, its
  top-1 compared with the reference's;
* ``model_int8.c`` / ``model_int8.h``: compiled with gcc (strict warnings), run on every held-out
  image and required to give the reference's int8 scores exactly; ``size -A`` on the object must
  show an arena equal to the analytic peak activation bytes at int8 and constant data equal to
  the analytic int8 weight bytes plus the activation tables. Without gcc the files are still
  written; only the compile check and the C latency are skipped, and the report says so;
* the same C file cross-compiled for each Cortex-M core QEMU emulates as a whole board
  (:mod:`searcher.ship.arm_build`) and run there on the held-out images (:mod:`searcher.ship.emulate`):
  the reference's scores exactly, ``arm-none-eabi-size -A`` showing the same arena and constant
  data, and per core the code size, the worst-case stack and the instructions per inference, in
  total and per layer. Without the ARM tools this check is skipped with a line saying so.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import onnx

from searcher.core.arch import Arch, parse_arch
from searcher.core.cost import cost
from searcher.core.latency import Target, predict
from searcher.model.metrics import scores
from searcher.int8 import reference as int8_reference
from searcher.ship import arm_build, c_build, emulate, onnx_files
from searcher.ship.c_build import Footprint
from searcher.ship.emulate import CoreRun
from searcher.ship.c_source import CSource, generate
from searcher.int8.check import quantized, unit_images
from searcher.int8.quantize import IntegerNet, QuantSettings, to_pixels

log = logging.getLogger(__name__)

LATENCY_IMAGES = 64  # held-out images timed one at a time ...
LATENCY_MACS = 2 * 10**9  # ... fewer (at least 5) when a pass over them would exceed this many MACs ...
LATENCY_REPEATS = 3  # ... this many times over; the median is reported
EMULATED_MACS = 3 * 10**8  # held-out images emulated per core: all of them, or fewer (at least 5) beyond this many MACs
TABLE_BYTES = 256  # one int8 output per int8 input


@dataclass(frozen=True, eq=False)
class DeployReport:
    """What was written and measured; the card and metrics.json are made from it."""

    net: IntegerNet
    code: CSource
    test_accuracy_int8: float  # integer reference on the held-out split
    test_balanced_accuracy_int8: float  # its mean recall per class there
    onnx_fp32_max_difference: float  # largest |onnxruntime − torch| score on the held-out images
    onnx_int8_top1_agreement: float  # share of held-out images where model_int8.onnx, run as written, and the reference agree
    onnx_int8_fused_agreement: float  # the same with onnxruntime's default fused integer kernels
    latency_onnxruntime_fp32_ms: float  # batch-1 median, one thread
    latency_c_ms: float | None  # batch-1 median of the C build (gcc -O2); None when skipped
    c_check: str  # one line: what the C build check found, or why it was skipped
    analytic_peak_bytes: int  # searcher.core.cost, activations at int8
    analytic_weight_bytes: int  # searcher.core.cost, weights at int8
    footprint: Footprint | None  # size -A of the compiled object; None when skipped
    arm: tuple[CoreRun, ...] = ()  # each emulated Cortex-M core's sizes and instruction counts; () when skipped
    arm_check: str = ""  # one line: what the emulated runs found, or why they were skipped

    def metrics(self) -> dict[str, Any]:
        """The entries metrics.json gains."""
        build = None if self.footprint is None else {
            "arena_bytes": self.footprint.arena, "constant_bytes": self.footprint.constant_bytes,
            "code_bytes": self.footprint.code, "stack_bytes_at_most": self.footprint.stack,
            "other_data": self.footprint.other_data, "ram_bytes": self.footprint.ram, "flash_bytes": self.footprint.flash}
        return {
            **self.arm_metrics(),
            "test_accuracy_int8": self.test_accuracy_int8,
            "test_balanced_accuracy_int8": self.test_balanced_accuracy_int8,
            "latency_onnxruntime_fp32_ms": self.latency_onnxruntime_fp32_ms,
            "latency_c_int8_ms": self.latency_c_ms,
            "int8": {
                "calibration": self.net.settings.calibration, "calibration_images": self.net.settings.images,
                "onnx_fp32_max_difference": self.onnx_fp32_max_difference,
                "onnx_int8_top1_agreement": self.onnx_int8_top1_agreement,
                "onnx_int8_top1_agreement_fused_kernels": self.onnx_int8_fused_agreement,
                "c_check": self.c_check,
                "arena_bytes": self.code.arena_bytes, "analytic_peak_activation_bytes": self.analytic_peak_bytes,
                "constant_bytes": self.code.constant_bytes, "analytic_weight_bytes": self.analytic_weight_bytes,
                "tables": dict(self.code.tables), "compiled": build, "arm_check": self.arm_check,
            },
        }

    def arm_metrics(self) -> dict[str, Any]:
        """Per emulated core, keys that carry its name: instructions_cortex_m4, text_bytes_cortex_m4, ..."""
        out: dict[str, Any] = {}
        arch = parse_arch(self.net.arch)
        for run in self.arm:
            key = core_key(run.core.name)
            predicted = predict(arch, Target(run.core.name, 1.0))
            out |= {f"instructions_{key}": run.instructions, f"predicted_instructions_{key}": predicted.instructions,
                    f"instructions_per_mac_{key}": run.instructions / max(1, cost(arch).macs),
                    f"text_bytes_{key}": run.footprint.code, f"rodata_bytes_{key}": run.footprint.constant_bytes,
                    f"bss_bytes_{key}": run.footprint.arena, f"stack_bytes_{key}": run.footprint.stack,
                    f"stack_bytes_seen_{key}": run.stack_used, f"instructions_per_layer_{key}": dict(run.layers),
                    f"emulated_images_{key}": run.images, f"board_{key}": run.core.board}
        return out


def core_key(name: str) -> str:
    """A core's name as part of a key: cortex-m4 -> cortex_m4."""
    return name.replace("-", "_")


def prove(arch: Arch, code: CSource) -> tuple[int, int]:
    """The analytic (peak activation, weight) bytes at int8, after checking the C source against them.

    Raises if they disagree: the card states them as equal.
    """
    analytic = cost(arch, "int8")
    peak, weights = analytic.peak_activation_bytes, analytic.weight_bytes("int8")
    tables = TABLE_BYTES * len(code.tables)
    if code.arena_bytes != peak or code.constant_bytes != weights + tables:
        raise RuntimeError(f"{arch}: C arena {code.arena_bytes} B vs analytic peak {peak} B, constant data "
                           f"{code.constant_bytes} B vs analytic weights {weights} B + tables {tables} B")
    return peak, weights


def _timed_images(arch: Arch) -> int:
    """How many held-out images to time: a large network gets fewer, so export stays quick."""
    return max(5, min(LATENCY_IMAGES, LATENCY_MACS // max(1, cost(arch).macs)))


def _check_c(code: CSource, net: IntegerNet, pixels: np.ndarray, expected: np.ndarray,
             timed: int) -> tuple[Footprint | None, float | None, str]:
    found = c_build.tools()
    if found is None:
        return None, None, ("C compile check and C latency skipped: gcc and binutils' size are not both on PATH "
                            "(Debian: apt-get install gcc binutils); model_int8.c and model_int8.h are written all the same")
    with c_build.scratch() as folder:
        obj = c_build.compile_model(code, found, Path(folder))
        footprint = c_build.footprint(code, found, obj)
        runner = c_build.build_runner(found, obj)
        scores, classes, _ = c_build.run(runner, pixels, net.classes)
        _, _, nanoseconds = c_build.run(runner, pixels[:timed], net.classes, LATENCY_REPEATS)
    if not np.array_equal(scores, expected) or not np.array_equal(classes, expected.argmax(axis=1)):
        raise RuntimeError(f"{net.arch}: the C build's scores differ from the integer reference on "
                           f"{int((scores != expected).any(axis=1).sum())} of {len(pixels)} held-out images")
    if footprint.arena != code.arena_bytes or footprint.constant_bytes != code.constant_bytes:
        raise RuntimeError(f"{net.arch}: size -A shows arena {footprint.arena} B and constant data "
                           f"{footprint.constant_bytes} B; the source declares {code.arena_bytes} B and {code.constant_bytes} B")
    line = (f"C build checked: gcc {' '.join(c_build.WARNINGS)} {c_build.OPTIMIZE} compiles it, and it gives the integer "
            f"reference's int8 scores exactly on all {len(pixels)} held-out images")
    return footprint, nanoseconds / 1e6, line


def _emulated_images(arch: Arch, held_out: int) -> int:
    """How many held-out images each emulated core classifies: all, unless the network is large."""
    return min(held_out, max(5, EMULATED_MACS // max(1, cost(arch).macs)))


def check_arm(code: CSource, net: IntegerNet, pixels: np.ndarray,
              expected: np.ndarray) -> tuple[tuple[CoreRun, ...], str]:
    """Every emulated core's run of the C file on `pixels`, checked against `expected` scores and the
    declared arena and constant data; one line for the log and the card."""
    found = arm_build.arm_tools()
    if found is None:
        return (), ("ARM check skipped: arm-none-eabi-gcc, arm-none-eabi-size and qemu-system-arm are not all on PATH "
                    "(Debian: apt-get install gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm)")
    profiled = generate(net, profile=True)
    with c_build.scratch() as folder:
        outcome = emulate.run_cores(code, profiled, pixels, expected, found, Path(folder))
    runs = tuple(run for run in outcome if isinstance(run, CoreRun))
    for run in runs:
        if run.footprint.arena != code.arena_bytes or run.footprint.constant_bytes != code.constant_bytes:
            raise RuntimeError(f"{net.arch}: arm-none-eabi-size -A for {run.core.name} shows arena "
                               f"{run.footprint.arena} B and constant data {run.footprint.constant_bytes} B; "
                               f"the source declares {code.arena_bytes} B and {code.constant_bytes} B")
    lines = [run for run in outcome if isinstance(run, str)]  # cores the model does not fit
    if runs:
        lines.insert(0, f"ARM builds checked: arm-none-eabi-gcc -O2 -mthumb for {', '.join(r.core.name for r in runs)}, "
                        f"run under qemu-system-arm ({', '.join(r.core.board for r in runs)}), give the integer "
                        f"reference's int8 scores exactly on {runs[0].images} held-out images")
    return runs, "; ".join(lines)


def write_deploy_files(folder: Path, model: Any, arch: Arch, train_images: Any, test_images: Any, test_labels: Any,
                       class_names: tuple[str, ...], settings: QuantSettings = QuantSettings()) -> DeployReport:
    """Quantize the trained `model` (calibrating on `train_images`), write the ONNX and C files into
    `folder`, and check and time them on the held-out images (uint8 pixels or floats in [0, 1], N×C×H×W)."""
    import torch

    net = quantized(model, arch, train_images, settings)
    images = unit_images(test_images)
    pixels = to_pixels(images)
    expected = int8_reference.scores(net, pixels)
    held_out = scores(np.asarray(test_labels), expected.argmax(axis=1), len(class_names))

    onnx_files.write_fp32(model, arch, folder / "model.onnx")
    fp32 = onnx_files.session(folder / "model.onnx")
    with torch.inference_mode():
        reference = model.eval()(torch.as_tensor(images)).numpy()
    difference = float(np.abs(onnx_files.run(fp32, images) - reference).max())
    latency = onnx_files.median_latency(fp32, images[:_timed_images(arch)], LATENCY_REPEATS) * 1e3

    int8_model = onnx_files.int8_model(net)
    onnx.save(int8_model, str(folder / "model_int8.onnx"))
    agreement = [float(np.mean(expected.argmax(axis=1) == onnx_files.run(
        onnx_files.session(folder / "model_int8.onnx", fused=fused), pixels.astype(np.float32) / 255).argmax(axis=1)))
        for fused in (False, True)]

    code = generate(net, class_names)
    c_build.write_sources(code, folder)
    peak, weights = prove(arch, code)
    footprint, c_latency, line = _check_c(code, net, pixels, expected, _timed_images(arch))
    log.info(line)
    emulated = _emulated_images(arch, len(pixels))
    arm, arm_line = check_arm(code, net, pixels[:emulated], expected[:emulated])
    log.info(arm_line)
    return DeployReport(net, code, held_out.accuracy, held_out.balanced_accuracy, difference, *agreement, latency,
                        c_latency, line, peak, weights, footprint, arm, arm_line)
