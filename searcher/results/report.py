"""One self-contained HTML page that shows what a search found and what each budget buys.

plotly.js is embedded once and nothing is fetched, so the page opens offline and travels as
one file. It must read well while a search is starting, so every part copes with no rows.
"""

from __future__ import annotations

import html
import logging
import math
from collections.abc import Mapping
from pathlib import Path

import numpy as np
import pandas as pd
import plotly.graph_objects as go
import plotly.io as pio
from plotly.offline import get_plotlyjs

from searcher.errors import SearcherError
from searcher.run.records import (
    ACCURACY, FAILED, INTERRUPTED, REJECTED, SCORED, TRAINED, Metric, best_row, counts as trial_counts, distinct_rows,
)
from searcher.core.budget import LATENCY
from searcher.core.pareto import COSTS, check_caps, feasible_mask, present_costs
from searcher.results.fronts import front, front_steps
from searcher.run.confirmation import Confirmation
from searcher.results.report_parts import (
    COLOURS, CONFIG, COST_LABELS, SHOWN_WHEN_ANY, STATE_LABELS, TEMPLATE, cost_text, empty_note, log_axis, percent,
    table_html,
)
from searcher.results.report_confirmed import add_confirmed, confirmation_html, confirmed_front_html, proxy_figure
from searcher.files import write_atomic

log = logging.getLogger(__name__)

_TEXT_COLUMNS = ("arch", "state", "reason", "rejected_by")
_NUMBER_COLUMNS = ("trial", "val_accuracy", *COSTS, "stages", "first_width")


def prepare(trials: pd.DataFrame, metric: Metric = ACCURACY) -> pd.DataFrame:
    """A copy with every column the report reads, text blanks as '' and numbers as floats; ``score`` is
    the column of the run's metric (accuracy unless the search ranked by another)."""
    table = trials.copy()
    missing = [c for c in (*_TEXT_COLUMNS, *_NUMBER_COLUMNS) if c not in table.columns and c != LATENCY]  # a run
    # with no target, or from before targets, has no predicted latency
    if missing and len(table):
        raise SearcherError(f"trials table lacks the columns {', '.join(missing)}; a report needs all of them")
    for column in _TEXT_COLUMNS:
        text = table[column].astype(object) if column in table else pd.Series("", index=table.index, dtype=object)
        table[column] = text.where(text.notna(), "").astype(str)
    for column in _NUMBER_COLUMNS:
        table[column] = pd.to_numeric(table[column], errors="coerce") if column in table else np.nan
    table["score"] = pd.to_numeric(table[metric.column], errors="coerce") if metric.column in table else np.nan
    if unknown := sorted(set(table["state"]) - set(STATE_LABELS)):
        log.warning("trials table has unknown states %s; the report counts them in no tile", unknown)
    return table


def _hover(rows: pd.DataFrame) -> list[str]:
    """Hover lines: the architecture verbatim, then accuracy and every cost."""
    lines = []
    for row in rows.itertuples(index=False):
        costs = " · ".join(f"{COST_LABELS[c][0]} {cost_text(c, getattr(row, c))}" for c in present_costs(rows))
        trial, state = "?" if math.isnan(row.trial) else int(row.trial), STATE_LABELS.get(row.state, row.state)
        lines.append(f"<b>{html.escape(row.arch, quote=False)}</b><br>trial {trial} · {state} · "
                     f"score {percent(row.score)}<br>{costs}")
    return lines


def _scored(table: pd.DataFrame) -> pd.DataFrame:
    return table[table["state"].isin(SCORED) & table["score"].notna()]


