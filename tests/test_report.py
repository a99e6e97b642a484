"""The HTML report: self-contained, figures that agree with the Pareto arithmetic, edge cases."""

from __future__ import annotations

import base64
import json
import math
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from plotly.offline import get_plotlyjs

from searcher.errors import SearcherError
from searcher.core.pareto import COST_COLUMNS, feasible_mask, pareto_mask
from searcher.results.report import broken_caps_label, build_figures, front_table_html, render_html, write_report

CAPS = {"params": 20_000, "macs": 2_000_000, "peak_activation_bytes": 65_536}
STATES = ["trained", "stopped_early", "rejected", "failed", "interrupted", "running"]


def make_trials(n: int = 60, seed: int = 0, caps: dict[str, float] = CAPS) -> pd.DataFrame:
    """A synthetic trials table: costs log-uniform, accuracy rising with size, states mixed."""
    rng = np.random.default_rng(seed)
    state = rng.choice(STATES, size=n, p=[0.45, 0.15, 0.2, 0.1, 0.05, 0.05])
    params = np.round(10 ** rng.uniform(3, 5, n)).astype(int)
    table = pd.DataFrame(
        {
            "trial": np.arange(n),
            "params": params,
            "macs": (params * rng.uniform(20, 200, n)).astype(int),
            "peak_activation_bytes": (2 ** rng.uniform(12, 17, n)).astype(int),
            "weight_bytes": params * 4,
            "stages": rng.integers(1, 5, n),
            "first_width": rng.choice([8, 16, 32], n),
        }
    )
    table["convs"] = table["stages"] * rng.integers(1, 3, n)
    table["last_width"] = table["first_width"] * 2
    table["arch"] = [f"1x32x32_c{w}k3-m2_{'c16k3-' * s}gap-o8_relu_bn_t{t}" for t, w, s in
                     zip(table["trial"], table["first_width"], table["stages"])]
    accuracy = 0.3 + 0.12 * np.log10(params) + rng.normal(0, 0.05, n)
    over = [[k for k, v in caps.items() if row[k] > v] for _, row in table.iterrows()]
    state = np.where([bool(o) for o in over], "rejected", np.where(state == "rejected", "trained", state))
    table["state"] = state
    table["rejected_by"] = ["+".join(o) for o in over]
    table["reason"] = ["; ".join(f"{k} over cap" for k in o) for o in over]
    table.loc[table["state"] == "failed", "reason"] = "diverged: loss nan at epoch 2"
    table["val_accuracy"] = np.where(np.isin(state, ["trained", "stopped_early"]), accuracy, np.nan)
    table["train_seconds"] = np.where(state == "rejected", 0.0, rng.uniform(5, 60, n))
    table["epochs"] = rng.integers(1, 6, n)
    return table


def trace(fig, name: str):
    return next(t for t in fig.data if t.name.startswith(name))


@pytest.fixture(scope="module")
def trials() -> pd.DataFrame:
    return make_trials()


