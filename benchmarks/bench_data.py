"""Data held as bytes and augmentation, measured side by side in one run.

Run: python benchmarks/bench_data.py [memory|decode|convert|augment|accuracy|all] [--images N] [--folder DIR]

- memory: peak memory and load time for N generated RGB 64×64 PNGs (default 20,000), the old way
  (load_dataset of searcher/data/load.py at commit ddd7eb6, taken from git: serial decode into float32
  tensors, kept whole in its cache beside the split copies) against the new one (uint8, in parallel, only
  the parts kept), each in a fresh process; also reading back the decoded copy a run folder keeps.
  Goal: a data set costs about its pixel count in bytes.
- decode: the same folder decoded serially, by threads and by forked processes (runs of 64 files; the
  loader uses processes where Linux forks).
- convert: training images per second, uint8 converted per batch against float32 prepared up front
  (goal: at most 5% slower), on a 3×64×64 candidate and a small 1×32×32 one, one thread, rounds
  interleaved, median of paired ratios.
- augment: the same with augmentation on against off (goal: at least 0.85×).
- accuracy: fixed candidates with and without augmentation on the demo and on scikit-learn's digits,
  three seeds each: validation accuracy after the search's 6 epochs, and test accuracy after export's
  retraining (18 epochs on train+validation). Printed, not a goal.
The machine may be shared: rounds are interleaved so that outside load falls on both sides alike.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import statistics
import subprocess
import sys
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))  # run from a checkout without installing
sys.path.insert(0, str(ROOT / "tests"))  # the tests' helpers

from searcher.data import folder as folder_module  # noqa: E402
from searcher.data.layout import concatenate  # noqa: E402
from searcher.data.load import load_dataset, save_decoded  # noqa: E402

SHAPE = (3, 64, 64)
TRAIN_ARCHS = (  # a mid-size RGB candidate, and a small gray one where per-batch work weighs most
    "3x64x64_c16k3-m2_c32k3-m2_c64k3-m2_gap-o10_relu_bn",
    "1x32x32_c8k3-m2_c16k3-m2_flat-d32-o10_relu_bn",
)


def make_folder(folder: Path, count: int) -> Path:
    """`count` RGB 64×64 PNGs in 10 class folders: smooth colour fields with noise (compress like photos)."""
    marker = folder / f".complete-{count}"
    if marker.exists():
        return folder
    from PIL import Image

    rng = np.random.default_rng(0)
    y, x = np.mgrid[:64, :64] / 64
    for i in range(count):
        cls = folder / f"class{i % 10}"
        cls.mkdir(parents=True, exist_ok=True)
        colour = rng.uniform(40, 200, 3)
        field = colour + 50 * np.stack([np.sin(6 * x + i), np.cos(5 * y), x * y], -1)
        pixels = np.clip(field + rng.normal(0, 12, (64, 64, 3)), 0, 255).astype(np.uint8)
        Image.fromarray(pixels).save(cls / f"{i:06d}.png")
    marker.touch()
    return folder


OLD_COMMIT = "ddd7eb6"  # the last commit whose loader held float32 tensors and decoded serially


def _old_load(folder: Path) -> object:
    """load_dataset as it was at OLD_COMMIT, its module read from git history and imported as it stood."""
    import importlib.util
    import tempfile

    source = subprocess.run(["git", "-C", str(ROOT), "show", f"{OLD_COMMIT}:searcher/data/load.py"], check=True,
                            capture_output=True, text=True).stdout
    path = Path(tempfile.mkdtemp()) / "old_load.py"
    path.write_text(source)
    spec = importlib.util.spec_from_file_location("old_load", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules["old_load"] = module  # its dataclasses look their module up there
    spec.loader.exec_module(module)
    return module.load_dataset(str(folder), SHAPE)


def _rss() -> int:
    with open("/proc/self/status") as handle:
        return next(int(line.split()[1]) * 1024 for line in handle if line.startswith("VmRSS"))


def child(way: str, folder: Path, cache: Path) -> None:
    """Measured in a fresh process: prints seconds, peak and resting memory above the start. The peak is
    this process's own; forked decoding workers (small, sharing its pages) are not counted."""
    import torch  # noqa: F401  (both ways run in a process that trains, so torch is loaded first)

    base = _rss()
    started = time.perf_counter()
    if way == "old":
        kept = _old_load(folder)
    elif way == "cached":
        kept = load_dataset(str(folder), SHAPE, cache=cache)
    else:
        kept = load_dataset(str(folder), SHAPE)
    seconds = time.perf_counter() - started
    if way == "new":
        save_decoded(cache, kept)  # as a search does next (not timed; its memory counts in the peak)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps({"seconds": seconds, "peak": peak - base, "resting": _rss() - base}))
    del kept