def _cost_figure(table: pd.DataFrame, cost: str, caps: dict[str, float], metric: Metric) -> go.Figure:
    """Accuracy against one cost: every scored point, the feasible front, the cap line."""
    scored = _scored(table)
    fits = feasible_mask(scored, caps)
    fig = go.Figure(layout={"template": TEMPLATE, "title": f"Accuracy against {COST_LABELS[cost][0]}"})
    for state in SCORED:
        rows = scored[scored["state"] == state]
        fig.add_scatter(
            x=rows[cost], y=rows["score"], mode="markers", name=STATE_LABELS[state],
            marker={"color": COLOURS[state], "size": 8, "opacity": 0.8,
                    "symbol": np.where(fits[(scored["state"] == state).to_numpy()], "circle", "circle-open")},
            text=_hover(rows), hovertemplate="%{text}<extra></extra>",
        )
    best = front(table, cost, caps=caps, score="score")
    fig.add_scatter(
        x=best[cost], y=best["score"], mode="lines+markers", name="Pareto front (within caps)",
        line={"color": COLOURS["front"], "width": 2, "shape": "hv"},
        marker={"color": COLOURS["front"], "size": 11, "symbol": "diamond"},
        text=_hover(best), hovertemplate="%{text}<extra></extra>",
    )
    for limit in [caps[cost]] if cost in caps else []:
        fig.add_shape(type="line", x0=limit, x1=limit, y0=0, y1=1, xref="x", yref="paper",
                      line={"color": COLOURS["cap"], "dash": "dash", "width": 2})
        fig.add_annotation(x=math.log10(limit), y=1, xref="x", yref="paper", yanchor="top", xanchor="left",
                           xshift=4, showarrow=False, bgcolor="rgba(255,255,255,0.8)",
                           text=f"cap {cost_text(cost, limit)}", font={"color": COLOURS["cap"]})
    log_axis(fig, cost, [*scored[cost].tolist(), *([caps[cost]] if cost in caps else [])])
    fig.update_yaxes(title=f"validation {metric.label}", tickformat=".0%", range=[0, 1] if scored.empty else None)
    return empty_note(fig, "no trained candidates yet", scored.empty)


def _group_figure(table: pd.DataFrame, column: str, label: str, metric: Metric) -> go.Figure:
    """Accuracy spread for each value of one shape setting, every point shown."""
    scored = _scored(table)
    groups = ["?" if math.isnan(v) else f"{v:g}" for v in scored[column]]  # '?' where the table has no value
    names = sorted(set(groups) - {"?"}, key=float) + (["?"] if "?" in groups else [])
    fig = go.Figure(layout={"template": TEMPLATE, "title": f"Accuracy by {label}", "showlegend": False})
    fig.add_box(
        x=groups, y=scored["score"],
        boxpoints="all", jitter=0.4, pointpos=0, hoveron="points", marker={"color": COLOURS[TRAINED], "size": 6},
        line={"color": "#555"}, fillcolor="rgba(59,110,168,0.12)",
        text=_hover(scored), hovertemplate="%{text}<extra></extra>",
    )
    fig.update_xaxes(title=label, type="category", categoryorder="array", categoryarray=names)
    fig.update_yaxes(title=f"validation {metric.label}", tickformat=".0%", range=[0, 1] if scored.empty else None)
    return empty_note(fig, "no trained candidates yet", scored.empty)


def broken_caps_label(rejected_by: str) -> str:
    """'params+macs' as people read it: 'parameters + MACs'."""
    parts = [COST_LABELS[p][0] if p in COST_LABELS else p for p in rejected_by.split("+") if p]
    return " + ".join(parts) or "(no reason given)"


def _rejected_figure(table: pd.DataFrame) -> go.Figure:
    """How many candidates each combination of broken caps turned away before training."""
    counts = table.loc[table["state"] == REJECTED, "rejected_by"].map(broken_caps_label).value_counts().sort_values()
    fig = go.Figure(layout={"template": TEMPLATE, "title": "Rejected before training, by broken cap",
                            "showlegend": False, "height": max(260, 120 + 28 * len(counts))})
    fig.add_bar(x=counts.to_numpy(), y=counts.index.tolist(), orientation="h", marker={"color": COLOURS["bar"]},
                text=counts.to_numpy(), textposition="auto", hovertemplate="%{y}: %{x}<extra></extra>")
    fig.update_xaxes(title="candidates", rangemode="tozero")
    fig.update_yaxes(type="category", automargin=True)
    return empty_note(fig, "no candidates rejected", counts.empty)


def build_figures(trials: pd.DataFrame, caps: Mapping[str, float | None] | None = None,
                  confirmation: Confirmation | None = None, metric: Metric = ACCURACY) -> dict[str, go.Figure]:
    """Every chart of the report, keyed by the column it is about, in page order."""
    table, set_caps = prepare(trials, metric), check_caps(caps)
    figures = {cost: _cost_figure(table, cost, set_caps, metric) for cost in present_costs(table)}
    for cost in present_costs(table):
        add_confirmed(figures[cost], confirmation, cost)
    figures["proxy"] = proxy_figure(confirmation)
    figures["stages"] = _group_figure(table, "stages", "depth (stages)", metric)
    figures["first_width"] = _group_figure(table, "first_width", "first width (channels)", metric)
    figures["rejected_by"] = _rejected_figure(table)
    return figures


