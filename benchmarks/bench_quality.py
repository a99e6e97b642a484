"""Search quality per CPU minute: the default sampler against random sampling and a plain sweep, at equal time.

    python benchmarks/bench_quality.py --quick                   # the demo, a 2-minute box, seed 0: under 15 minutes
    python benchmarks/bench_quality.py --data demo --boxes 4,16 --seeds 0,1,2 --out runs/quality.jsonl
    python benchmarks/bench_quality.py --data digits,lot-codes --boxes 16 --seeds 0,1,2 --out runs/quality.jsonl

For each data set, time box, seed and method, one whole search runs through the library
(``searcher.search`` with the library's defaults, then ``searcher.export`` of the default pick), and one
row is measured:

* ``hv`` — the hypervolume of the confirmed front, accuracy against parameters within the caps
  (:func:`searcher.core.pareto.hypervolume`: the share of the square from (0 parameters, chance)
  to (the parameter cap, accuracy 1) that the confirmed means dominate);
* ``test`` — the default export's accuracy on the held-out test split, its ``params`` and ``macs``;
* ``trained`` — full proxy trainings (not stopped early), ``below`` / ``above`` — how many of them cost
  fewer parameters than the median of the space's fitting candidates (the census), and how many not;
* ``used`` — the search's wall time as a share of its box.

Methods: ``default`` (whatever ``SearchSettings()`` samples with), ``single`` (TPE on the score alone,
the default before accuracy-against-parameters became it), ``random`` (Optuna's random sampler),
``sweep`` (a plain baseline: fitting candidates evenly spaced over parameters, queued into the run's own
study in an order whose every prefix is evenly spread, so the same schedule, pruning, confirmation and
export apply to it, in the same box). Data sets: ``demo`` (README's first command's space), ``digits``
(the UCI digits from scikit-learn, examples/digits.toml with README's 20k parameter cap) and ``lot-codes``
(examples/make_lot_codes.py: bigger nets really are better there). Every search may train as many
candidates as its box allows: the box, not a trial count, ends it.

Each search runs in its own process with one torch thread; ``--jobs 2`` (the default, 1 with ``--quick``)
runs two side by side on two cores, methods interleaved so that load hits them alike. Every finished row is appended to ``--out``
(JSON lines) as it finishes; run the same command again to resume: rows already there are skipped.
Runs go under runs/bench-quality/, each in a folder of its own. The figures are noisy on a shared
machine: read the spread over seeds before a ratio.
"""

from __future__ import annotations

import argparse
import json
import logging
import math
import multiprocessing
import os
import random
import sys
import time
import uuid
from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "examples"))

from searcher.core.census import enumerate_all, sample  # noqa: E402
from searcher.core.census_report import Census, CensusSettings, run_census  # noqa: E402
from searcher.core.space import Space  # noqa: E402
from searcher.limits import MAX_TRIALS  # noqa: E402
from searcher.core.pareto import feasible_mask, hypervolume, reference_cost  # noqa: E402
from searcher.files import write_atomic  # noqa: E402

RUNS = ROOT / "runs" / "bench-quality"
METHODS = ("default", "single", "random", "sweep")
NO_LIMIT = MAX_TRIALS  # --trials: the box ends every search, not a count
SWEEP_PER_MINUTE = 40  # candidates queued for the sweep per minute of box, more than any run here trains
COST = "params"  # the cost the front, the sweep and the spread are measured in


@dataclass(frozen=True)
class DataSet:
    """A data set of the benchmark: its space file, its data source and budget overrides (README's)."""

    space: Path
    source: str  # "demo" or the .npz file, written by prepare_data
    budget: tuple[tuple[str, Any], ...] = ()


def data_sets(folder: Path) -> dict[str, DataSet]:
    return {
        "demo": DataSet(ROOT / "examples" / "stamp_inspection.toml", "demo"),  # README's first command
        "digits": DataSet(ROOT / "examples" / "digits.toml", str(folder / "digits.npz"), (("max_params", 20_000),)),
        "lot-codes": DataSet(ROOT / "examples" / "lot_codes.toml", str(folder / "lot_codes.npz")),
    }


