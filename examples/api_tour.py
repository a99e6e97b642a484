"""The stamp-inspection example through the Python API: census, search, report, export.

Run from the repository root:  python examples/api_tour.py
It makes a short run named `api-tour` under runs/ (a few minutes on 2 cores).
"""

from pathlib import Path

import searcher
from searcher.core.census_report import summary_lines

SPACE = Path(__file__).with_name("stamp_inspection.toml")

space = searcher.load_space(SPACE)
print(f"{space.name}: {space.size():,} configurations, budget {space.budget.describe()}")

# One candidate, by hand: its cost and whether it fits.
arch = searcher.parse_arch("1x32x32_c8k3-m2_c16k3-m2_flat-d32-o8_relu_bn")
cost = searcher.cost(arch, space.budget.activation_precision)
print(arch, f"params {cost.params:,}, MACs {cost.macs:,}, peak activation {cost.peak_activation_bytes:,} B")
print("breaks:", [str(v) for v in space.budget.check(space.budget.totals(cost))] or "nothing")

# What fits, without training.
print("\n".join(summary_lines(searcher.census(space))))

# A short search on the built-in demo data, then the export of the best fitting candidate.
outcome = searcher.search(searcher.SearchSettings(name="api-tour", space=str(SPACE), data="demo", trials=6, minutes=4))
print("counts:", outcome.counts, "best:", outcome.best and outcome.best["arch"])
if outcome.best:
    exported = searcher.export(searcher.ExportSettings(name="api-tour"))
    print("\n".join(searcher.status("api-tour").lines()))
    print(f"test accuracy {exported.test_accuracy:.4f} (int8 {exported.test_accuracy_int8:.4f}); files in {exported.folder}")
