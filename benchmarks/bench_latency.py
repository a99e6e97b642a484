"""Fit the latency model to emulated instruction counts, and measure its error on candidates it was not fitted on.

Run: python benchmarks/bench_latency.py [check|fit] [--per-space N] [--cores cortex-m4,...] [--cache FILE]

check (default): the first N (25) draws of each shipped space that meet the space's budget, each
  built with seeded random weights, cross-compiled and run under QEMU on one image per core
  (searcher.ship.emulate); printed per space and core: the model's error against the emulated
  instructions per inference (searcher.core.latency.predict), mean and worst, and how many
  candidates are within 10% (goal: all). Candidates in the fitting set are left out.
fit: per-layer instruction counts (the profiled build) of the fitting set: N fitting draws per
  shipped space and per example space from other seeds, plus a few hand-picked shapes (strides,
  every pool, both heads, colour input); non-negative least squares per core on the counts of
  searcher.core.latency.TERMS; writes searcher/core/latency_coefficients.json with the fingerprint
  of the kernels it was fitted on, and prints the in-sample error per network.

Emulated counts are kept in --cache (default runs/bench-latency-cache.json) by architecture, core,
build and kernel fingerprint, so a second run only emulates what is new.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # run from a checkout without installing
sys.path.insert(0, str(ROOT / "benchmarks"))

import numpy as np  # noqa: E402
from scipy.optimize import nnls  # noqa: E402  (a test dependency: the fit runs here, never in the package)

from bench_target import fitting_draws, random_net, tools_and_cores  # noqa: E402
from searcher.core import latency  # noqa: E402
from searcher.core.arch import Arch, parse_arch  # noqa: E402
from searcher.core.space_file import builtin_space  # noqa: E402
from searcher.int8 import reference as int8_reference  # noqa: E402
from searcher.int8.quantize import to_pixels  # noqa: E402
from searcher.ship import arm_build, emulate  # noqa: E402
from searcher.ship.c_source import generate, kernel_fingerprint  # noqa: E402

SPACES = ("mcu", "workstation", "classic", "edge_rgb")
EXAMPLES = (ROOT / "examples" / "stamp_inspection.toml", ROOT / "examples" / "digits.toml")
SHAPES = (  # strides, both pools, both heads, colour input, channels not a multiple of four, 1x1 and 7x7 kernels
    "1x16x16_c8k3-m2_c16k5-a2_flat-d32-o8_hardswish_bn", "1x12x12_c4k5v-a2_gap-d8-o3_tanh",
    "3x10x10_c6k3s2-m3s2_flat-o4_sigmoid", "1x8x8_c4k3_gap-o2_relu6_bn", "1x9x9_c4k3-a3s2_c6k3v-m2_gap-d5-r0.2-o3_relu",
    "3x32x32_c12k3s2-c12k1_c20k7-m2_gap-d10-o5_relu_bn", "2x20x20_c5k3-a2_c7k3-m2_flat-d9-d6-o7_tanh",
)
FIT_SEED, CHECK_SEED = 100_000, 0  # draws start here: the two sets come from different seeds
CACHE = ROOT / "runs" / "bench-latency-cache.json"
FLOOR = 2000  # rows are weighted by 1 / max(count, FLOOR): relative error, but a layer of a few dozen instructions
# (a global average over a 1x1 map, which the compiler turns into a copy) does not steer the fit


class Emulator:
    """Emulated counts per (architecture, core, build), cached in a JSON file."""

    def __init__(self, path: Path, cores: list, tools):
        self.path, self.cores, self.tools = path, cores, tools
        self.kernels = kernel_fingerprint()
        self.cache = json.loads(path.read_text()) if path.exists() else {}

    def counts(self, arch: Arch, profile: bool) -> dict[str, dict]:
        """Per core: {"total": n} (exact build) or {"layers": [[name, n], ...], "total": n} (profiled)."""
        key = f"{self.kernels} {'profiled' if profile else 'exact'} {arch.to_text()}"
        wanted = [core for core in self.cores if core.name not in self.cache.get(key, {})]
        if wanted:
            net = random_net(arch)
            pixels = to_pixels(np.random.default_rng(1).random((1, *arch.input_shape), dtype=np.float32))
            expected = int8_reference.scores(net, pixels)
            with tempfile.TemporaryDirectory(prefix="bench-latency-") as folder:
                runs = emulate.run_cores(generate(net), generate(net, profile=True) if profile else None, pixels,
                                         expected, self.tools, Path(folder), tuple(wanted))
            entry = self.cache.setdefault(key, {})
            for core, run in zip(wanted, runs):
                entry[core.name] = None if isinstance(run, str) else {"total": run.instructions,
                                                                      "layers": [list(r) for r in run.layers]}
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self.path.write_text(json.dumps(self.cache))
        return {core.name: self.cache[key][core.name] for core in self.cores}


def design(arch: Arch) -> dict[str, dict[str, float]]:
    """Row name -> the counts of latency.TERMS for one architecture."""
    return {name: {k: float(v) for k, v in terms.items()} for name, terms in latency.layer_terms(arch)}


def fit(emulator: Emulator, archs: list[Arch]) -> dict[str, dict[str, float]]:
    """Non-negative least squares per core on every layer row, each row weighted by 1/count (its relative
    error counts, so small layers are not drowned by large ones); columns scaled to unit length first,
    which keeps the solver's arithmetic sound over counts from tens to tens of millions."""
    coefficients = {}
    for core in emulator.cores:
        rows, targets = [], []
        for arch in archs:
            measured = emulator.counts(arch, profile=True)[core.name]
            if measured is None:
                continue
            terms = design(arch)
            for name, count in measured["layers"]:
                rows.append([terms[name].get(t, 0.0) for t in latency.TERMS])
                targets.append(float(count))
        y = np.array(targets)
        x = np.array(rows) / np.maximum(y, FLOOR)[:, None]
        scale = np.linalg.norm(x, axis=0)
        scale[scale == 0] = 1
        beta, _ = nnls(x / scale, y / np.maximum(y, FLOOR), maxiter=100 * len(latency.TERMS))
        coefficients[core.name] = {t: round(float(b), 4) for t, b in zip(latency.TERMS, beta / scale)}
    return coefficients