def prepare_data(name: str, data: DataSet) -> None:
    """Write a data set's .npz once (each is the same bytes every time), whole or not at all."""
    path = Path(data.source)
    if name == "demo" or path.exists():
        return
    if name == "digits":  # the recipe of examples/digits.toml
        from sklearn.datasets import load_digits

        digits = load_digits()
        arrays = {"images": np.round(digits.images * (255 / 16)).astype(np.uint8), "labels": digits.target}
    else:
        from make_lot_codes import make_lot_codes

        images, labels, names = make_lot_codes()
        arrays = {"images": images, "labels": labels, "class_names": np.array(names)}
    write_atomic(path, lambda handle: np.savez(handle, **arrays))


@dataclass(frozen=True)
class Job:
    data: str
    minutes: float
    seed: int
    method: str

    @property
    def key(self) -> str:
        return f"{self.data}/{self.minutes:g}/{self.seed}/{self.method}"


def jobs_in_order(data: list[str], boxes: list[float], seeds: list[int], methods: list[str]) -> list[Job]:
    """Every combination, the methods of one (data, box, seed) next to each other and their order turned
    from seed to seed, so that searches side by side meet each other method about equally often."""
    jobs = []
    for name in data:
        for minutes in boxes:
            for turn, seed in enumerate(seeds):
                shift = turn % len(methods)
                jobs += [Job(name, minutes, seed, m) for m in methods[shift:] + methods[:shift]]
    return jobs


# -- the sweep: fitting candidates evenly spaced over cost ------------------------------------------
def spread_order(count: int) -> list[float]:
    """``count`` levels in (0, 1) whose every prefix is spread evenly: 1/2, 1/4, 3/4, 1/8, 3/8, ...
    (van der Corput's sequence in base 2), so however many the box allows cover the whole range."""
    levels = []
    for k in range(1, count + 1):
        level, unit = 0.0, 0.5
        while k:
            level += unit * (k & 1)
            k, unit = k >> 1, unit / 2
        levels.append(level)
    return levels


def pick_levels(costs: np.ndarray, levels: list[float], rng: random.Random) -> list[int]:
    """For each level, the index of a distinct candidate at that quantile of ``costs`` (the nearest one
    not yet taken; among equal costs, a random one)."""
    shuffled = np.array(rng.sample(range(len(costs)), len(costs)), dtype=int)
    order = shuffled[np.argsort(costs[shuffled], kind="stable")]  # cheapest first, ties in random order
    taken = np.zeros(len(order), dtype=bool)
    picked = []
    for level in levels[: len(order)]:
        at = int(round(level * (len(order) - 1)))
        for step in range(len(order)):  # outward from the quantile to the nearest free place
            near = [i for i in (at - step, at + step) if 0 <= i < len(order) and not taken[i]]
            if near:
                taken[near[0]] = True
                picked.append(int(order[near[0]]))
                break
    return picked


def census_batch(space: Space, census: Census, settings: CensusSettings) -> dict[str, np.ndarray]:
    """The candidates a census looked at, row for row with its ``fits`` and ``costs`` (the census draws
    them the same way)."""
    return enumerate_all(space) if census.exact else sample(space, settings.samples, settings.seed)


def params_of(space: Space, batch: dict[str, np.ndarray], index: int, rng: random.Random) -> dict[str, Any]:
    """The Optuna parameters that make ``space.suggest`` draw census row ``index``: the row's decisions
    where active, a random option for the decisions that cost nothing (activation, dropout)."""
    choices: dict[str, Any] = {}
    params: dict[str, Any] = {}
    for decision in space.decisions:
        if not space.active(decision, choices):
            continue
        if decision.name in batch:
            value = batch[decision.name][index]
            value = value.item() if hasattr(value, "item") else value
        else:
            value = decision.options[rng.randrange(len(decision.options))]
        if decision.name == "resolution":
            value = space.resolutions[int(value)]
        choices[decision.name] = value
        if len(decision.options) > 1:
            params[decision.name] = f"{value[0]}x{value[1]}" if decision.name == "resolution" else value
    return params


