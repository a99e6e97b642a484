"""Confirmation benchmarks, measured side by side in one run (a script; pytest does not collect it).

    python benchmarks/bench_confirm.py time      # README's first command: search + export, and how the time splits
    python benchmarks/bench_confirm.py proxy     # proxy quality: Spearman of the default and a longer proxy, demo and digits

``proxy`` runs one search per data set with confirmation on, then retrains every confirmed candidate
with a longer proxy (twice the epochs, the same schedule otherwise) and ranks both proxies against
the confirmed means, on the same candidates.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))

from searcher import ConfirmSettings, ExportSettings, SearchSettings, export, parse_arch, search  # noqa: E402
from searcher.core.space_file import load_space  # noqa: E402
from searcher.core.stats import spearman  # noqa: E402
from searcher.core.train_settings import TrainSettings  # noqa: E402
from searcher.data.load import load_dataset, load_split  # noqa: E402
from searcher.model.build import build  # noqa: E402
from searcher.model.train import train_candidate  # noqa: E402
from searcher.study.run import RunData  # noqa: E402

STAMP = ROOT / "examples" / "stamp_inspection.toml"


def readme_command(folder: Path) -> None:
    """The demo as README's first command runs it, timed in its parts."""
    started = time.perf_counter()
    outcome = search(SearchSettings(name="demo", space=str(STAMP), data="demo", trials=20, minutes=4, root=folder))
    searched = time.perf_counter() - started
    exported = export(ExportSettings(name="demo", root=folder))
    total = time.perf_counter() - started
    confirmed = outcome.confirmation
    print(f"[time] README's first command: {total / 60:.1f} min in all (goal < 5 min on an idle 2-core machine)")
    print(f"[time]   proxy search {outcome.proxy_seconds:.0f} s, confirmation {outcome.confirm_seconds:.0f} s, "
          f"start-up and results {searched - outcome.proxy_seconds - outcome.confirm_seconds:.0f} s, "
          f"export {total - searched:.0f} s")
    print(f"[time]   {outcome.counts['trained']} trained by the proxy, "
          f"{0 if confirmed is None else int((confirmed.table['seeds'] > 0).sum())} confirmed; "
          f"test accuracy {exported.test_accuracy:.4f}; "
          + ("" if confirmed is None else confirmed.advice()))


def proxy_quality(folder: Path, name: str, space: Path, data: str, trials: int) -> None:
    """Spearman's rho against the confirmed means: the run's own proxy, and one twice as long."""
    outcome = search(SearchSettings(name=name, space=str(space), data=data, trials=trials, root=folder,
                                    confirm=ConfirmSettings(seeds=3, most=8, extra=3)))
    table = outcome.confirmation.table
    table = table[table["seeds"] > 0]
    run_space = load_space(space)
    proxy = TrainSettings(**run_space.train)
    longer = replace(proxy, epochs=2 * proxy.epochs)
    dataset = load_dataset(data, run_space.data_shape, split=load_split(outcome.folder / "split.npz")[0])
    started = time.perf_counter()
    long_acc = []
    for row in table.itertuples(index=False):
        arch = parse_arch(row.arch)
        shaped = RunData(dataset).at(arch.input_shape)  # a smaller input is resized as the run does it
        long_acc.append(train_candidate(build(arch), shaped.train.images, shaped.train.labels, shaped.val.images,
                                        shaped.val.labels, longer, seed=int(row.trial)).val_accuracy)
    rho_default = spearman(table["proxy_accuracy"], table["accuracy_mean"])
    rho_long = spearman(np.asarray(long_acc), table["accuracy_mean"])
    print(f"[proxy {name}] {len(table)} confirmed candidates; Spearman against the confirmed means: "
          f"{proxy.epochs}-epoch proxy {rho_default:.2f}, {longer.epochs}-epoch proxy {rho_long:.2f} "
          f"(the longer proxy took {time.perf_counter() - started:.0f} s for these {len(table)})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("what", choices=["time", "proxy"])
    parser.add_argument("--trials", type=int, default=20)
    args = parser.parse_args()
    print(f"{os.cpu_count()} cores; load average before: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    with tempfile.TemporaryDirectory() as scratch:
        folder = Path(scratch)
        if args.what == "time":
            readme_command(folder)
        else:
            from test_search import write_digits

            npz, digits_space = write_digits(folder)
            proxy_quality(folder, "demo", STAMP, "demo", args.trials)
            proxy_quality(folder, "digits", digits_space, str(npz), args.trials)
    print(f"load average after: {' '.join(f'{x:.2f}' for x in os.getloadavg())}")


if __name__ == "__main__":
    main()
