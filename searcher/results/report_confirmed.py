"""The report's confirmed numbers: seeds' means with error bars on each front plot, proxy against
confirmed, the confirmed fronts with steps marked where they are within noise, and the split sizes
with the noise of an accuracy measured on each."""

from __future__ import annotations

import html
import math

import numpy as np
import pandas as pd
import plotly.graph_objects as go

from searcher.core.stats import accuracy_se
from searcher.run.confirmation import Confirmation, Judge
from searcher.core.pareto import feasible_mask, pareto_mask
from searcher.run.records import ACCURACY
from searcher.results.report_parts import COST_LABELS, TEMPLATE, cost_text, empty_note, percent, table_html

CONFIRMED_COLOUR = "#2a9d5b"


def _confirmed(confirmation: Confirmation | None) -> pd.DataFrame:
    """The confirmed candidates, with the run's score (accuracy or balanced accuracy) as score_mean,
    score_sd and score_proxy."""
    if confirmation is None:
        return pd.DataFrame(columns=["trial", "arch", "seeds", "score_mean", "score_sd", "score_proxy"])
    table, metric = confirmation.table, confirmation.metric
    table = table.assign(score_mean=table[metric.mean], score_sd=table[metric.sd], score_proxy=table[metric.proxy])
    return table[table["seeds"] > 0]


def _label(confirmation: Confirmation | None) -> str:
    return ACCURACY.label if confirmation is None else confirmation.metric.label


def mean_sd(mean: float, sd: float, seeds: int) -> str:
    """A confirmed mean with its seeds' sd; one seed has no spread to show, and says so rather than '± 0.0%'."""
    if int(seeds) < 2 or not math.isfinite(sd):
        return f"{percent(mean)} (1 seed, no spread yet)"
    return f"{percent(mean)} ± {percent(sd)} over {int(seeds)} seeds"


def add_confirmed(fig: go.Figure, confirmation: Confirmation | None, cost: str) -> None:
    """Confirmed means ± 1 sd of the seeds, on a plot of accuracy against ``cost``."""
    rows = _confirmed(confirmation)
    if rows.empty:
        return
    sd = rows["score_sd"].fillna(0.0)
    fig.add_scatter(
        x=rows[cost], y=rows["score_mean"], mode="markers", name="confirmed mean ± 1 sd",
        error_y={"type": "data", "array": sd, "visible": True, "color": CONFIRMED_COLOUR, "thickness": 1.5},
        marker={"color": CONFIRMED_COLOUR, "size": 9, "symbol": "square"},
        text=[f"<b>{html.escape(a)}</b><br>trial {int(t)} · confirmed {mean_sd(m, s, n)} · proxy {percent(p)}"
              for a, t, m, s, n, p in zip(rows["arch"], rows["trial"], rows["score_mean"], rows["score_sd"],
                                          rows["seeds"], rows["score_proxy"])],
        hovertemplate="%{text}<extra></extra>")


def proxy_figure(confirmation: Confirmation | None) -> go.Figure:
    """Proxy accuracy against confirmed mean: a good proxy puts the points in the same order."""
    rows = _confirmed(confirmation)
    rho = math.nan if confirmation is None else confirmation.spearman
    title = f"Proxy against confirmed {_label(confirmation)}" + (f" (Spearman's rho {rho:.2f})" if math.isfinite(rho) else "")
    fig = go.Figure(layout={"template": TEMPLATE, "title": title, "showlegend": False})
    fig.add_scatter(x=rows["score_proxy"], y=rows["score_mean"], mode="markers",
                    error_y={"type": "data", "array": rows["score_sd"].fillna(0.0), "visible": True},
                    marker={"color": CONFIRMED_COLOUR, "size": 9},
                    text=[f"trial {int(t)}: {html.escape(a)}" for t, a in zip(rows["trial"], rows["arch"])],
                    hovertemplate="%{text}<br>proxy %{x:.1%} · confirmed %{y:.1%}<extra></extra>")
    if not rows.empty:
        low = float(np.nanmin([rows["score_proxy"].min(), rows["score_mean"].min()])) - 0.02
        fig.add_shape(type="line", x0=low, y0=low, x1=1, y1=1, line={"color": "#999", "dash": "dot"})
    fig.update_xaxes(title=f"proxy validation {_label(confirmation)} (short training)", tickformat=".0%")
    fig.update_yaxes(title="confirmed mean (full schedule, several seeds)", tickformat=".0%")
    return empty_note(fig, "nothing confirmed yet", rows.empty)


def confirmed_front_html(confirmation: Confirmation | None, cost: str, caps: dict[str, float]) -> str:
    """The front by one cost on confirmed means, each step from the row above marked where it is within
    noise (neither credibly ahead of the other, by the run's rule: see searcher.run.confirmation.Judge)."""
    rows = _confirmed(confirmation)
    rows = rows[feasible_mask(rows, caps)] if len(rows) else rows
    if rows.empty:
        return ""
    on = rows[pareto_mask(rows["score_mean"].to_numpy(float), rows[cost].to_numpy(float))]
    on = on.sort_values([cost, "score_mean"], ascending=[True, False])
    judge = confirmation.judge or Judge(confirmation.table, confirmation.metric)
    body, before = [], None
    for row in on.itertuples(index=False):
        step = "—"
        if before is not None:
            gain = row.score_mean - before.score_mean
            apart = judge.below(int(row.trial), int(before.trial)) or judge.below(int(before.trial), int(row.trial))
            step = (f"{gain * 100:+.1f} pts for ×{getattr(row, cost) / getattr(before, cost):.2f} cost"
                    + ("" if apart else " <b>(within noise)</b>"))
        body.append([str(int(row.trial)), f"<code>{html.escape(row.arch)}</code>",
                     mean_sd(row.score_mean, row.score_sd, row.seeds), str(int(row.seeds)),
                     percent(row.score_proxy), cost_text(cost, getattr(row, cost)), step])
        before = row
    heads = ["trial", "architecture", "confirmed mean ± sd", "seeds", "proxy", COST_LABELS[cost][0],
             "step from the row above (confirmed)"]
    return f"<h3>Confirmed front by {html.escape(COST_LABELS[cost][0])}</h3>" + table_html(heads, body, "numbers")


def confirmation_html(confirmation: Confirmation | None, sizes: dict[str, int]) -> str:
    """The header's words on confirmation: the proxy's ranking quality, the default pick, and the noise
    of an accuracy at the validation and test sizes."""
    parts = []
    for part in ("val", "test"):
        if part in sizes:
            n = sizes[part]
            parts.append(f"{'validation' if part == 'val' else 'test'} split {n:,} images: an accuracy near 90% "
                         f"is known to ±{100 * accuracy_se(0.9, n):.1f} points (one standard error)")
    lines = [f"<p class='quiet'>{html.escape('; '.join(parts))}.</p>"] if parts else []
    if confirmation is None:
        lines.append("<p class='quiet'>No confirmation yet: the fronts below rest on one short proxy training "
                     "per candidate.</p>")
        return "".join(lines)
    warn = "" if confirmation.reliable else " class='warn'"
    lines.append(f"<p{warn}>{html.escape(confirmation.advice())}.</p>")
    lines.append(f"<p>{html.escape(confirmation.noise_words()[0].upper() + confirmation.noise_words()[1:])}.</p>")
    if confirmation.pick is not None:
        lines.append(f"<p>Default export: {html.escape(confirmation.pick.reason)}.</p>")
    if confirmation.queued:
        lines.append(f"<p class='quiet'>{confirmation.queued} confirmation job(s) still queued or running; "
                     f"the next search run with this name finishes them.</p>")
    return "".join(lines)