def sweep_params(space: Space, census: Census, settings: CensusSettings, count: int, seed: int) -> list[dict]:
    """``count`` fitting candidates evenly spaced over cost, as Optuna parameters in spread order."""
    rng = random.Random(seed)
    batch = census_batch(space, census, settings)
    fitting = np.flatnonzero(census.fits)
    chosen = pick_levels(census.costs[COST][fitting].astype(float), spread_order(count), rng)
    return [params_of(space, batch, int(fitting[i]), rng) for i in chosen]


# -- one search ------------------------------------------------------------------------------------------
def run_one(job: Job, data: DataSet, root: Path, trials: int) -> dict | None:
    """One search and its export, in a process of its own; the row, or None when a signal stopped it."""
    import torch

    import searcher
    from searcher.study.ending import Ending
    from searcher.study.run import prepare
    from searcher.study.studies import open_study

    torch.set_num_threads(1)
    logging.basicConfig(level=logging.WARNING, format=f"[{job.key}] %(message)s")
    name = f"{job.data}-{job.minutes:g}m-s{job.seed}-{job.method}-{time.strftime('%m%d%H%M%S')}-{uuid.uuid4().hex[:6]}"
    options = ({"sampler": "random"} if job.method in ("random", "sweep") else
               {"sampler": "tpe", "objective": "accuracy"} if job.method == "single" else {})
    settings = searcher.SearchSettings(name=name, space=str(data.space), data=data.source, trials=trials,
                                       minutes=job.minutes, seed=job.seed, root=root, **options)
    budget = dict(data.budget)
    run = prepare(settings, budget)  # what the search will see; outside the box, for every method alike
    census_settings = CensusSettings(classes=run.data.num_classes)
    census = run_census(run.space, run.budget, census_settings)
    queued = 0
    if job.method == "sweep":
        study, _ = open_study(name, run.url, run.config, settings.sampler)
        for params in sweep_params(run.space, census, census_settings, math.ceil(SWEEP_PER_MINUTE * job.minutes),
                                   job.seed):
            study.enqueue_trial(params)
            queued += 1
    outcome = searcher.search(settings, budget)
    if outcome.stop.kind is Ending.SIGNAL:
        return None
    started = time.time()
    exported = searcher.export(searcher.ExportSettings(name=name, root=root))
    frame = pd.read_csv(outcome.folder / "trials.csv")
    caps = run.budget.caps()
    fitting = census.costs[COST][census.fits]
    confirmed = outcome.confirmation.table if outcome.confirmation is not None else pd.DataFrame()
    row = {
        "key": job.key, **asdict(job), "run": name, "sampler": settings.sampler, "objective": settings.objective,
        "hv": confirmed_hypervolume(confirmed, caps, outcome.metric.mean, 1 / run.data.num_classes,
                                    reference_cost(caps, COST, fitting)),
        "confirmed": int((confirmed["seeds"] > 0).sum()) if len(confirmed) else 0,
        "pick": "confirmed" if outcome.confirmation is not None and outcome.confirmation.pick else "proxy",
        "test": exported.test_accuracy, "params": exported.costs["params"], "macs": exported.costs["macs"],
        "arch": exported.arch.to_text(), **spread_over_cost(frame, float(np.median(fitting))),
        "stopped_early": outcome.counts["stopped_early"], "queued": queued,
        "queue_left": int((frame["state"] == "queued").sum()) if queued else 0,
        "seconds": outcome.seconds, "proxy_seconds": outcome.proxy_seconds, "confirm_seconds": outcome.confirm_seconds,
        "used": outcome.seconds / (60 * job.minutes), "export_seconds": time.time() - started,
        "stop": outcome.stop.text,
    }
    return row


def confirmed_hypervolume(table: pd.DataFrame, caps: dict[str, float], mean: str, chance: float,
                          reference: float) -> float:
    """The hypervolume of the confirmed means (every candidate with a confirmed seed) within every cap."""
    if not len(table):
        return 0.0
    usable = table[(table["seeds"] > 0) & table[mean].notna()]
    usable = usable[feasible_mask(usable, caps)]
    return hypervolume(usable[mean], usable[COST], chance=chance, reference_cost=reference)


def spread_over_cost(frame: pd.DataFrame, median: float) -> dict[str, int]:
    """Full trainings (distinct candidates that finished the proxy schedule) below the median cost of the
    fitting candidates, and at or above it."""
    full = frame[(frame["state"] == "trained") & frame["repeat_of"].isna()]
    below = int((full[COST] < median).sum())
    return {"trained": len(full), "below": below, "above": len(full) - below, "median": median}


