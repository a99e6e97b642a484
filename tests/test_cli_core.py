"""`searcher cost` and `searcher census` from the command line: output, files, user mistakes."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from searcher.core.arch import parse_arch
from searcher.core.census_report import run_census
from searcher.cli.main import main
from searcher.core.cost import cost
from searcher.core.space_file import load_space

from conftest import TINY_SPACE

LENET5 = "1x32x32_c6k5v-a2_c16k5v-a2_flat-d120-d84-o10_tanh"
ENV = {**os.environ, "PYTHONPATH": str(Path(__file__).resolve().parent.parent)}


def files_under(folder: Path) -> list[Path]:
    return [p for p in folder.rglob("*") if p.is_file()] if folder.exists() else []


def test_cost_prints_the_table_and_totals(capsys):
    assert main(["cost", LENET5]) == 0
    out = capsys.readouterr().out
    result = cost(parse_arch(LENET5))
    assert out.splitlines()[0] == LENET5
    header = out.splitlines()[1].split()
    assert header[:4] == ["layer", "kind", "output", "params"]
    for layer in result.layers:
        assert any(line.split()[:2] == [layer.name, layer.kind] for line in out.splitlines()), layer.name
    assert f"parameters {result.params:,}" in out and f"MACs {result.macs:,}" in out
    assert f"peak activation {result.peak_activation_bytes:,} bytes" in out
    assert "budget:" not in out  # no caps given, nothing to judge


def test_cost_judges_the_budget_of_a_space_and_of_options(capsys):
    assert main(["cost", LENET5, "--space", "mcu"]) == 0
    out = capsys.readouterr().out
    assert "budget: breaks" in out and "params 61.7k > 20k" in out
    elements = cost(parse_arch(LENET5)).peak_activation_elements
    assert f"peak activation {elements:,} bytes at int8" in out  # mcu holds activations in int8: 1 byte each
    assert main(["cost", LENET5, "--max-params", "100k", "--max-macs", "1M"]) == 0
    assert "budget: fits" in capsys.readouterr().out


def test_cost_reads_a_json_file(tmp_path, capsys):
    path = tmp_path / "arch.json"
    path.write_text(parse_arch(LENET5).to_json())
    assert main(["cost", str(path)]) == 0
    assert "parameters 61,706" in capsys.readouterr().out


def test_census_writes_csv_and_html_under_a_run_folder(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    space_file = tmp_path / "tiny.toml"
    space_file.write_text(TINY_SPACE)
    assert main(["census", "--space", str(space_file), "--name", "first"]) == 0
    out = capsys.readouterr().out
    folder = tmp_path / "runs" / "first"
    names = {"census_summary.csv", "census_spread.csv", "census_depth_width.csv", "census.html"}
    assert {p.name for p in files_under(folder)} == names  # no temporary files left behind
    summary = pd.read_csv(folder / "census_summary.csv")
    expected = run_census(load_space(space_file))
    assert summary.loc[0, "fraction_fits"] == pytest.approx(expected.fraction)
    assert bool(summary.loc[0, "exact"]) and summary.loc[0, "configurations"] == expected.size
    depth_width = pd.read_csv(folder / "census_depth_width.csv", index_col=0)
    assert depth_width.values.sum() == expected.fits.sum() * 2  # two activations per cost class
    assert "<html" in (folder / "census.html").read_text()[:500].lower()
    assert "fits:" in out and "wrote" in out


def test_census_takes_a_shipped_space_by_name_and_budget_options(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    assert main(["census", "--space", "classic", "--max-params", "5k"]) == 0
    assert "nothing in this space fits" in capsys.readouterr().out
    summary = pd.read_csv(tmp_path / "runs" / "census-classic" / "census_summary.csv")
    assert summary.loc[0, "cap_params"] == 5_000 and summary.loc[0, "fraction_fits"] == 0


@pytest.mark.parametrize(
    ("argv", "says"),
    [
        (["cost", "1x32x32_c6q5_flat-o10_tanh"], "neither a conv"),
        (["cost", LENET5, "--max-params", "lots"], "`--max-params` must be a count"),
        (["cost", LENET5, "--space", "mcuu"], "did you mean 'mcu'"),
        (["cost", "1x4x4_c6k5v_flat-o10_tanh"], "below 1x1"),
        (["census", "--space", "missing.toml"], "`--space` 'missing.toml' is not a file"),
        (["census", "--space", "bad.toml"], "conv.kernal"),
        (["census", "--space", "classic", "--name", "../escape"], "`--name` '../escape' must be"),
        (["census", "--space", "classic", "--max-activation", "16 parsecs"], "`--max-activation` must be a byte size"),
    ],
)
def test_user_mistakes_exit_2_with_a_message_and_write_nothing(tmp_path, monkeypatch, capsys, argv, says):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "bad.toml").write_text(TINY_SPACE.replace("kernel = 3", "kernal = 3"))
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("searcher: error:") and says in err
    assert "Traceback" not in err
    assert files_under(tmp_path / "runs") == []


def test_bad_options_are_refused_by_the_parser(capsys):
    with pytest.raises(SystemExit) as info:
        main(["census"])  # --space is required
    assert info.value.code == 2 and "--space" in capsys.readouterr().err


def test_module_entry_point_exit_status(tmp_path):
    """One real process: `python -m searcher` exits 0 on success and 2 on a user mistake."""
    run = [sys.executable, "-m", "searcher", "cost"]
    good = subprocess.run([*run, LENET5], cwd=tmp_path, capture_output=True, text=True, timeout=120,
                          env=ENV)
    assert good.returncode == 0, good.stderr
    assert "parameters 61,706" in good.stdout
    bad = subprocess.run([*run, "1x32x32_banana"], cwd=tmp_path, capture_output=True, text=True, timeout=120,
                         env=ENV)
    assert bad.returncode == 2
    assert bad.stderr.startswith("searcher: error:") and "Traceback" not in bad.stderr
