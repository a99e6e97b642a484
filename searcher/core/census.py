"""The census: how much of a space fits the budget, without training anything.

Candidates are handled as a *batch*: one numpy array per named decision of
:meth:`Space.assemble`. Small spaces are enumerated exactly; larger ones are sampled uniformly
over configurations with a seeded generator. Costs come from the same per-layer formulas as
:func:`searcher.core.cost.cost`, applied to whole arrays at once; ``tests/test_census.py`` checks the
two agree candidate by candidate.
"""

from __future__ import annotations

import itertools
import math
import re
from typing import Any

import numpy as np

from searcher.core import latency
from searcher.core.arch import POOLS, TABLE_ACTIVATIONS, Arch
from searcher.core.budget import LATENCY, Budget
from searcher.core.cost import PRECISION_BYTES, conv_macs, conv_params, dense_params, weight_bytes
from searcher.core.plan import padding_of, window_output
from searcher.core.space import Decision, Space

Batch = dict[str, np.ndarray]

# The cost-relevant decisions batch_costs reads, by name; one it does not know stops the census.
_READ = re.compile(r"resolution|stages|first_width|activation|batch_norm|features|hidden|(convs|kernel|pool)_\d+|"
                   r"hidden_width_\d+")


def costing(space: Space, timed: bool = False) -> list[Decision]:
    """The decisions that change a cost, which the census enumerates. With the latency counted (``timed``)
    the activation is one of them where the space mixes activations done by table lookup with clamps."""
    mixed = len({a in TABLE_ACTIVATIONS for a in space.activations}) > 1
    return [d for d in space.decisions if d.costs or (timed and mixed and d.name == "activation")]


def _dimensions(space: Space, timed: bool = False) -> dict[str, list]:
    """Every cost-relevant decision with its options (inactive ones included); input sizes by index."""
    dims = {d.name: list(range(len(d.options))) if d.name == "resolution" else list(d.options)
            for d in costing(space, timed)}
    unknown = [name for name in dims if not _READ.fullmatch(name)]
    if unknown:
        raise NotImplementedError(f"the census does not yet count the decisions {unknown}: teach batch_costs")
    return dims


def multiplicity(space: Space, timed: bool = False) -> int:
    """How many configurations share each cost class: the options of the cost-free decisions."""
    counted = {d.name for d in costing(space, timed)}
    return math.prod(len(d.options) for d in space.decisions if d.name not in counted)


def sample(space: Space, n: int, seed: int, timed: bool = False) -> Batch:
    """``n`` draws uniform over configurations (a gate's options weighted by what stands behind each)."""
    rng = np.random.default_rng(seed)
    batch: Batch = {}
    for name, options in _dimensions(space, timed).items():
        values = np.asarray(options, dtype=object if isinstance(options[0], str) else None)
        weights = space.weights(space.decision(name))
        if weights is None:
            batch[name] = values[rng.integers(len(values), size=n)]
        else:
            p = np.asarray(weights, dtype=float)
            batch[name] = values[rng.choice(len(values), size=n, p=p / p.sum())]
    return batch


def enumerate_all(space: Space, timed: bool = False) -> Batch:
    """Every cost class once: for each combination of the gates' options, the product of the active decisions."""
    dims = _dimensions(space, timed)
    counted = costing(space, timed)
    gates = [d for d in counted if space.weights(d) is not None]
    blocks: list[Batch] = []
    for values in itertools.product(*(d.options for d in gates)):
        chosen = {d.name: v for d, v in zip(gates, values)}
        names = [d.name for d in counted if d.name not in chosen and space.active(d, chosen)]
        grid = np.indices([len(dims[name]) for name in names]).reshape(len(names), -1)
        size = grid.shape[1]
        block = {name: np.asarray(dims[name], dtype=object)[grid[j]] for j, name in enumerate(names)}
        block |= {name: np.full(size, value) for name, value in chosen.items()}
        for name in dims:
            block.setdefault(name, np.full(size, dims[name][0], dtype=object))
        blocks.append(block)
    return {name: np.concatenate([b[name] for b in blocks]) for name in dims}