# -- the table -----------------------------------------------------------------------------------------
FIGURES = ("hv", "test", "params", "macs", "trained", "below", "above", "used")


def summarise(rows: list[dict]) -> pd.DataFrame:
    """Mean and sd over seeds per (data, minutes, method), and each mean as a ratio to the default's."""
    frame = pd.DataFrame(rows)
    frame["method"] = pd.Categorical(frame["method"], categories=[m for m in METHODS if m in set(frame["method"])])
    grouped = frame.groupby(["data", "minutes", "method"], observed=True)[list(FIGURES)]
    table = grouped.mean().join(grouped.std(ddof=1).add_suffix("_sd")).join(grouped.size().rename("seeds"))
    for figure in ("hv", "test", "params", "trained"):
        default = table[figure].xs("default", level="method") if "default" in set(frame["method"]) else None
        table[f"{figure}_ratio"] = (np.nan if default is None else
                                    table[figure] / default.reindex(table.index.droplevel("method")).to_numpy())
    return table


def show(table: pd.DataFrame) -> str:
    """The summary as aligned text: mean ± sd over seeds, then the ratio to the default method."""
    def pm(row: pd.Series, figure: str, fmt: str) -> str:
        sd = row[f"{figure}_sd"]
        return format(row[figure], fmt) + ("" if math.isnan(sd) else " ± " + format(sd, fmt))

    lines = [f"{'data':<10}{'box':>5} {'method':<8}{'n':>2}  {'hv':<16}{'/def':>6}  {'test acc':<16}{'/def':>6}  "
             f"{'params':<16}{'/def':>6}  {'MACs':<20}{'trained':<12}{'/def':>6}  {'below|above':<14}{'box used':<10}"]
    for (data, minutes, method), row in table.iterrows():
        lines.append(
            f"{data:<10}{minutes:>4g}m {method:<8}{int(row['seeds']):>2}  {pm(row, 'hv', '.4f'):<16}{row['hv_ratio']:>6.2f}  "
            f"{pm(row, 'test', '.4f'):<16}{row['test_ratio']:>6.3f}  {pm(row, 'params', ',.0f'):<16}"
            f"{row['params_ratio']:>6.2f}  {pm(row, 'macs', ',.0f'):<20}{pm(row, 'trained', '.1f'):<12}"
            f"{row['trained_ratio']:>6.2f}  {row['below']:>5.1f} | {row['above']:<5.1f} {row['used']:>8.0%}")
    return "\n".join(lines)


# -- running it all --------------------------------------------------------------------------------------
def read_rows(path: Path) -> list[dict]:
    """The rows an earlier (perhaps killed) run of the benchmark appended; a torn last line is ignored."""
    if not path.exists():
        return []
    rows = []
    for line in path.read_text(encoding="utf-8").splitlines():
        try:
            rows.append(json.loads(line))
        except ValueError:
            continue
    return rows


def append_row(path: Path, row: dict) -> None:
    with open(path, "a", encoding="utf-8") as handle:
        handle.write(json.dumps(row) + "\n")
        handle.flush()
        os.fsync(handle.fileno())


def one_thread() -> None:
    """Each search process: one thread for every library that would start its own pool."""
    for variable in ("OMP_NUM_THREADS", "MKL_NUM_THREADS", "OPENBLAS_NUM_THREADS"):
        os.environ[variable] = "1"


def run_all(todo: list[Job], sets: dict[str, DataSet], root: Path, trials: int, jobs: int,
            out: Path) -> Iterator[dict]:
    """Run the jobs ``jobs`` at a time, each in a fresh process; yield each row as it is appended."""
    pool = ProcessPoolExecutor(max_workers=jobs, mp_context=multiprocessing.get_context("spawn"),
                               initializer=one_thread, max_tasks_per_child=1)
    waiting = list(todo)
    running: dict[Any, Job] = {}
    try:
        while waiting or running:
            while waiting and len(running) < jobs:
                job = waiting.pop(0)
                running[pool.submit(run_one, job, sets[job.data], root, trials)] = job
                print(f"started {job.key} ({time.strftime('%H:%M:%S')})", flush=True)
            done, _ = wait(running, return_when=FIRST_COMPLETED)
            for future in done:
                job = running.pop(future)
                try:
                    row = future.result()
                except Exception as exc:  # one failed search must not lose the others
                    where = [line for line in str(exc.__cause__ or "").splitlines() if line.strip(' "')][-3:]  # the child's traceback
                    print(f"FAILED {job.key}: {type(exc).__name__}: {exc}", *where, sep="\n  ", flush=True)
                    continue
                if row is not None:
                    append_row(out, row)
                    yield row
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def floats(text: str) -> list[float]:
    return [float(x) for x in text.split(",") if x]