@pytest.fixture(scope="module")
def page(trials: pd.DataFrame, tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    path = write_report(trials, tmp_path_factory.mktemp("r") / "report.html", caps=CAPS, title="Test <run>",
                        notes=["data: synthetic", "seed 0"])
    return path, path.read_text(encoding="utf-8")


def test_page_is_self_contained(trials: pd.DataFrame, page: tuple[Path, str]) -> None:
    path, text = page
    bundle = get_plotlyjs()
    assert text.count(bundle) == 1
    outside = text.replace(bundle, "")
    # Our own markup and the figure JSON reference nothing on the network. (The plotly.js
    # bundle itself holds default URLs for map and geo traces, which this page never uses.)
    assert 'src="http' not in outside and "https://cdn" not in outside
    assert "http://" not in outside and "https://" not in outside
    assert not re.search(r"""(src|href)\s*=\s*['"]?(https?:)?//""", outside)
    assert outside.count("Plotly.newPlot") == len(build_figures(trials, CAPS))
    assert not list(path.parent.glob(".*.tmp"))  # the temp file was renamed, not left behind


def test_header_counts_best_and_notes(trials: pd.DataFrame, page: tuple[Path, str]) -> None:
    text = page[1]
    assert "<title>Test &lt;run&gt;</title>" in text and "data: synthetic" in text
    for state, label in [("trained", "trained"), ("stopped_early", "stopped early"), ("failed", "failed")]:
        assert f"<b>{(trials['state'] == state).sum()}</b><span>{label}</span>" in text
    tried = trials["state"].isin(["trained", "stopped_early", "rejected", "failed", "interrupted"]).sum()
    assert f"<b>{tried}</b><span>tried</span>" in text
    trained = trials[(trials["state"] == "trained") & feasible_mask(trials, CAPS)]
    best = trained.loc[trained["val_accuracy"].idxmax()]
    header = text.split("</header>")[0]
    assert best["arch"] in header and f"{best['val_accuracy']:.1%}" in header
    assert "20k" in text and "64 KiB" in text  # caps written for people


def test_repeats_count_in_the_header_but_are_drawn_once(trials: pd.DataFrame) -> None:
    """A repeat reuses a known outcome: the header counts it apart, as the search summary does, not as
    trained again; the figures and fronts show each candidate once, where it was trained."""
    first = trials[trials["state"] == "trained"].iloc[0]
    repeat = first.copy()
    repeat["trial"], repeat["repeat_of"], repeat["train_seconds"] = len(trials), first["trial"], 0.0
    table = pd.concat([trials.assign(repeat_of=np.nan), repeat.to_frame().T], ignore_index=True)
    page = render_html(table, caps=CAPS, title="t")
    header = page.split("</header>")[0]
    assert f"<b>{(trials['state'] == 'trained').sum()}</b><span>trained</span>" in header
    assert "<b>1</b><span>reused a known outcome</span>" in header
    assert page.split("</header>")[1] == render_html(trials, caps=CAPS, title="t").split("</header>")[1]


@pytest.mark.parametrize("cost", COST_COLUMNS)
def test_front_trace_equals_pareto_mask(trials: pd.DataFrame, cost: str) -> None:
    fig = build_figures(trials, CAPS)[cost]
    pool = trials[trials["state"].isin(["trained", "stopped_early"]) & feasible_mask(trials, CAPS)]
    expected = pool[pareto_mask(pool["val_accuracy"], pool[cost])].sort_values(cost)
    line = trace(fig, "Pareto front")
    assert list(line.x) == expected[cost].tolist() and np.allclose(line.y, expected["val_accuracy"])
    assert list(np.diff(line.x) >= 0) == [True] * (len(line.x) - 1)
    assert fig.layout.xaxis.type == "log"
    for arch, hover in zip(expected["arch"], line.text):
        assert arch in hover
    points = trace(fig, "trained")
    assert len(points.x) == (trials["state"] == "trained").sum()
    assert all(a in h for a, h in zip(trials.loc[trials["state"] == "trained", "arch"], points.text))


def decode(value: object) -> list:
    """A JSON array from plotly's page: plain, or typed as {"dtype", "bdata"} (base64 of the raw
    little-endian values; plotly.py 6+ writes numpy arrays this way for plotly.js typed arrays)."""
    if isinstance(value, dict):
        return np.frombuffer(base64.b64decode(value["bdata"]), dtype=value["dtype"]).tolist()
    return list(value)


def test_embedded_figure_json_matches_built_figure(trials: pd.DataFrame, page: tuple[Path, str]) -> None:
    text = page[1]
    start = text.index('"fig-params",') + len('"fig-params",')
    data, _ = json.JSONDecoder().raw_decode(text[start:].lstrip())
    embedded = next(t for t in data if t["name"].startswith("Pareto front"))
    built = trace(build_figures(trials, CAPS)["params"], "Pareto front")
    assert decode(embedded["x"]) == list(built.x) and decode(embedded["text"]) == list(built.text)
    assert np.allclose(decode(embedded["y"]), built.y) and len(built.x) > 2


def test_points_over_a_cap_are_drawn_hollow(trials: pd.DataFrame) -> None:
    points = trace(build_figures(trials, {"params": 5000})["params"], "trained")
    hollow = [s == "circle-open" for s in points.marker.symbol]
    assert hollow == [x > 5000 for x in points.x] and any(hollow) and not all(hollow)


def test_failures_listed_with_reason(page: tuple[Path, str]) -> None:
    assert "diverged: loss nan at epoch 2" in page[1]


@pytest.mark.parametrize("cost", COST_COLUMNS)
def test_cap_lines_at_the_cap(trials: pd.DataFrame, cost: str) -> None:
    fig = build_figures(trials, CAPS)[cost]
    if cost not in CAPS:
        assert not fig.layout.shapes
        return
    (shape,) = fig.layout.shapes
    assert shape.x0 == shape.x1 == CAPS[cost]
    label = next(a for a in fig.layout.annotations if a.text.startswith("cap"))
    # plotly wants annotation x on a log axis as log10 of the value (plotly layout.annotation.x docs).
    assert label.x == pytest.approx(math.log10(CAPS[cost]))
    assert fig.layout.xaxis.range[0] < math.log10(CAPS[cost]) < fig.layout.xaxis.range[1]


def test_shape_and_rejection_figures(trials: pd.DataFrame) -> None:
    figures = build_figures(trials, CAPS)
    scored = trials[trials["state"].isin(["trained", "stopped_early"])]
    box = figures["stages"].data[0]
    assert sorted(box.y) == sorted(scored["val_accuracy"])
    assert sorted(set(box.x)) == sorted({str(s) for s in scored["stages"]})
    bars = figures["rejected_by"].data[0]
    counts = trials.loc[trials["state"] == "rejected", "rejected_by"].value_counts()
    assert dict(zip(bars.y, bars.x)) == {broken_caps_label(k): v for k, v in counts.items()}
    assert broken_caps_label("params+macs") == "parameters + MACs" and broken_caps_label("") == "(no reason given)"


def test_front_table_lists_front_with_gain_per_doubling(trials: pd.DataFrame) -> None:
    text = front_table_html(trials, "params", CAPS)
    pool = trials[trials["state"].isin(["trained", "stopped_early"]) & feasible_mask(trials, CAPS)]
    on = pool[pareto_mask(pool["val_accuracy"], pool["params"])].sort_values("params")
    assert text.count("<tr>") == len(on) + 1
    assert [a for a in on["arch"] if a not in text] == []
    for (_, a), (_, b) in zip(on.iterrows(), on.iloc[1:].iterrows()):
        ratio = b["params"] / a["params"]
        if ratio >= 1.25:  # a step of at least a quarter more cost gives a rate per doubling
            gain = (b["val_accuracy"] - a["val_accuracy"]) * 100 / math.log2(ratio)
            assert f"{gain:+.1f} pts</td>" in text
        else:
            assert "too small a step for a rate" in text


EDGE_CASES = {
    "empty with columns": make_trials().iloc[:0],
    "empty frame": pd.DataFrame(),
    "only running": make_trials().assign(state="running", val_accuracy=np.nan),
    "all rejected": make_trials().assign(state="rejected", val_accuracy=np.nan, rejected_by="params"),
    "nans everywhere": make_trials().assign(stages=np.nan, arch=None, rejected_by=np.nan),
}


@pytest.mark.parametrize("name", EDGE_CASES)
@pytest.mark.parametrize("caps", [CAPS, {}], ids=["caps", "no-caps"])
def test_edge_cases_render(name: str, caps: dict, tmp_path: Path) -> None:
    path = write_report(EDGE_CASES[name], tmp_path / "sub" / "r.html", caps=caps, title=name)
    text = path.read_text(encoding="utf-8")
    assert text.count(get_plotlyjs()) == 1 and text.rstrip().endswith("</html>")
    if name != "nans everywhere":
        assert "No candidate within the caps has been fully trained yet." in text
    if not caps:
        assert "Caps: none set." in text


def test_written_from_csv_round_trip(tmp_path: Path) -> None:
    csv = tmp_path / "trials.csv"
    make_trials(20, seed=3).to_csv(csv, index=False)
    figures = build_figures(pd.read_csv(csv), CAPS)  # blanks come back as NaN
    assert len(figures["params"].data) == 3


def test_user_mistakes_raise_searcher_error() -> None:
    with pytest.raises(SearcherError, match="lacks the columns"):
        build_figures(make_trials().drop(columns=["arch"]), CAPS)
    with pytest.raises(SearcherError, match="did you mean 'macs'"):
        build_figures(make_trials(), {"mac": 3})


def test_render_is_the_written_text(tmp_path: Path) -> None:
    trials = make_trials(10, seed=5)
    path = write_report(trials, tmp_path / "r.html", caps=CAPS, title="t")
    assert path.read_text(encoding="utf-8") == render_html(trials, caps=CAPS, title="t")
    assert (os.stat(path).st_mode & 0o777) == 0o644


CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if os.path.exists("/usr/bin/chromium") else None)