def run_child(way: str, folder: Path, cache: Path) -> dict:
    out = subprocess.run([sys.executable, __file__, "_child", way, str(folder), str(cache)], check=True,
                         capture_output=True, text=True, env={**os.environ, "OMP_NUM_THREADS": "1"})
    return json.loads(out.stdout.strip().splitlines()[-1])


def bench_memory(folder: Path, count: int) -> None:
    cache = folder.parent / f"{folder.name}-run"
    (cache / "decoded.npz").unlink(missing_ok=True)
    pixels = count * int(np.prod(SHAPE))
    print(f"\nmemory: {count:,} RGB 64×64 PNGs ({pixels / 2**20:,.0f} MiB of pixels), each way in a fresh process")
    print(f"{'way':34} {'load s':>8} {'peak MiB':>9} {'resting MiB':>12}")
    rows = {}
    for way, label in (("old", "old: serial, float32 (ddd7eb6)"), ("new", "new: uint8, in parallel"),
                       ("cached", "new: read back from the run folder")):
        rows[way] = run_child(way, folder, cache)
        r = rows[way]
        print(f"{label:34} {r['seconds']:8.1f} {r['peak'] / 2**20:9.0f} {r['resting'] / 2**20:12.0f}")
    print(f"new/old peak memory {rows['new']['peak'] / rows['old']['peak']:.2f}, resting "
          f"{rows['new']['resting'] / rows['old']['resting']:.2f}; load time new/old "
          f"{rows['new']['seconds'] / rows['old']['seconds']:.2f}, cached/old "
          f"{rows['cached']['seconds'] / rows['old']['seconds']:.2f}")


def _decode_with_threads(folder: Path) -> object:
    """decode_folder with its workers as threads instead of forked processes."""
    forked = folder_module._pool
    folder_module._pool = lambda workers: ThreadPoolExecutor(workers)
    try:
        return folder_module.decode_folder(folder, *SHAPE)
    finally:
        folder_module._pool = forked


def bench_decode(folder: Path, rounds: int) -> None:
    count = sum(len(members) for _, members in folder_module.class_folders(folder))
    ways = {
        "serial": lambda: folder_module.decode_folder(folder, *SHAPE, workers=1),
        "threads": lambda: _decode_with_threads(folder),
        "processes (fork)": lambda: folder_module.decode_folder(folder, *SHAPE),
    }
    times: dict[str, list[float]] = {w: [] for w in ways}
    for _ in range(rounds):
        for way, call in ways.items():
            started = time.perf_counter()
            call()
            times[way].append(time.perf_counter() - started)
    best = {w: min(t) for w, t in times.items()}
    print(f"\ndecode: {count:,} PNGs, {folder_module.default_workers()} workers, best of {rounds} rounds")
    for way, seconds in best.items():
        print(f"  {way:18} {seconds:6.2f} s  {count / seconds:8,.0f} images/s  "
              f"{best['serial'] / seconds:.2f}× serial")


def _train_speed(arch: str, images: object, labels: np.ndarray, settings: object, seed: int) -> float:
    from searcher.core.arch import parse_arch
    from searcher.model.build import build
    from searcher.model.train import train_candidate

    model = build(parse_arch(arch))
    result = train_candidate(model, images, labels, images[:256], labels[:256], settings, seed=seed, threads=1)
    return result.images_per_second


def bench_training(kind: str, rounds: int, arch: str) -> None:
    import torch

    from searcher.core.arch import parse_arch
    from searcher.core.train_settings import AugmentSettings, TrainSettings

    shape = parse_arch(arch).input_shape
    count = 3072 if shape[0] == 3 else 12288  # about the same seconds per round for either candidate
    rng = np.random.default_rng(0)
    images = rng.integers(0, 256, (count, *shape), dtype=np.uint8)
    labels = (np.arange(count) % 10).astype(np.int64)
    plain = TrainSettings(epochs=1, batch_size=128)
    if kind == "convert":
        floats = (torch.from_numpy(images).float() * (1 / 255)).contiguous(memory_format=torch.channels_last)
        sides = {"float32 up front": (floats, plain), "uint8 per batch": (images, plain)}
        base, goal = "float32 up front", "≤ 5% slower"
    else:
        shift = TrainSettings(epochs=1, batch_size=128, augment=AugmentSettings(shift=4))
        every = TrainSettings(epochs=1, batch_size=128, augment=AugmentSettings(
            shift=4, flip=True, rotate=10, scale=0.1, brightness=0.1, contrast=0.1))
        sides = {"off": (images, plain), "shift 4": (images, shift), "all six on": (images, every)}
        base, goal = "off", "≥ 0.85×"
    speeds: dict[str, list[float]] = {s: [] for s in sides}
    for r in range(rounds + 1):  # round 0 warms up and is not counted
        for side, (x, settings) in sides.items():
            speed = _train_speed(arch, x, labels, settings, seed=r)
            if r:
                speeds[side].append(speed)
    print(f"\n{kind}: {arch}, {count:,} images, batch 128, 1 thread, {rounds} rounds (goal {goal})")
    for side in sides:
        ratios = [s / b for s, b in zip(speeds[side], speeds[base])]
        print(f"  {side:18} median {statistics.median(speeds[side]):7.0f} images/s   "
              f"median paired ratio to {base}: {statistics.median(ratios):.3f} (range {min(ratios):.3f}-{max(ratios):.3f})")


