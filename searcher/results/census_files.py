"""A census as the command takes it, and its files: the data's classes size the output layer and its thin
classes are named; census_summary.csv, census_spread.csv, census_depth_width.csv and census.html.

The arithmetic is :mod:`searcher.core.census_report`'s (torch-free, no files); this floor adds what
needs the data loader and the file system.
"""

from __future__ import annotations

import html
import logging
from dataclasses import replace
from pathlib import Path

import pandas as pd

from searcher.core.budget import CAP_COLUMNS, LATENCY, Budget
from searcher.core.census_report import Census, CensusSettings, run_census, summary_lines
from searcher.core.space import Space
from searcher.data.load import check_source, describe_few_examples, few_examples, load_dataset
from searcher.errors import SearcherError, shown
from searcher.files import write_atomic
from searcher.run.folders import check_run_paths, why_unwritable

log = logging.getLogger(__name__)


def census(space: Space, budget: Budget | None = None, settings: CensusSettings = CensusSettings(),
           data: str | None = None) -> Census:
    """How much of ``space`` fits ``budget`` (the space's own when None), without training anything.

    With ``data`` ("demo", an .npz file or a class folder), its class count sizes the output layer
    (unless ``settings.classes`` is given) and classes with too few validation or test images are
    warned about now, before any search.

    >>> from searcher.core.space_file import builtin_space, load_space
    >>> census(load_space(builtin_space("classic"))).size
    96
    """
    if data is not None:
        check_source(data)
        try:
            dataset = load_dataset(data, space.data_shape, seed=settings.seed)
        except SearcherError as exc:  # what the loader says of the data, named as the option it came from
            raise SearcherError(f"`--data` {shown(data)}: {exc}", key="--data") from None
        settings = replace(settings, classes=settings.classes or dataset.num_classes)
        if found := few_examples(dataset):
            log.warning("%s", describe_few_examples(found))
    return run_census(space, budget or space.budget, settings)


CENSUS_FILES = ("census_summary.csv", "census_spread.csv", "census_depth_width.csv", "census.html")


def write_census(census: Census, folder: Path) -> list[Path]:
    """census_summary.csv, census_spread.csv, census_depth_width.csv and census.html in ``folder``."""
    try:
        writable(folder).mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise _unwritable(folder, exc) from None
    low, high = census.interval
    summary = pd.DataFrame([{
        "space": census.space.name, "configurations": census.size, "exact": census.exact,
        "evaluated": census.evaluated, "fraction_fits": census.fraction, "fraction_low": low, "fraction_high": high,
        "cheapest": str(census.cheapest or ""), "largest": str(census.largest or ""),
        **{f"cap_{c}": v for c, v in census.budget.caps().items()},
        **{f"lowest_{c}": v for c, v in census.lowest.items()},
    }])
    paths = {
        "census_summary.csv": summary.to_csv(index=False),
        "census_spread.csv": census.spread().to_csv(index_label="cost"),
        "census_depth_width.csv": census.depth_width().to_csv(),
        "census.html": census_html(census),
    }
    try:
        for name, text in paths.items():
            write_atomic(folder / name, text)
    except OSError as exc:
        raise _unwritable(folder, exc) from None
    return [folder / name for name in paths]


def writable(folder: Path) -> Path:
    """``folder``, when it can be made and written; else say plainly why not. Checked before the work,
    and nothing is created: a census refused later (its --data, say) leaves no empty folder behind."""
    why = why_unwritable(folder)
    if why is not None:
        raise _unwritable(folder, why)
    check_run_paths(folder, files=CENSUS_FILES, folders=())  # a FIFO or a link where a census file goes
    return folder


def _unwritable(folder: Path, why: OSError | str) -> SearcherError:
    why = why if isinstance(why, str) else why.strerror or str(why)
    return SearcherError(f"cannot write the census to {shown(str(folder))}: {why}; run it from a "
                         f"folder where runs/ can be written", key="--name")


def census_html(census: Census) -> str:
    """Histograms of each cost over fitting candidates and the depth x width heat map, offline."""
    import plotly.graph_objects as go
    from plotly.subplots import make_subplots

    columns = census.budget.columns  # the predicted latency, with a target, fills the cell beside the heat map
    places = [(k // 2 + 1, k % 2 + 1) for k in range(len(CAP_COLUMNS))] + [(3, 2)]
    titles = [f"{c} (fitting)" for c in CAP_COLUMNS] + ["fitting by depth x first width"]
    titles += [f"{LATENCY} on {census.budget.target.text()} (fitting)"] if LATENCY in columns else []
    fig = make_subplots(rows=3, cols=2, subplot_titles=titles, vertical_spacing=0.1)
    for column, (row, col) in zip(columns, places):
        values = census.costs[column][census.fits]
        fig.add_trace(go.Histogram(x=values[:200_000], name=column, showlegend=False), row=row, col=col)
        fig.update_xaxes(title_text=column, row=row, col=col)
    table = census.depth_width()
    fig.add_trace(go.Heatmap(z=table.values, x=[str(c) for c in table.columns], y=[str(r) for r in table.index],
                             colorscale="Blues", showscale=False, texttemplate="%{z}"), row=3, col=1)
    fig.update_xaxes(title_text="first-stage width", row=3, col=1)
    fig.update_yaxes(title_text="stages", row=3, col=1)
    head = "<br>".join(html.escape(line) for line in summary_lines(census)[:3])  # plotly reads titles as markup
    fig.update_layout(height=1100, title_text=f"Census of {html.escape(census.space.name)}<br><sup>{head}</sup>",
                      template="plotly_white", margin=dict(t=140))
    return fig.to_html(include_plotlyjs=True, full_html=True)
