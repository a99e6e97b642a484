"""Texts that ship with an exported model: the standalone module source and the model card."""

from __future__ import annotations

from typing import Any

from torch import nn

from searcher.core.arch import Arch
from searcher.core.budget import CAP_COLUMNS, show_cost
from searcher.core.cost import cost
from searcher.core.stats import wilson_interval
from searcher.redact import redact

CAUTIONS = """\
## Cautions

- The search ranked candidates by a **short proxy training** on a validation split. A good proxy
  score is no guarantee of accuracy in the field, and the test figure above comes from the same
  data source as the training data.
- **Test on data from the deployment**: the real camera, lighting, parts and operators, collected
  after this model was trained, before any decision rests on it.
- If this model is used for inspection or safety decisions, **follow the rules and qualified review
  that apply where it is deployed** (functional-safety, quality and product standards, and sign-off
  by people accountable for them). Plan for its failures: a rejected part should be re-checkable,
  and a missed defect should have another line of defence.
- Costs are computed for the network as exported in fp32 and at the stated precisions; quantising
  it changes its accuracy, which must be measured again.
"""


def _leaf_source(module: nn.Module) -> str:
    """Constructor code for one torch layer; torch's repr of these layers is valid Python."""
    if isinstance(module, nn.Sequential):
        return "nn.Sequential(" + ", ".join(_leaf_source(m) for m in module) + ")"
    return "nn." + repr(module)


def standalone_source(model: nn.Sequential, arch: Arch, class_names: tuple[str, ...]) -> str:
    """A Python file that rebuilds the network with torch alone and loads the weights."""
    layers = "\n".join(f"        ({name!r}, {_leaf_source(m)})," for name, m in model.named_children())
    return f'''"""Image classifier {arch.to_text()}

Written by searcher's export; needs only torch. Input: float32 tensor N x {' x '.join(map(str, arch.input_shape))}
(channels x height x width) with pixel values scaled to [0, 1]. Output: one score per class.

    model = load("model_state.pt")
    scores = model(images)             # N x {arch.head.classes}
    labels = scores.argmax(dim=1)
"""

from collections import OrderedDict

import torch
from torch import nn

ARCH = {arch.to_text()!r}
INPUT_SHAPE = {tuple(arch.input_shape)!r}
CLASS_NAMES = {list(class_names)!r}


def make_model() -> nn.Sequential:
    """The network with freshly initialised weights."""
    return nn.Sequential(OrderedDict([
{layers}
    ]))


def load(path: str = "model_state.pt") -> nn.Sequential:
    """The trained network in eval mode, weights read from a state_dict file."""
    model = make_model()
    model.load_state_dict(torch.load(path, weights_only=True))
    return model.eval()
'''


def model_card(outcome: Any, extra: dict) -> str:
    """Markdown: what the model is, how it was found, how well it did, what it costs, and cautions."""
    arch, config, budget = outcome.arch, extra["config"], extra["budget"]
    result = cost(arch, budget.activation_precision)
    names = list(config.class_names)
    width = max(len(n) for n in names)
    confusion = ["| true \\ predicted | " + " | ".join(names) + " |", "|" + "---|" * (len(names) + 1)]
    confusion += [f"| {names[i]} | " + " | ".join(str(v) for v in row) + " |" for i, row in enumerate(outcome.confusion)]
    per_class = "\n".join(f"| {name:<{width}} | {acc:.4f} |" for name, acc in outcome.per_class.items())
    caps = budget.caps()
    cost_rows = "\n".join(
        f"| {c} | {show_cost(c, outcome.costs[c])} ({outcome.costs[c]:,}) | "
        f"{show_cost(c, caps[c]) if c in caps else 'no cap'} |" for c in CAP_COLUMNS)
    sizes = extra["sizes"]
    low, high = wilson_interval(int(sum(row[i] for i, row in enumerate(outcome.confusion))),
                                int(sum(map(sum, outcome.confusion))))
    facts = extra.get("confirmed")
    confirmed = ("\nNot confirmed: its validation accuracy comes from one short proxy training." if not facts else
                 f"\nConfirmed before export: validation accuracy {facts['mean']:.4f} ± {facts['sd']:.4f} (mean ± sd) "
                 f"over {facts['seeds']} seeds of the full schedule on the training split.")
    return f"""# Model card: `{arch.to_text()}`

## What it is
An image classifier for {arch.head.classes} classes ({', '.join(names)}), input
{' x '.join(map(str, arch.input_shape))} (channels x height x width), pixel values in [0, 1].
{arch.depth} conv stage(s), {arch.conv_count} conv layer(s), {arch.activation} activations,
{'batch norm' if arch.batch_norm else 'no batch norm'}, head `{arch.head.features}` with hidden layers
{list(arch.head.hidden) or 'none'}.

## How it was found
Run `{extra['run']}` searched space `{config.space_name}` with Optuna (objective: {config.objective}),
rejecting every candidate over the budget by exact arithmetic before training and giving the rest a
short proxy training. This candidate was chosen as: {extra['how']}.
It was then retrained from scratch for {extra['epochs']} epochs on the training and validation
splits together ({extra['train_size']} images, {extra['train_seconds']:.0f} s on CPU).

## Data
Source: `{redact(config.data)}` (fingerprint `{config.data_fingerprint}`), split with seed {config.seed},
stratified by class: {sizes['train']} training, {sizes['val']} validation, {sizes['test']} test images.
The test split was not used by the search or by this training.

## Test accuracy (held-out split, {sizes['test']} images)
**{outcome.test_accuracy:.4f}** (95% interval {low:.4f}–{high:.4f}, Wilson's score interval at {sizes['test']} images)
{confirmed}

| class | accuracy |
|---|---|
{per_class}

Confusion matrix (rows: true class, columns: predicted class):

{chr(10).join(confusion)}

## Cost
| cost | value | cap |
|---|---|---|
{cost_rows}

Weights in fp32 {show_cost('weight_bytes', result.weight_bytes('fp32'))}, fp16
{show_cost('weight_bytes', result.weight_bytes('fp16'))}, int8 {show_cost('weight_bytes', result.weight_bytes('int8'))};
{result.buffers:,} batch-norm running statistics besides the {result.params:,} parameters. Activation memory is the
peak at batch 1 at {budget.activation_precision}. {'It meets every cap.' if outcome.fits else '**It breaks at least one cap.**'}

## Files
- `model_state.pt`: weights, `torch.load(path, weights_only=True)`
- `model.py`: the network in plain torch, with `load()`
- `model.torchscript.pt`: `torch.jit.load(path)`
- `arch.json`: the architecture; `metrics.json`: these figures

{CAUTIONS}"""