def batch_costs(space: Space, batch: Batch, budget: Budget, classes: int | None = None) -> dict[str, np.ndarray]:
    """Cost totals for every candidate of a batch, as arrays keyed like ``Budget.totals`` (with the
    budget's target, the predicted ``latency_ms`` from the formulas of :mod:`searcher.core.latency`)."""
    n = len(batch["stages"])
    res = np.asarray(space.resolutions)[batch["resolution"].astype(int)]
    h, w = res[:, 0].astype(np.int64), res[:, 1].astype(np.int64)
    c = np.full(n, space.channels, dtype=np.int64)
    timed = budget.target is not None
    table = np.isin(batch.get("activation", space.activations[0]), TABLE_ACTIVATIONS) * np.ones(n, np.int64)
    count = np.zeros(n)  # predicted instructions of one inference on the target's core

    def run(terms: dict, where) -> None:
        """Add the instructions of a layer's `terms` where it exists."""
        nonlocal count
        if timed:
            count = count + np.where(where, latency.instructions(budget.target.core, terms), 0.0)

    run(latency.input_terms(c, h * w), True)
    depth = batch["stages"].astype(np.int64)
    first = batch["first_width"].astype(np.int64)
    bn = batch["batch_norm"].astype(bool)
    weights = np.zeros(n, np.int64)
    biases = np.zeros(n, np.int64)
    channels = np.zeros(n, np.int64)  # output channels of conv and dense layers
    macs = np.zeros(n, np.int64)
    peak = c * h * w
    # lookup[i][f] = width of stage i for first width f
    lookup = np.zeros((space.stage_count[1], max(space.first_width) + 1), np.int64)
    for f in space.first_width:
        lookup[:, f] = [space.stage_width(i, f) for i in range(space.stage_count[1])]
    last_width = first.copy()
    for i in range(space.stage_count[1]):
        in_stage = depth > i
        width = lookup[i][first]
        kernel = batch[f"kernel_{i + 1}"].astype(np.int64)
        pad = padding_of(kernel, space.padding)
        for j in range(space.stage_convs(i)[1]):
            on = in_stage & (batch[f"convs_{i + 1}"].astype(np.int64) > j)
            h2, w2 = window_output(h, kernel, space.stride, pad), window_output(w, kernel, space.stride, pad)
            wt, bias = conv_params(c, width, kernel, ~bn)
            weights += np.where(on, wt, 0)
            biases += np.where(on, bias + 2 * width * bn, 0)
            channels += np.where(on, width, 0)
            macs += np.where(on, conv_macs(c, width, kernel, h2, w2), 0)
            peak = np.maximum(peak, np.where(on, c * h * w + width * h2 * w2, 0))
            run(latency.conv_terms(h, w, c, h2, w2, width, kernel, space.stride, pad, table), on)
            c, h, w = np.where(on, width, c), np.where(on, h2, h), np.where(on, w2, w)
        pooled = in_stage & (batch[f"pool_{i + 1}"] != "none")
        h2 = window_output(h, space.pool_window, space.pool_stride, 0)
        w2 = window_output(w, space.pool_window, space.pool_stride, 0)
        peak = np.maximum(peak, np.where(pooled, c * h * w + c * h2 * w2, 0))
        for kind in POOLS:
            run(latency.pool_terms(f"{kind}pool", c, h2, w2, space.pool_window, space.pool_stride),
                in_stage & (batch[f"pool_{i + 1}"] == kind))
        h, w = np.where(pooled, h2, h), np.where(pooled, w2, w)
        last_width = np.where(in_stage, width, last_width)
    gap = batch["features"] == "gap"
    peak = np.maximum(peak, np.where(gap, c * h * w + c, 0))
    run(latency.gap_terms(c, h * w), gap)
    features = np.where(gap, c, c * h * w)
    hidden = batch["hidden"].astype(np.int64)
    for k in range(space.hidden_count[1] + 1):
        is_out = hidden == k
        on = hidden >= k
        width = np.full(n, classes or space.classes, np.int64) if k == space.hidden_count[1] else np.where(
            is_out, classes or space.classes, batch[f"hidden_width_{k + 1}"].astype(np.int64))
        wt, bias = dense_params(features, width)
        weights += np.where(on, wt, 0)
        biases += np.where(on, bias, 0)
        channels += np.where(on, width, 0)
        macs += np.where(on, wt, 0)
        peak = np.maximum(peak, np.where(on, features + width, 0))
        run(latency.dense_terms(features, width, table * (hidden > k)), on)
        features = np.where(on, width, features)
    run(latency.output_terms(np.full(n, classes or space.classes, np.int64)), True)
    timing = {LATENCY: budget.target.seconds(count) * 1e3} if timed else {}
    return timing | {
        "params": weights + biases,
        "macs": macs,
        "peak_activation_bytes": peak * PRECISION_BYTES[budget.activation_precision],
        "weight_bytes": weight_bytes(weights, biases, budget.weight_precision, channels),
        "stages": depth,
        "first_width": first,
        "last_width": last_width,
    }


def decode(space: Space, batch: Batch, index: int, classes: int | None = None) -> Arch:
    """The architecture of one batch row (cost-free decisions take their first option)."""
    row: dict[str, Any] = {name: values[index].item() if hasattr(values[index], "item") else values[index]
                           for name, values in batch.items()}
    row["resolution"] = space.resolutions[int(row["resolution"])]
    return space.replay(row, classes)
