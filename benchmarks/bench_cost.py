"""Benchmark of the cost layer (a script, not collected by pytest): ``python benchmarks/bench_cost.py``.

(a) The analytic gate (``cost`` plus the cap check) against what it replaces: building the torch
    module, counting its parameters and counting FLOPs with ``FlopCounterMode`` on a batch-1
    forward. Both run side by side on the same candidates, drawn from the largest shipped space
    (workstation) at its smallest input resolution, 32x32, so every candidate can be built.
    Goal: the analytic gate at least 100x faster per candidate.
(b) The census of 1,000,000 random candidates from the workstation space. Goal: under 60 s on 2 cores.
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import time

import torch
from torch.utils.flop_counter import FlopCounterMode

import searcher
from searcher.core.census import batch_costs, sample
from searcher.core.census_report import CensusSettings, run_census
from searcher.core.cost import cost


def candidates(space: searcher.Space, n: int) -> list[searcher.Arch]:
    """Seeded draws, moved to 32x32 input (a resolution of the space, so still inside it)."""
    c = space.channels
    return [dataclasses.replace(space.random(seed), input_shape=(c, 32, 32)) for seed in range(n)]


def analytic_gate(archs: list[searcher.Arch], budget: searcher.Budget, repeat: int) -> tuple[float, list]:
    start = time.perf_counter()
    for _ in range(repeat):
        verdicts = [budget.check(budget.totals(cost(a, budget.activation_precision))) for a in archs]
    return (time.perf_counter() - start) / (repeat * len(archs)), verdicts


def torch_count(archs: list[searcher.Arch]) -> tuple[float, list[tuple[int, int]]]:
    counts = []
    start = time.perf_counter()
    for arch in archs:
        model = searcher.build(arch).eval()
        params = sum(p.numel() for p in model.parameters())
        with torch.no_grad(), FlopCounterMode(display=False) as counter:
            model(torch.zeros(1, *arch.input_shape))
        counts.append((params, counter.get_total_flops() // 2))
    return (time.perf_counter() - start) / len(archs), counts


def bench_gate(n: int) -> None:
    space = searcher.load_space(searcher.builtin_space("workstation"))
    archs = candidates(space, n)
    torch_count(archs[:2])  # warm up torch's kernels before timing
    per_torch, counts = torch_count(archs)
    per_analytic, _ = analytic_gate(archs, space.budget, repeat=20)
    agree = all(counts[i] == (cost(a).params, cost(a).macs) for i, a in enumerate(archs))
    print(f"(a) {n} workstation candidates at 32x32, torch threads {torch.get_num_threads()}")
    print(f"    analytic cost + cap check: {per_analytic * 1e6:10.1f} us per candidate")
    print(f"    torch build + numel + FlopCounterMode: {per_torch * 1e3:8.2f} ms per candidate")
    print(f"    ratio {per_torch / per_analytic:,.0f}x (goal >= 100x); counts agree: {agree}")


def bench_census(n: int) -> None:
    space = searcher.load_space(searcher.builtin_space("workstation"))
    start = time.perf_counter()
    census = run_census(space, settings=CensusSettings(samples=n, seed=0))
    total = time.perf_counter() - start
    start = time.perf_counter()
    batch = sample(space, n, seed=0)
    drawn = time.perf_counter() - start
    start = time.perf_counter()
    batch_costs(space, batch, space.budget)
    costed = time.perf_counter() - start
    print(f"(b) census of {census.evaluated:,} random workstation candidates: {total:.1f} s wall (goal < 60 s)")
    print(f"    of which drawing {drawn:.1f} s, costing {costed:.1f} s; fits {census.fraction:.3%}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--candidates", type=int, default=60, help="candidates for the side-by-side timing")
    parser.add_argument("--census", type=int, default=1_000_000, help="census sample size")
    parser.add_argument("--threads", type=int, default=1,
                        help="torch threads (1: tiny forwards are fastest on one thread, and the ratio is not inflated)")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    print(f"cores {os.cpu_count()}, load average {os.getloadavg()[0]:.1f}, torch {torch.__version__}")
    bench_gate(args.candidates)
    bench_census(args.census)


if __name__ == "__main__":
    main()