def ints(text: str) -> list[int]:
    return [int(x) for x in text.split(",") if x]


def positive(text: str) -> int:
    value = int(text)
    if value < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1, got {text!r}")
    return value


def names(allowed: tuple[str, ...]):
    def parse(text: str) -> list[str]:
        chosen = [x for x in text.split(",") if x]
        wrong = [x for x in chosen if x not in allowed]
        if wrong or not chosen:
            raise argparse.ArgumentTypeError(f"choose from {', '.join(allowed)}, got {text!r}")
        return chosen
    return parse


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help="the demo, a 2-minute box, seed 0, all three methods (under 15 minutes on 2 cores)")
    parser.add_argument("--data", type=names(("demo", "digits", "lot-codes")), help="default demo,digits,lot-codes")
    parser.add_argument("--boxes", type=floats, help="time boxes in minutes, default 4,16")
    parser.add_argument("--seeds", type=ints, help="default 0,1,2")
    parser.add_argument("--methods", type=names(METHODS), default=list(METHODS), help="default default,single,random,sweep")
    parser.add_argument("--jobs", type=positive, help="searches at once, one torch thread each (default 2; with "
                                                      "--quick 1, so that each of its searches runs alone)")
    parser.add_argument("--trials", type=positive, default=NO_LIMIT, help="trial limit of each search (default none: the box)")
    parser.add_argument("--out", type=Path, help="JSON lines file the rows are appended to, and resumed from "
                                                 "(default a new file under runs/bench-quality/)")
    args = parser.parse_args()
    data = args.data or (["demo"] if args.quick else ["demo", "digits", "lot-codes"])
    boxes = args.boxes or ([2.0] if args.quick else [4.0, 16.0])
    seeds = args.seeds or ([0] if args.quick else [0, 1, 2])
    jobs = args.jobs or (1 if args.quick else 2)
    out = args.out or RUNS / f"quality-{time.strftime('%Y%m%d-%H%M%S')}.jsonl"
    out.parent.mkdir(parents=True, exist_ok=True)
    sets = data_sets(RUNS / "data")
    for name in data:
        prepare_data(name, sets[name])
    wanted = jobs_in_order(data, boxes, seeds, args.methods)
    have = {row["key"]: row for row in read_rows(out)}
    todo = [job for job in wanted if job.key not in have]
    print(f"{os.cpu_count()} cores; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    print(f"{len(wanted)} searches wanted, {len(wanted) - len(todo)} already in {out}; {jobs} at a time")
    started = time.time()
    rows = [have[job.key] for job in wanted if job.key in have]
    status = 0
    try:
        for row in run_all(todo, sets, RUNS, args.trials, jobs, out):
            rows.append(row)
            print(f"done {row['key']}: hv {row['hv']:.4f}, test {row['test']:.4f} at {row['params']:,} params, "
                  f"{row['trained']} trained ({row['below']} below the median cost), {row['seconds'] / 60:.1f} min "
                  f"of {row['minutes']:g} used, export {row['export_seconds']:.0f} s", flush=True)
    except KeyboardInterrupt:
        print(f"interrupted: the finished rows are in {out}; the same command resumes", flush=True)
        status = 130
    print(f"{len(rows)} rows in {(time.time() - started) / 60:.1f} min; load average after: "
          f"{' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    if rows:
        print("mean ± sd over seeds; /def: the method's mean over the default method's; below | above: full "
              "trainings under / at or over the median parameters of the fitting candidates")
        print(show(summarise(rows)))
    return status


if __name__ == "__main__":
    sys.exit(main())
