"""Texts that ship with an exported model: the standalone module source and the model card."""

from __future__ import annotations

import unicodedata
from typing import Any

from torch import nn

from searcher.core.arch import Arch
from searcher.core.budget import LATENCY, show_cost
from searcher.core.latency import Target, predict
from searcher.core.cost import cost
from searcher.core.stats import wilson_interval
from searcher.redact import redact
from searcher.ship.onnx_files import OPSET

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
- The int8 accuracy is that of the integer reference on the held-out split; `model_int8.c` gives the
  reference's scores exactly on those images where export could compile it. A different compiler,
  target or calibration set is a different build: check it on your own images.
"""


def md_text(text: str) -> str:
    """``text`` as Markdown that shows it as it is: every ASCII punctuation mark backslash-escaped (so no name
    can start a link, code, a table cell or HTML), line breaks and other control characters shown as
    escapes (so none can end a table row).

    >>> print(md_text("a|b<i>" + chr(10)))
    a\\|b\\<i\\>\\n
    """
    out = []
    for char in text:
        if unicodedata.category(char)[0] == "C" or char in "\u2028\u2029":  # control, format, line separators
            out.append("\\" + repr(char)[1:-1].lstrip("\\"))
        elif char.isascii() and not char.isalnum() and char != " ":
            out.append("\\" + char)
        else:
            out.append(char)
    return "".join(out)


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
    names = [md_text(n) for n in config.class_names]  # names are data: escaped wherever they appear
    width = max(len(n) for n in names)
    confusion = ["| true \\ predicted | " + " | ".join(names) + " |", "|" + "---|" * (len(names) + 1)]
    confusion += [f"| {names[i]} | " + " | ".join(str(v) for v in row) + " |" for i, row in enumerate(outcome.confusion)]
    per_class = "\n".join(f"| {name:<{width}} | {acc:.4f} |" for name, acc in zip(names, outcome.per_class.values()))
    caps = budget.caps()
    cost_rows = "\n".join(
        f"| {c} | {show_cost(c, outcome.costs[c])} "
        + (f"(predicted on {budget.target.text()}, int8 C file) | " if c == LATENCY else f"({outcome.costs[c]:,}) | ")
        + f"{show_cost(c, caps[c]) if c in caps else 'no cap'} |" for c in budget.columns)
    sizes = extra["sizes"]
    low, high = wilson_interval(int(sum(row[i] for i, row in enumerate(outcome.confusion))),
                                int(sum(map(sum, outcome.confusion))))
    facts = extra.get("confirmed")
    confirmed = ("\nNot confirmed: its validation accuracy comes from one short proxy training." if not facts else
                 f"\nConfirmed before export: validation {facts['metric'].replace('_', ' ')} {facts['mean']:.4f} ± "
                 f"{facts['sd']:.4f} (mean ± sd) "
                 f"over {facts['seeds']} seeds of the full schedule on the training split.")
    if extra.get("noise"):
        confirmed += f" Among the confirmed candidates, {extra['noise']}."
    test_score = outcome.test_balanced_accuracy if facts and facts["metric"] == "balanced_accuracy" else outcome.test_accuracy
    optimism = (f"\nQuote the test figure, not a validation one: this candidate was chosen as the best of "
                f"{extra.get('candidates', 'many'):,} validation scores, and the best of many scores on one set of "
                f"images leans high (the images it happened to get right helped it win)"
                + (f"; here validation {facts['mean']:.4f} against test {test_score:.4f}." if facts else ".")
                if isinstance(extra.get("candidates"), int) and extra["candidates"] > 1 else "")
    return f"""# Model card: `{arch.to_text()}`

## What it is
An image classifier for {arch.head.classes} classes ({', '.join(names)}), input
{' x '.join(map(str, arch.input_shape))} (channels x height x width), pixel values in [0, 1].
{arch.depth} conv stage(s), {arch.conv_count} conv layer(s), {arch.activation} activations,
{'batch norm' if arch.batch_norm else 'no batch norm'}, head `{arch.head.features}` with hidden layers
{list(arch.head.hidden) or 'none'}.

## How it was found
Run `{extra['run']}` searched space {md_text(config.space_name)} with Optuna (objective: {config.objective}),
rejecting every candidate over the budget by exact arithmetic before training and giving the rest a
short proxy training. This candidate was chosen as: {extra['how']}.
It was then retrained from scratch for {extra['epochs']} epochs on the training and validation
splits together ({extra['train_size']} images, {extra['train_seconds']:.0f} s on CPU).