def errors(emulator: Emulator, archs: list[Arch], core: str) -> list[float]:
    """Relative error of the prediction against the exact build's emulated count, per network."""
    target = latency.Target(core, 1e8)
    out = []
    for arch in archs:
        measured = emulator.counts(arch, profile=False)[core]
        if measured is not None:
            out.append(latency.predict(arch, target).instructions / measured["total"] - 1)
    return out


def report(label: str, errs: list[float]) -> str:
    e = np.abs(errs) * 100
    return (f"{label:<26} {len(e):>3} candidates  mean {e.mean():5.1f}%  worst {e.max():5.1f}%  "
            f"within 10%: {int((e <= 10).sum())}/{len(e)}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("mode", nargs="?", default="check", choices=("check", "fit"))
    parser.add_argument("--per-space", type=int, default=None, help="candidates per space (check 25, fit 20)")
    parser.add_argument("--cores", default=",".join(arm_build.CORE_NAMES), help="cores, comma-separated")
    parser.add_argument("--cache", type=Path, default=CACHE, help=f"emulated counts kept here (default {CACHE})")
    args = parser.parse_args()
    tools, cores = tools_and_cores(args.cores)
    emulator = Emulator(args.cache, cores, tools)
    start = time.perf_counter()
    fitted = [parse_arch(t) for t in SHAPES]
    per_space = args.per_space or (20 if args.mode == "fit" else 25)
    fit_per_space = per_space if args.mode == "fit" else 20
    for space in (*[builtin_space(s) for s in SPACES], *EXAMPLES):
        fitted += fitting_draws(space, fit_per_space, FIT_SEED)
    if args.mode == "fit":
        coefficients = fit(emulator, fitted)
        data = {"about": "searcher.core.latency: instructions per count, fitted by benchmarks/bench_latency.py fit",
                "kernels": emulator.kernels, "fitted_on": sorted({a.to_text() for a in fitted}),
                "cycles_per_instruction": {core.name: 1.0 for core in cores}, "coefficients": coefficients}
        path = ROOT / "searcher" / "core" / latency.COEFFICIENTS
        path.write_text(json.dumps(data, indent=1) + "\n", encoding="utf-8")
        latency._data.cache_clear()
        print(f"wrote {path.relative_to(ROOT)} from {len(fitted)} networks ({time.perf_counter() - start:.0f} s)")
        for core in cores:
            print(report(f"in sample, {core.name}", errors(emulator, fitted, core.name)))
        return
    seen = {a.to_text() for a in fitted}
    if latency._data()["kernels"] != emulator.kernels:
        print("warning: the shipped coefficients were fitted on other kernels; run `fit` first")
    for name in SPACES:
        unseen = [a for a in fitting_draws(builtin_space(name), per_space + 10, CHECK_SEED) if a.to_text() not in seen]
        unseen = unseen[:per_space]
        for core in cores:
            print(report(f"{name}, {core.name}", errors(emulator, unseen, core.name)))
    print(f"({time.perf_counter() - start:.0f} s)")


if __name__ == "__main__":
    main()
