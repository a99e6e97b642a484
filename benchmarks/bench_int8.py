"""int8 speed and calibration figures, measured side by side in one run.

Run: python benchmarks/bench_int8.py [speed|calibration] [--candidates N]

speed (default): for N fitting candidates of examples/stamp_inspection.toml on the demo data,
  * the proxy training's wall time and the int8 check's (searcher.int8.check.int8_accuracy on
    the validation split, calibration included), fast engine and reference engine, as a share of it
    (goal: ≤ 10% with the engine the search would use);
  * images per second on the test split: the integer reference (int64 engine and fast engine), the
    C build (gcc -O2, one call at a time, median) and, for orientation, fp32 model.onnx in onnxruntime.
calibration: held-out int8 accuracy with min/max ranges against the 99.99th and 99.9th percentile,
  on the demo (stamp-inspection space) and the UCI digits (scikit-learn; examples/digits.toml).

Everything runs on one thread (torch, BLAS), as a search worker on a busy machine would.
"""

from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

os.environ.setdefault("OMP_NUM_THREADS", "1")  # BLAS and torch on one thread, before numpy loads
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # run from a checkout without installing
sys.path.insert(0, str(ROOT / "tests"))  # the tests' helpers

import numpy as np  # noqa: E402
import torch  # noqa: E402

from int8kit import demo_data, digits_data, trained  # noqa: E402  (this folder is on the path as a script)
from searcher.core.cost import cost  # noqa: E402
from searcher.core.space_file import load_space  # noqa: E402
from searcher.model.train import TrainSettings, evaluate  # noqa: E402
from searcher.int8 import reference as int8_reference
from searcher.ship import c_build, onnx_files  # noqa: E402
from searcher.ship.c_source import generate  # noqa: E402
from searcher.int8.check import int8_accuracy, quantized, unit_images  # noqa: E402
from searcher.int8.quantize import QuantSettings, to_pixels  # noqa: E402

CALIBRATIONS = {"minmax": QuantSettings(), "p99.99": QuantSettings(calibration="percentile", percentile=99.99),
                "p99.9": QuantSettings(calibration="percentile", percentile=99.9)}


def fitting(space_file: Path, count: int, classes: int, seed: int = 0) -> tuple[list, TrainSettings]:
    """The first `count` seeded draws that meet every cap of the space's budget, and its training settings."""
    space = load_space(space_file)
    found, draw = [], seed
    while len(found) < count:
        arch = space.random(draw, classes)
        draw += 1
        if not space.budget.check(space.budget.totals(cost(arch, space.budget.activation_precision))):
            found.append(arch)
    return found, TrainSettings.from_dict(space.train)


def timed(call, repeats: int = 1) -> tuple[float, object]:
    best, value = float("inf"), None
    for _ in range(repeats):
        start = time.perf_counter()
        value = call()
        best = min(best, time.perf_counter() - start)
    return best, value


def speed(count: int) -> None:
    torch.set_num_threads(1)
    archs, settings = fitting(ROOT / "examples" / "stamp_inspection.toml", count, classes=8)
    found = c_build.tools()
    print(f"{count} fitting candidates of stamp_inspection.toml on the demo data; torch {torch.__version__}, one thread")
    print(f"{'candidate':<68}{'MACs':>9}{'train s':>9}{'check fast':>11}{'share':>7}{'check ref':>10}{'share':>7}"
          f"{'ref img/s':>10}{'fast img/s':>11}{'C img/s':>9}{'ORT fp32':>9}")
    shares = []
    for arch in archs:
        data = demo_data(arch.input_shape)
        model, result = trained(arch, data, settings)
        args = (model, arch, data.train.images, data.val.images, data.val.labels)
        fast_s, fast_acc = timed(lambda: int8_accuracy(*args, fast=True), 2)
        ref_s, ref_acc = timed(lambda: int8_accuracy(*args, fast=False))
        assert fast_acc == ref_acc, (arch, fast_acc, ref_acc)
        net = quantized(model, arch, data.train.images)
        pixels = to_pixels(unit_images(data.test.images))
        ref_run, expected = timed(lambda: int8_reference.scores(net, pixels))
        fast_run, _ = timed(lambda: int8_reference.scores(net, pixels, fast=True), 2)
        c_rate = float("nan")
        if found is not None:
            with c_build.scratch() as folder:
                runner = c_build.build_runner(found, c_build.compile_model(generate(net), found, Path(folder)))
                scores, _, nanoseconds = c_build.run(runner, pixels, net.classes, repeats=1)
            assert np.array_equal(scores, expected)
            c_rate = 1e9 / nanoseconds
        with c_build.scratch() as folder:
            onnx_files.write_fp32(model, arch, Path(folder) / "model.onnx")
            ort_rate = 1 / onnx_files.median_latency(onnx_files.session(Path(folder) / "model.onnx"),
                                                     unit_images(data.test.images[:128]), 1)
        shares.append(fast_s / result.seconds)
        print(f"{arch.to_text():<68}{cost(arch).macs:>9,}{result.seconds:>9.2f}{fast_s:>10.3f}s{fast_s / result.seconds:>7.1%}"
              f"{ref_s:>9.3f}s{ref_s / result.seconds:>7.1%}{len(pixels) / ref_run:>10.0f}{len(pixels) / fast_run:>11.0f}"
              f"{c_rate:>9.0f}{ort_rate:>9.0f}")
    print(f"\nint8 check (fast engine) per candidate: median {statistics.median(shares):.1%}, largest {max(shares):.1%} "
          f"of its proxy training time (goal ≤ 10%); {len(data.val.labels)} validation images, "
          f"{QuantSettings().images} calibration images")
    print("C img/s: one model_classify call at a time, median over the test split (gcc -O2, this CPU); "
          "ORT fp32: batch 1, one thread, median")


def calibration(count: int) -> None:
    torch.set_num_threads(1)
    cases = [("demo", ROOT / "examples" / "stamp_inspection.toml", 8, lambda arch: demo_data(arch.input_shape)),
             ("digits", ROOT / "examples" / "digits.toml", 10, lambda arch: digits)]
    digits = digits_data()
    print(f"held-out int8 accuracy by calibration, {count} fitting candidates per data set (proxy training as searched)")
    print(f"{'data':<8}{'candidate':<68}{'fp32':>8}" + "".join(f"{name:>9}" for name in CALIBRATIONS))
    totals: dict[str, list[float]] = {name: [] for name in CALIBRATIONS}
    for label, space_file, classes, data_of in cases:
        archs, settings = fitting(space_file, count, classes)
        for arch in archs:
            data = data_of(arch)
            model, _ = trained(arch, data, settings)
            fp32, _ = evaluate(model, data.test.images, data.test.labels)
            row = {name: int8_accuracy(model, arch, data.train.images, data.test.images, data.test.labels,
                                       settings=quant) for name, quant in CALIBRATIONS.items()}
            for name, value in row.items():
                totals[name].append(value - fp32)
            print(f"{label:<8}{arch.to_text():<68}{fp32:>8.4f}" + "".join(f"{v:>9.4f}" for v in row.values()))
    print("\nmean change from fp32: " + ", ".join(f"{name} {statistics.mean(v):+.4f} (worst {min(v):+.4f})"
                                               for name, v in totals.items()))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("what", nargs="?", default="speed", choices=("speed", "calibration"))
    parser.add_argument("--candidates", type=int, default=5)
    args = parser.parse_args()
    (speed if args.what == "speed" else calibration)(args.candidates)


if __name__ == "__main__":
    main()