def front_table_html(trials: pd.DataFrame, cost: str, caps: Mapping[str, float | None] | None = None,
                     metric: Metric = ACCURACY) -> str:
    """The front by one cost as an HTML table, with the score each doubling of it buys."""
    best = front(prepare(trials, metric), cost, caps=caps, score="score")
    if best.empty:
        return '<p class="quiet">No trained candidate within the caps yet, so no front.</p>'
    steps = front_steps(best, cost, score="score")
    int8 = pd.to_numeric(best.get("val_accuracy_int8", pd.Series(dtype=float)), errors="coerce")
    shows_int8 = bool(int8.notna().any())  # measured when the budget's weights are int8
    heads = ["trial", "architecture", metric.label, *(["int8 accuracy"] if shows_int8 else []),
             *(COST_LABELS[c][0] for c in present_costs(best)),
             "step from the row above", f"{metric.label} per 2× {COST_LABELS[cost][0]}"]
    rows = [
        [str(int(row.trial)), f"<code>{html.escape(row.arch)}</code>", percent(row.score),
         *([percent(float(q))] if shows_int8 else []),
         *(cost_text(c, getattr(row, c)) for c in present_costs(best)),
         "—" if math.isnan(step) else f"{step * 100:+.1f} pts for ×{ratio:.2f} cost",
         ("—" if math.isnan(ratio) else "— (too small a step for a rate)") if math.isnan(gain)
         else f"{gain * 100:+.1f} pts"]
        for (step, ratio, gain), row, q in zip(steps.itertuples(index=False), best.itertuples(index=False),
                                              int8.reindex(best.index) if shows_int8 else [math.nan] * len(best))
    ]
    return table_html(heads, rows, "numbers")


def _failures_html(table: pd.DataFrame, most: int = 30) -> str:
    """Failed and interrupted trials with their reasons, newest first, so problems show."""
    bad = table[table["state"].isin([FAILED, INTERRUPTED])].sort_values("trial", ascending=False)
    if bad.empty:
        return ""
    rows = [[str(int(r.trial)), STATE_LABELS[r.state], f"<code>{html.escape(r.arch)}</code>",
             html.escape(r.reason) or "—"] for r in bad.head(most).itertuples(index=False)]
    more = f"<p class='quiet'>and {len(bad) - most} more.</p>" if len(bad) > most else ""
    return f"<h2>Failed or interrupted</h2>{table_html(['trial', 'state', 'architecture', 'reason'], rows, 'text')}{more}"


def _header_html(table: pd.DataFrame, caps: dict[str, float], title: str, notes: list[str],
                 confirmation: Confirmation | None, sizes: dict[str, int], metric: Metric) -> str:
    """Counts over every trial, as the search command's summary gives them; the best among distinct ones."""
    counts = trial_counts(table)
    tiles = [("tried", counts["tried"])]
    tiles += [(label, counts[state]) for state, label in STATE_LABELS.items()
              if state not in SHOWN_WHEN_ANY or counts[state]]
    if counts["repeats"]:
        tiles.append(("reused a known outcome", counts["repeats"]))
    tile_html = "".join(f'<div class="tile"><b>{n}</b><span>{html.escape(w)}</span></div>' for w, n in tiles)
    top = best_row(table, caps, metric)  # fully trained; fewest params wins a tie
    best = "No candidate within the caps has been fully trained yet." if top is None else (
        f"Best fully trained within the caps by the proxy: <b>{percent(top[metric.column])}</b> "
        f"{html.escape(metric.label)} by <code>{html.escape(top['arch'])}</code> (trial {int(top['trial'])}).")
    cap_words = ", ".join(f"{COST_LABELS[c][0]} ≤ {cost_text(c, v)}" for c, v in caps.items()) or "none set"
    note_html = "".join(f"<li>{html.escape(line)}</li>" for line in notes)
    return (f"<header><h1>{html.escape(title)}</h1><div class='tiles'>{tile_html}</div><p>{best}</p>"
            f"{confirmation_html(confirmation, sizes)}<p class='quiet'>Caps: {html.escape(cap_words)}.</p>"
            + (f"<ul class='notes'>{note_html}</ul>" if notes else "") + "</header>")