## Data
Source: {md_text(redact(config.data))} (fingerprint `{config.data_fingerprint}`), split with seed {config.seed},
stratified by class: {sizes['train']} training, {sizes['val']} validation, {sizes['test']} test images.
The test split was not used by the search or by this training.

## Test accuracy (held-out split, {sizes['test']} images)
| score | fp32 (torch) | int8 (integer reference) |
|---|---|---|
| accuracy | **{outcome.test_accuracy:.4f}** | **{outcome.test_accuracy_int8:.4f}** |
| balanced accuracy (mean recall per class) | **{outcome.test_balanced_accuracy:.4f}** | **{outcome.test_balanced_accuracy_int8:.4f}** |

fp32: 95% interval {low:.4f}–{high:.4f} (Wilson's score interval at {sizes['test']} images).
{confirmed}
{optimism}

Per class, fp32:

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

{int8_section(outcome.deploy, arch, budget.target)}
## Files
- `model_state.pt`: weights, `torch.load(path, weights_only=True)`
- `model.py`: the network in plain torch, with `load()`
- `model.pt2`: torch.export's program, `torch.export.load(path).module()`
- `model.onnx`: fp32 ONNX (opset {OPSET}), input `images` float32 N x {' x '.join(map(str, arch.input_shape))} in [0, 1], output `scores`
- `model_int8.onnx`: the int8 model as QuantizeLinear/DequantizeLinear on the integer reference's grids, same input and output
- `model_int8.c`, `model_int8.h`: the int8 model in C99
- `arch.json`: the architecture; `metrics.json`: these figures

{CAUTIONS}"""


def int8_section(report: Any, arch: Arch, target: Target | None = None) -> str:
    """The int8 build: how it was checked, its RAM and flash against the analytic figures, how to use it."""
    code, net, built = report.code, report.net, report.footprint
    tables = ", ".join(f"`{name}`" for name, _ in code.tables) or "none"
    table_bytes = sum(size for _, size in code.tables)
    if built is None:
        measured = f"{report.c_check}."
    else:
        other = ", ".join(f"`{k}` {v} B" for k, v in built.other_data.items()) or "none"
        measured = f"""{report.c_check}. `size -A` on the object (gcc -O2 -fdata-sections, x86-64; code size
differs on the target):

| | bytes | analytic (`searcher cost`) |
|---|---|---|
| RAM: activation arena (`.bss`) | {built.arena:,} | peak activation at int8: {report.analytic_peak_bytes:,} |
| RAM: stack, at most | {built.stack:,} | (gcc -fcallgraph-info: the deepest chain of frames) |
| flash: constant data (`.rodata` of the model's arrays) | {built.constant_bytes:,} | int8 weights {report.analytic_weight_bytes:,} + tables {table_bytes:,} |
| flash: code (`.text`) | {built.code:,} | |
| other data sections | {other} | |

Median batch-1 latency on this machine: C build {report.latency_c_ms:.3f} ms (gcc -O2, one call at a
time), fp32 `model.onnx` in onnxruntime {report.latency_onnxruntime_fp32_ms:.3f} ms (one thread)."""

    return f"""## int8 build
Post-training quantization (Jacob et al., CVPR 2018; per-channel weights as in Krishnamoorthi, 2018):
batch norm folded into the convs, int8 weights with a scale per output channel, int8 activations on
one grid per tensor ({net.settings.calibration} ranges over {net.settings.images} training images), int32 biases,
fixed-point requantization, {arch.activation} as {'a 256-entry table' if code.tables else 'a clamp'}. The integer reference
(`searcher.int8.reference`) is the golden model: `model_int8.onnx` agrees with its top-1 on
{report.onnx_int8_top1_agreement:.2%} of the held-out images in onnxruntime run as written;
`model.onnx` is within {report.onnx_fp32_max_difference:.1e} of the torch scores.

With its default options onnxruntime replaces the quantized patterns by its own int8 kernels, which
on x86 CPUs without VNNI add uint8 x int8 products in 16-bit pairs that saturate with full-range
weights (a known property of those instructions); on this machine, with those kernels, the top-1
agreed on {report.onnx_int8_fused_agreement:.2%} of the held-out images. To run the file as written:

```python
options = onnxruntime.SessionOptions()
options.graph_optimization_level = onnxruntime.GraphOptimizationLevel.ORT_ENABLE_BASIC
session = onnxruntime.InferenceSession("model_int8.onnx", options)
scores = session.run(["scores"], {{"images": images}})[0]  # float32 N x {' x '.join(map(str, arch.input_shape))}, values in [0, 1]
```

The C file holds {code.constant_bytes:,} bytes of constant data (int8 weights; per output channel an int32
bias and an int32 multiplier; activation tables: {tables}) and one static arena of {code.arena_bytes:,} bytes:
exactly the analytic int8 weight bytes plus the tables, and exactly the analytic peak activation bytes.
{measured}

{arm_section(report, arch, target)}

Build it with any C99 compiler, with the rest of your firmware or alone:

```sh
gcc -std=c99 -O2 -Wall -Wextra -c model_int8.c   # for a microcontroller: its cross-compiler and -Os
```

Use it (pixels 0-255, channels x height x width, {code.arena_bytes:,} bytes of RAM in the static arena):

```c
#include "model_int8.h"

static uint8_t frame[MODEL_INPUT_BYTES];   /* filled by the camera */
int8_t scores[MODEL_CLASSES];
int label = model_classify(frame, scores); /* 0..MODEL_CLASSES-1; scores may be NULL */
/* confidence as a real number: MODEL_SCORE_SCALE * (scores[label] - MODEL_SCORE_ZERO) */
```
"""


def arm_section(report: Any, arch: Arch, target: Target | None = None) -> str:
    """The emulated Cortex-M runs: sizes of the ARM object, and instructions per inference in total and per layer,
    emulated beside predicted (searcher.core.latency); with a target, the time on it."""
    if not report.arm:
        return f"### On Cortex-M cores\n{report.arm_check}."
    macs = max(1, cost(arch).macs)
    predicted = {r.core.name: predict(arch, Target(r.core.name, 1.0)) for r in report.arm}
    seen = ["n/a" if r.stack_used is None else f"{r.stack_used:,}" for r in report.arm]
    rows = "\n".join(
        f"| {r.core.name} ({r.core.board}) | {r.footprint.code:,} | {r.footprint.constant_bytes:,} | {r.footprint.arena:,} "
        f"| {r.footprint.stack:,} ({used}) | {r.instructions:,} | {predicted[r.core.name].instructions:,.0f} "
        f"| {r.instructions / macs:.2f} |" for r, used in zip(report.arm, seen))
    calls = sorted({name for r in report.arm for name in r.footprint.library})
    library = (f", plus the frames of the C library's {', '.join(calls)}, which the compiler calls for a loop"
               if calls else "")
    names = [name for name, _ in report.arm[0].layers]
    cells = {r.core.name: (dict(r.layers), dict(predicted[r.core.name].rows)) for r in report.arm}
    per_layer = "\n".join(f"| {name} | " + " | ".join(f"{ran.get(name, 0):,} / {model.get(name, 0):,.0f}"
                                                      for ran, model in cells.values()) + " |" for name in names)
    timed = ""
    run = next((r for r in report.arm if target is not None and r.core.name == target.core), None)
    if run is not None:
        emulated, model = (show_cost(LATENCY, target.seconds(n) * 1e3)
                           for n in (run.instructions, predicted[run.core.name].instructions))
        timed = (f"\nOn the target, {target.text()}: {emulated} per inference from the emulated count, {model} "
                 f"predicted, at {target.cycles_per_instruction:g} cycle per instruction (a lower bound: see below).\n")
    return f"""### On Cortex-M cores (emulated)
{report.arm_check}. Per core, `arm-none-eabi-size -A` of `model_int8.o` (`-O2 -mthumb`, bytes) and the
instructions of one inference, emulated (mean over the images) and predicted by searcher's latency model
(`searcher.core.latency`, fitted on emulated counts, no emulator needed); {macs:,} MACs:

| core (QEMU board) | code `.text` | constant data `.rodata` | arena `.bss` | stack at most (seen) | instructions emulated | predicted | per MAC |
|---|---|---|---|---|---|---|---|
{rows}
{timed}
`.rodata` and `.bss` equal the analytic figures above. The stack bound is the deepest chain of frames in
gcc's call graph{library}; "seen" is what the run overwrote. QEMU counts instructions (`-icount shift=0`, turned
from SysTick ticks by a counted loop timed in the same run), not cycles: on silicon, flash wait states,
the bus and caches add to them.

Instructions per layer, emulated / predicted ("input" copies the image in, "output" picks the class):

| layer | {' | '.join(r.core.name for r in report.arm)} |
|---|{'---|' * len(report.arm)}
{per_layer}
"""