ACCURACY_SETS = {
    # data, architecture, epochs (as export retrains: 3× the search's 6), augmentation choices
    "demo": ("demo", "1x32x32_c8k3-m2_c16k3-m2_flat-d32-o8_relu_bn", 18,
             {"off": {}, "shift 2": {"shift": 2}, "shift 2, rotate 10": {"shift": 2, "rotate": 10},
              "shift 2, rotate 10, scale 0.1, brightness 0.1, contrast 0.2":
                  {"shift": 2, "rotate": 10, "scale": 0.1, "brightness": 0.1, "contrast": 0.2}}),
    "digits": ("digits", "1x8x8_c16k3-m2_c32k3_gap-o10_relu_bn", 18,
               {"off": {}, "shift 1": {"shift": 1}, "shift 1, rotate 10": {"shift": 1, "rotate": 10},
                "rotate 10, scale 0.1": {"rotate": 10, "scale": 0.1}}),
}


def _digits_npz(folder: Path) -> Path:
    from sklearn.datasets import load_digits

    digits = load_digits()  # UCI optical digits as shipped with scikit-learn, 8×8, values 0–16
    path = folder / "digits.npz"
    np.savez(path, images=np.round(digits.images * 255 / 16).astype(np.uint8), labels=digits.target)
    return path


def bench_accuracy(folder: Path, seeds: int) -> None:
    from searcher.core.arch import parse_arch
    from searcher.core.train_settings import AugmentSettings, TrainSettings
    from searcher.model.build import build
    from searcher.model.train import evaluate_scores, train_candidate

    print(f"\naccuracy, seeds 0-{seeds - 1}: the search's view (6 epochs on train, validation accuracy) and "
          "export's (retrained on train+val, test accuracy)")
    for name, (source, arch_text, epochs, choices) in ACCURACY_SETS.items():
        arch = parse_arch(arch_text)
        data = load_dataset(str(_digits_npz(folder)) if source == "digits" else source, arch.input_shape)
        images = concatenate([data.train.images, data.val.images])
        labels = np.concatenate([data.train.labels, data.val.labels])
        print(f"  {name}: {arch_text}; {len(data.train.labels)} train, {len(data.val.labels)} validation, "
              f"{len(data.test.labels)} test images")
        for label, augment in choices.items():
            proxy, final = [], []
            for seed in range(seeds):
                settings = TrainSettings(augment=AugmentSettings(**augment))
                result = train_candidate(build(arch), data.train.images, data.train.labels, data.val.images,
                                         data.val.labels, settings, seed=seed, threads=1)
                proxy.append(result.val_accuracy)
                model = build(arch)
                train_candidate(model, images, labels, data.val.images, data.val.labels,
                                TrainSettings(epochs=epochs, augment=settings.augment), seed=seed, threads=1)
                final.append(evaluate_scores(model, data.test.images, data.test.labels, data.num_classes)[0].accuracy)
            print(f"    {label:58} search val {statistics.mean(proxy):.4f} ({', '.join(f'{a:.3f}' for a in proxy)})"
                  f"   export test {statistics.mean(final):.4f} ({', '.join(f'{a:.3f}' for a in final)})")


def main() -> None:
    if len(sys.argv) > 1 and sys.argv[1] == "_child":
        child(sys.argv[2], Path(sys.argv[3]), Path(sys.argv[4]))
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("what", nargs="?", default="all",
                        choices=["memory", "decode", "convert", "augment", "accuracy", "all"])
    parser.add_argument("--images", type=int, default=20_000)
    parser.add_argument("--folder", type=Path, default=Path("/tmp/searcher-bench-data"))
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--seeds", type=int, default=3)
    args = parser.parse_args()
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    folder = args.folder / f"rgb64-{args.images}"
    if args.what in ("memory", "decode", "all"):
        started = time.perf_counter()
        make_folder(folder, args.images)
        print(f"test folder ready: {folder} ({time.perf_counter() - started:.0f} s)")
    if args.what in ("memory", "all"):
        bench_memory(folder, args.images)
    if args.what in ("decode", "all"):
        bench_decode(folder, args.rounds)
    for kind in ("convert", "augment"):
        if args.what in (kind, "all"):
            for arch in TRAIN_ARCHS:
                bench_training(kind, args.rounds * 2, arch)
    if args.what in ("accuracy", "all"):
        bench_accuracy(args.folder, args.seeds)


if __name__ == "__main__":
    main()