@pytest.mark.slow
@pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (apt-get install chromium to run this)")
def test_headless_render_is_not_blank(page: tuple[Path, str], tmp_path: Path) -> None:
    from PIL import Image

    shot = tmp_path / "shot.png"
    command = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={tempfile.mkdtemp(dir=tmp_path)}", f"--screenshot={shot}",
               "--window-size=1200,2000", "--virtual-time-budget=5000", page[0].resolve().as_uri()]
    subprocess.run(command, check=True, capture_output=True, timeout=120)
    image = np.asarray(Image.open(shot).convert("L"), dtype=float)
    assert image.shape == (2000, 1200)
    assert image.std() > 10  # text and charts, not one flat colour
    assert (image < 128).mean() > 0.005  # some dark ink: drawn text and markers


def test_a_candidate_confirmed_with_one_seed_shows_no_spread() -> None:
    """Regression (a new user's report): one seed was shown as "± 0.0%", a spread that was never measured."""
    from searcher.run.confirmation import confirmation
    from searcher.results.report_confirmed import confirmed_front_html, mean_sd

    frame = pd.DataFrame([{"trial": t, "arch": f"1x8x8_c{2 + t}k3_gap-o2_relu", "state": "trained", "val_accuracy": a,
                           "val_balanced_accuracy": a, "params": p, "macs": p, "peak_activation_bytes": 10,
                           "weight_bytes": p, "repeat_of": None} for t, a, p in [(0, 0.8, 100), (1, 0.9, 200)]])
    jobs = pd.DataFrame([{"job": j, "trial": t, "seed_index": i, "state": "trained", "val_accuracy": a,
                          "val_balanced_accuracy": a, "val_accuracy_int8": np.nan, "reason": "on a front",
                          "train_seconds": 1.0, "history": [a]} for j, (t, i, a) in
                         enumerate([(0, 0, 0.81), (1, 0, 0.90), (1, 1, 0.92)])])
    html_text = confirmed_front_html(confirmation(frame, jobs, {}, "params", None, 1, 10), "params", {})
    assert "± 0.0%" not in html_text and "(1 seed, no spread yet)" in html_text
    assert mean_sd(0.91, 0.01414, 2) == "91.0% ± 1.4% over 2 seeds"
