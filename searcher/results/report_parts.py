"""The report's look, shared by its sections: words for states and costs, number formats, the plot
template, log axes and HTML tables."""

from __future__ import annotations

import html
import math
from collections.abc import Callable

import plotly.graph_objects as go

from searcher.core.units import format_bytes, format_count, format_duration
from searcher.run.records import (
    DUPLICATE, FAILED, INTERRUPTED, NOT_STARTED, QUEUED, REJECTED, RUNNING, STOPPED, TRAINED,
)

# Trial states in the order the header counts them, with the words shown for each.
STATE_LABELS: dict[str, str] = {TRAINED: "trained", STOPPED: "stopped early", REJECTED: "rejected",
                                FAILED: "failed", INTERRUPTED: "interrupted", RUNNING: "running",
                                QUEUED: "queued again", NOT_STARTED: "not started (time)",
                                DUPLICATE: "left to another worker"}
SHOWN_WHEN_ANY = (QUEUED, NOT_STARTED, DUPLICATE)  # header tiles only when some exist
# Each cost column: the words for it and how its numbers are written.
COST_LABELS: dict[str, tuple[str, Callable[[float], str]]] = {
    "params": ("parameters", format_count), "macs": ("MACs", format_count),
    "peak_activation_bytes": ("peak activation RAM", format_bytes), "weight_bytes": ("weight size", format_bytes),
    "latency_ms": ("predicted latency", format_duration),
}
COLOURS = {TRAINED: "#3b6ea8", STOPPED: "#d08b2c", "front": "#222222", "cap": "#b03a3a", "bar": "#7a7f87"}
CONFIG = {"displaylogo": False, "responsive": True}
AXIS = {"gridcolor": "#e6e6e6", "linecolor": "#999", "zeroline": False}
TEMPLATE = go.layout.Template(layout=go.Layout(
    font={"family": "system-ui, -apple-system, 'Segoe UI', sans-serif", "size": 13, "color": "#222"},
    paper_bgcolor="white", plot_bgcolor="#fbfbfb", height=420, xaxis=AXIS, yaxis=AXIS,
    hoverlabel={"bgcolor": "white", "font": {"size": 12}}, title={"x": 0.01, "xanchor": "left"},
    margin={"l": 60, "r": 20, "t": 70, "b": 50},
    legend={"orientation": "h", "x": 1, "xanchor": "right", "y": 1.02, "yanchor": "bottom"},
))



def percent(value: float) -> str:
    return "—" if value is None or math.isnan(value) else f"{value:.1%}"


def cost_text(column: str, value: float) -> str:
    return "—" if math.isnan(value) else COST_LABELS[column][1](value)


def empty_note(fig: go.Figure, text: str, empty: bool) -> go.Figure:
    if empty:
        fig.add_annotation(text=text, showarrow=False, xref="paper", yref="paper", x=0.5, y=0.5, font={"size": 15})
    return fig


def log_axis(fig: go.Figure, cost: str, values: list[float]) -> None:
    """A log x axis over the values, ticked at round numbers written for people (20k, 64 KiB)."""
    label, write = COST_LABELS[cost]
    fig.update_xaxes(type="log", title=f"{label} (log scale)")
    positive = [v for v in values if v > 0 and math.isfinite(v)]
    if not positive:
        return
    low, high = math.log10(min(positive)) - 0.15, math.log10(max(positive)) + 0.15
    binary = write is format_bytes  # bytes tick at powers of two, counts at 1-2-5 steps
    candidates = [2.0**k for k in range(64)] if binary else [m * 10.0**k for k in range(19) for m in (1, 2, 5)]
    ticks = [t for t in candidates if low <= math.log10(t) <= high]
    ticks = ticks[:: max(1, math.ceil(len(ticks) / 9))]
    fig.update_xaxes(range=[low, high], tickvals=ticks, ticktext=[write(t) for t in ticks])


def table_html(heads: list[str], rows: list[list[str]], css: str) -> str:
    """An HTML table; heads are plain text, cells are HTML already escaped by the caller."""
    head = "".join(f"<th>{html.escape(h)}</th>" for h in heads)
    body = "".join("<tr>" + "".join(f"<td>{cell}</td>" for cell in row) + "</tr>" for row in rows)
    return f'<table class="{css}"><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>'