_STYLE = """body { font-family: system-ui, sans-serif; color: #222; margin: 0; background: #f4f4f2; }
main { max-width: 1150px; margin: 0 auto; padding: 24px; } header, section { background: white;
  border: 1px solid #ddd; border-radius: 6px; padding: 16px 20px; margin-bottom: 18px; }
h1 { font-size: 24px; margin: 0 0 12px; } h2 { font-size: 18px; margin: 4px 0 8px; } .quiet { color: #666; }
.tiles { display: flex; flex-wrap: wrap; gap: 8px; margin-bottom: 8px; } .pair { display: grid; gap: 12px; }
.tile { border: 1px solid #ddd; border-radius: 4px; padding: 6px 12px; min-width: 84px; text-align: center; }
.tile b { display: block; font-size: 20px; } .tile span { font-size: 12px; color: #666; }
.notes { margin: 6px 0 0; padding-left: 20px; } code { font-size: 12px; word-break: break-all; } table {
  border-collapse: collapse; width: 100%; font-size: 13px; margin-top: 8px; }
th, td { border-bottom: 1px solid #e4e4e4; padding: 4px 8px; text-align: left; }
tbody tr:nth-child(odd) { background: #fafafa; } .numbers td, .numbers th { text-align: right; }
.numbers td:nth-child(2), .numbers th:nth-child(2) { text-align: left; }
.warn { color: #8a3b00; font-weight: 600; } h3 { font-size: 15px; margin: 14px 0 4px; }
@media (min-width: 900px) { .pair { grid-template-columns: 1fr 1fr; } }"""


def recall_html(table: pd.DataFrame, caps: dict[str, float], metric: Metric, class_names: tuple[str, ...]) -> str:
    """Validation recall of each class for the best candidate: where a rare class is missed, it shows."""
    top = best_row(table, caps, metric)
    recall = None if top is None else top.get("val_recall")
    if not isinstance(recall, (list, tuple)) or not recall:
        return ""
    names = class_names if len(class_names) == len(recall) else tuple(str(i) for i in range(len(recall)))
    rows = [[html.escape(name), percent(value if value is not None else math.nan)] for name, value in zip(names, recall)]
    return (f"<h2>Recall per class, trial {int(top['trial'])} (validation split)</h2>"
            + table_html(["class", "recall"], rows, "numbers"))


def render_html(trials: pd.DataFrame, *, caps: Mapping[str, float | None] | None, title: str,
                notes: list[str] | None = None, confirmation: Confirmation | None = None,
                sizes: dict[str, int] | None = None, metric: Metric = ACCURACY,
                class_names: tuple[str, ...] = ()) -> str:
    """The whole page as text: header, one section per cost with its fronts, then the rest."""
    everything, set_caps = prepare(trials, metric), check_caps(caps)
    table = distinct_rows(everything)  # a repeat of a known outcome is shown once, where it was trained
    figures = build_figures(table, set_caps, confirmation, metric)

    def div(key: str) -> str:
        return pio.to_html(figures[key], config=CONFIG, include_plotlyjs=False, full_html=False, div_id=f"fig-{key}")

    sections = [
        f"<section>{div(c)}<h2>Pareto front by {html.escape(COST_LABELS[c][0])}</h2>"
        f"{confirmed_front_html(confirmation, c, set_caps)}<h3>Proxy front by {html.escape(COST_LABELS[c][0])}</h3>"
        f"{front_table_html(table, c, set_caps, metric)}</section>"
        for c in present_costs(table)
    ]
    sections.insert(0, f"<section>{div('proxy')}{recall_html(table, set_caps, metric, class_names)}</section>")
    sections.append(f"<section><h2>Shape</h2><div class='pair'>{div('stages')}{div('first_width')}</div></section>")
    sections.append(
        f"<section><h2>Rejected, failed or interrupted</h2>{div('rejected_by')}{_failures_html(table)}</section>"
    )
    return (
        f"<!doctype html>\n<html lang='en'><head><meta charset='utf-8'><title>{html.escape(title)}</title>"
        f"<style>{_STYLE}</style><script>window.PlotlyConfig = {{MathJaxConfig: 'local'}};</script>"
        f"<script>{get_plotlyjs()}</script></head>\n<body><main>"
        f"{_header_html(everything, set_caps, title, list(notes or []), confirmation, sizes or {}, metric)}"
        f"{''.join(sections)}</main></body></html>\n"
    )


def write_report(trials: pd.DataFrame, path: Path, *, caps: dict[str, float], title: str,
                 notes: list[str] | None = None, confirmation: Confirmation | None = None,
                 sizes: dict[str, int] | None = None, metric: Metric = ACCURACY,
                 class_names: tuple[str, ...] = ()) -> Path:
    """Write the report to ``path`` atomically, so a reader never sees half a page."""
    path = Path(path)
    text = render_html(trials, caps=caps, title=title, notes=notes, confirmation=confirmation, sizes=sizes,
                       metric=metric, class_names=class_names)
    write_atomic(path, text)
    log.info("wrote report %s (%d trials)", path, len(trials))
    return path
