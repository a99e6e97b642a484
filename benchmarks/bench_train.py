"""Proxy trainer speed against a plain DataLoader training loop, side by side in one run.

Run: python benchmarks/bench_train.py [--threads N] [--rounds R]

Each round trains every candidate with the proxy trainer (channels-last, and NCHW to show
what the layout alone gives) and with a hand-written loop over a DataLoader, interleaved so
that load from other processes falls on all of them alike; the best round of each counts.
Goal: the proxy trainer ≥ 1.2× the plain loop's training images per second on every candidate.
Also printed: training FLOP/s on the largest candidate as a share of a 1024×1024 fp32 matmul.
On a shared machine prefer --threads 1: two OpenMP threads on two busy cores wait on each other and the
figures swing several-fold between runs; the median of paired per-round ratios is the steadier figure.
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset
from torch.utils.flop_counter import FlopCounterMode

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # run from a checkout without installing
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))  # the tests' helpers

from test_train import small_net  # noqa: E402  (this folder is on the path when run as a script)

from searcher.model.train import TrainSettings, train_candidate  # noqa: E402

CANDIDATES = {"small": (8, 16, 32), "medium": (16, 32, 64), "large": (32, 64, 128)}
CLASSES = 10
SIDES = {"proxy": 9, "proxy NCHW": 12, "DataLoader": 12}  # column widths of the table


def candidate(widths: tuple[int, ...]) -> nn.Module:
    return small_net(in_channels=1, classes=CLASSES, widths=widths)


def plain_loop(model: nn.Module, images: torch.Tensor, labels: torch.Tensor, settings: TrainSettings) -> float:
    """The usual hand-written loop: DataLoader over a TensorDataset, NCHW, loss.item() each step."""
    loader = DataLoader(TensorDataset(images, labels), batch_size=settings.batch_size, shuffle=True)
    optimizer = torch.optim.AdamW(model.parameters(), lr=settings.learning_rate, weight_decay=settings.weight_decay)
    schedule = torch.optim.lr_scheduler.OneCycleLR(
        optimizer, max_lr=settings.learning_rate, total_steps=settings.epochs * len(loader)
    )
    seen, seconds = 0, 0.0
    for _ in range(settings.epochs):
        model.train()
        running = 0.0
        start = time.perf_counter()
        for x, y in loader:
            optimizer.zero_grad()
            loss = F.cross_entropy(model(x), y, label_smoothing=settings.label_smoothing)
            loss.backward()
            optimizer.step()
            schedule.step()
            running += loss.item()
            seen += len(y)
        seconds += time.perf_counter() - start
    return seen / seconds


def forward_flops(model: nn.Module, batch: torch.Tensor) -> int:
    counter = FlopCounterMode(display=False)
    with counter:
        model(batch)
    return counter.get_total_flops()


def matmul_flops_per_second(repeats: int = 20) -> float:
    a, b = torch.randn(1024, 1024), torch.randn(1024, 1024)
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - start)
    return 2 * 1024**3 / best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=torch.get_num_threads(), help="torch threads for every side")
    parser.add_argument("--rounds", type=int, default=3, help="interleaved repeats; the best of each counts")
    parser.add_argument("--images", type=int, default=2048, help="training images (32×32×1, random)")
    parser.add_argument("--epochs", type=int, default=2)
    args = parser.parse_args()

    torch.set_num_threads(args.threads)
    generator = torch.Generator().manual_seed(0)
    images = torch.rand(args.images, 1, 32, 32, generator=generator)
    labels = torch.randint(0, CLASSES, (args.images,), generator=generator)
    val_images, val_labels = images[:256], labels[:256]
    ours = TrainSettings(epochs=args.epochs)
    ours_nchw = TrainSettings(epochs=args.epochs, channels_last=False)

    speeds: dict[tuple[str, str], list[float]] = {}  # (candidate, side) -> images/s per round
    matmuls: list[float] = []
    for round_index in range(args.rounds):
        for name, widths in CANDIDATES.items():
            runs = {
                "proxy": lambda: train_candidate(
                    candidate(widths), images, labels, val_images, val_labels, ours, seed=round_index
                ).images_per_second,
                "proxy NCHW": lambda: train_candidate(
                    candidate(widths), images, labels, val_images, val_labels, ours_nchw, seed=round_index
                ).images_per_second,
                "DataLoader": lambda: plain_loop(candidate(widths), images, labels, ours),
            }
            for side, run in runs.items():
                speeds.setdefault((name, side), []).append(run())
        matmuls.append(matmul_flops_per_second())
        print(f"round {round_index + 1}/{args.rounds} done", flush=True)

    print(f"\ntorch {torch.__version__}, {args.threads} thread(s), {args.images} images 32×32×1, batch 128, "
          f"{args.epochs} epochs, {args.rounds} interleaved rounds")
    print("training images per second, best round of each; ratio = proxy / DataLoader, best rounds and median of "
          "the per-round ratios")
    header = "".join(f"{side:>{width}}" for side, width in SIDES.items())
    print(f"{'candidate':<22}{header}{'ratio':>8}{'median':>8}  goal ≥ 1.2×")
    for name, widths in CANDIDATES.items():
        best = {side: max(speeds[name, side]) for side in SIDES}
        ratio = best["proxy"] / best["DataLoader"]
        paired = statistics.median(p / d for p, d in zip(speeds[name, "proxy"], speeds[name, "DataLoader"]))
        label = f"{name} {'/'.join(map(str, widths))}"
        figures = "".join(f"{best[side]:>{width}.0f}" for side, width in SIDES.items())
        verdict = "met" if min(ratio, paired) >= 1.2 else "MISSED"
        print(f"{label:<22}{figures}{ratio:>7.2f}×{paired:>7.2f}×  {verdict}")

    large = candidate(CANDIDATES["large"])
    per_image = forward_flops(large, images[:128]) / 128
    training = 3 * per_image * max(speeds["large", "proxy"])
    matmul = max(matmuls)
    print(f"\nlarge candidate: {per_image / 1e6:.1f} MFLOP forward per image (FlopCounterMode), "
          f"training ≈ 3× forward = {training / 1e9:.2f} GFLOP/s")
    print(f"fp32 1024×1024 matmul (best of every round's best): {matmul / 1e9:.1f} GFLOP/s; "
          f"training reaches {training / matmul:.1%} of it")


if __name__ == "__main__":
    main()
