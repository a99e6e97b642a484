"""The benchmark scripts stay runnable: pytest does not collect them, so nothing else would notice
when a change moves a name they use (the overhead benchmark once patched a function that had moved)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

import searcher.results.outcome as outcome
import searcher.study.search_run as search_run

BENCHES = sorted((Path(__file__).resolve().parents[1] / "benchmarks").glob("bench_*.py"))


@pytest.mark.slow
@pytest.mark.parametrize("script", BENCHES, ids=[p.stem for p in BENCHES])
def test_bench_script_loads_and_explains_itself(script: Path) -> None:
    answer = subprocess.run([sys.executable, str(script), "--help"], capture_output=True, text=True, timeout=120)
    assert answer.returncode == 0, answer.stderr[-2000:]
    assert answer.stdout.startswith("usage:"), answer.stdout[:500]


def test_the_search_benchmark_times_functions_that_exist() -> None:
    """bench_search.py times the search by wrapping run_phases (searcher.study.search_run) and finish
    (searcher.results.outcome)."""
    text = (Path(__file__).resolve().parents[1] / "benchmarks" / "bench_search.py").read_text(encoding="utf-8")
    for module, alias, name in ((search_run, "runner", "run_phases"), (outcome, "writer", "finish")):
        assert f"{alias}.{name}" in text and callable(getattr(module, name))
