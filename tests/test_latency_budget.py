"""Latency as a budget: targets and the time cap in space files and options, the gate, `cost`, a search's tables.

Outside sources: the figures come from searcher.core.latency, whose error against QEMU's counts is
checked in tests/test_latency.py; here the plumbing is checked against that model called directly
(predict), and the census's arrays against it in tests/test_census.py.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from searcher.cli.main import main
from searcher.core.arch import parse_arch
from searcher.core.budget import LATENCY, Budget
from searcher.core.cost import cost
from searcher.core.gate import judge
from searcher.core.latency import parse_target, predict
from searcher.core.space_file import load_space
from searcher.errors import SearcherError

from conftest import TINY_SPACE
from searchkit import StandIn, search_here, write_space

DEMO = "1x24x24_c4k3-c4k3-m2_c8k3-m2_c16k3-m2_flat-o8_relu_bn"  # README's demo export
M4 = parse_target("cortex-m4@80MHz")


def test_cost_prints_each_layers_predicted_time_beside_its_costs(capsys):
    assert main(["cost", DEMO, "--target", "cortex-m4@80MHz", "--max-latency", "1ms"]) == 0
    out = capsys.readouterr().out
    predicted = predict(parse_arch(DEMO), M4)
    lines = out.splitlines()
    header = next(line for line in lines if line.split()[:2] == ["layer", "kind"])
    assert header.split()[-2:] == ["instructions", "latency"] and "macs" in header.split()
    rows = {line.split()[0]: line for line in lines if line.split() and line.split()[0] in dict(predicted.rows)}
    assert set(rows) == set(dict(predicted.rows))  # the copy in, every layer, the class out
    assert f"{dict(predicted.rows)['s1_conv2']:,.0f}" in rows["s1_conv2"]
    total = predicted.seconds * 1e3
    assert f"predicted time per inference on cortex-m4@80MHz: {total:.3g} ms" in out
    assert "breaks latency_ms" in out  # about 7 ms against a 1 ms cap


def test_a_time_cap_needs_a_target(capsys):
    assert main(["cost", DEMO, "--max-latency", "20ms"]) == 2
    err = capsys.readouterr().err
    assert "`--max-latency`" in err and "--target cortex-m4@80MHz" in err and "Traceback" not in err


def test_a_space_file_names_its_target_and_time_cap(tmp_path):
    path = tmp_path / "timed.toml"
    path.write_text(TINY_SPACE + 'max_latency = "2ms"\n\n[target]\ncore = "cortex-m7"\nclock = "216MHz"\n')
    budget = load_space(path).budget
    assert budget.target == parse_target("cortex-m7@216MHz") and budget.max_latency_ms == 2.0
    assert budget.caps()[LATENCY] == 2.0
    path.write_text(TINY_SPACE + 'max_latency = "2ms"\n')
    with pytest.raises(SearcherError, match="`budget.max_latency` caps the time per inference, which needs a target") as e:
        load_space(path)
    assert e.value.file == str(path)


def test_the_gate_rejects_what_is_predicted_too_slow():
    arch = parse_arch(DEMO)
    ms = predict(arch, M4).seconds * 1e3
    for cap, fits in ((ms * 1.01, True), (ms * 0.99, False)):
        budget = Budget(max_latency_ms=cap, target=M4)
        verdict = judge(arch, budget, 32, memory_cap=2**40)
        assert verdict.totals[LATENCY] == pytest.approx(ms)
        assert verdict.fits is fits and verdict.rejected_by == ("" if fits else LATENCY)
    assert LATENCY not in judge(arch, Budget(), 32, memory_cap=2**40).totals  # no target, no latency


def test_a_search_with_a_target_records_and_fronts_the_predicted_time(tmp_path):
    space = load_space(write_space(tmp_path))
    times = sorted(Budget(target=M4).totals(cost(a), a)[LATENCY] for a in space.enumerate())
    cap = float(np.quantile(times, 0.5))  # half the space is too slow
    outcome = search_here(tmp_path, write_space(tmp_path), "timed", budget={"max_latency": f"{cap}ms"},
                          trainer_for=lambda run, threads: StandIn(run.train.epochs), trials=12,
                          target="cortex-m4@80MHz")
    trials = pd.read_csv(outcome.folder / "trials.csv")
    judged = trials[trials["arch"].notna() & (trials["arch"] != "")]
    assert len(judged) and judged[LATENCY].notna().all()  # every candidate's predicted time, rejected ones too
    for row in judged.itertuples():
        assert row.latency_ms == pytest.approx(predict(parse_arch(row.arch), M4).seconds * 1e3)
        assert ("latency_ms" in str(row.rejected_by)) == (row.latency_ms > cap)
    assert (judged[judged["state"] == "trained"][LATENCY] <= cap).all()
    fronts = pd.read_csv(outcome.folder / "front.csv")
    assert LATENCY in set(fronts["cost"])
    assert "predicted latency" in (outcome.folder / "report.html").read_text()
    config = json.loads((outcome.folder / "run.json").read_text())["config"]
    assert config["budget"]["target"] == {"core": "cortex-m4", "clock_hz": 80e6}


@pytest.mark.slow
def test_an_export_on_a_target_gives_predicted_and_emulated_time(tmp_path):
    """The whole path: a timed search, then export with --target; the card's cost table gives the predicted
    time, and (with the ARM tools) the emulated count on the target's core beside the prediction."""
    from searcher.ship.export import ExportSettings, export

    space = write_space(tmp_path)
    search_here(tmp_path, space, "timed", trainer_for=lambda run, threads: StandIn(run.train.epochs), trials=3,
                target="cortex-m4@80MHz")
    outcome = export(ExportSettings(name="timed", epochs=1, root=tmp_path / "runs", target="cortex-m7@216MHz"))
    folder = outcome.folder
    card = (folder / "MODEL_CARD.md").read_text()
    metrics = json.loads((folder / "metrics.json").read_text())
    m7 = parse_target("cortex-m7@216MHz")  # --target at export takes the place of the run's
    assert metrics["costs"][LATENCY] == pytest.approx(predict(outcome.arch, m7).seconds * 1e3)
    assert "| latency_ms |" in card and "(predicted on cortex-m7@216MHz, int8 C file)" in card
    if metrics["int8"]["arm_check"].startswith("ARM builds checked"):
        assert "On the target, cortex-m7@216MHz:" in card
        assert metrics["predicted_instructions_cortex_m7"] == pytest.approx(metrics["instructions_cortex_m7"], rel=0.25)
