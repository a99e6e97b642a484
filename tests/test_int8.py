"""The int8 model in its three forms (integer reference, ONNX, C) against outside references.

Outside sources, named beside each check:
* torch (the float model the quantizer folds and calibrates on);
* onnxruntime (reference ONNX runtime) and the ``onnx`` package's checker;
* gcc (-std=c99 -Wall -Wextra -Werror -pedantic) and binutils' ``size -A``;
* PyTorch's own post-training quantization (torch.ao.quantization, FX graph mode, per-channel
  weights): an independent implementation of the published scheme (Jacob et al., CVPR 2018);
* the UCI optical handwritten digits shipped with scikit-learn, and the built-in demo data.
"""

from __future__ import annotations

import dataclasses
import json
import random
from pathlib import Path

import numpy as np
import onnx
import pandas as pd
import pytest
import torch

from searcher.core.arch import ACTIVATIONS, Arch, parse_arch
from searcher.core.cost import cost
from searcher.errors import SearcherError
from searcher.model.build import build
from searcher.model.train import TrainSettings, evaluate, reset_weights
from searcher.int8 import reference as int8_reference
from searcher.ship import c_build, deploy_files, onnx_files
from searcher.ship.c_source import generate
from searcher.int8.check import int8_accuracy, quantized, state_arrays, unit_images
from searcher.ship.model_card import int8_section
from searcher.int8.quantize import QuantSettings, float_forward, fold, quantize, to_pixels

from conftest import SHIPPED_SPACES
from int8kit import DEMO_SHAPE, demo_data, digits_data, torch_ptq_accuracy, trained

SMALLEST = ("resolution", "first_width")  # decisions a compiled candidate takes at their first (smallest) option
IMAGES = 48  # held-out images per compiled candidate


def seeded_model(arch: Arch, seed: int) -> torch.nn.Module:
    """The built network with weights drawn from `seed`, and random batch-norm statistics and affine
    values so that folding is exercised (fresh ones are 0 and 1)."""
    model = build(arch)
    reset_weights(model, seed)
    generator = torch.Generator().manual_seed(seed)
    for module in model.modules():
        if isinstance(module, torch.nn.BatchNorm2d):
            n = module.num_features
            module.running_mean.copy_(torch.rand(n, generator=generator) - 0.5)
            module.running_var.copy_(torch.rand(n, generator=generator) + 0.5)
            module.weight.data.copy_(torch.rand(n, generator=generator) + 0.5)
            module.bias.data.copy_(torch.rand(n, generator=generator) * 0.4 - 0.2)
    return model.eval()


def small_candidate(space, activation: str, seed: int = 0) -> Arch:
    """A seeded draw from `space` at its fewest stages, convs and hidden layers, smallest input and
    first width (so it compiles and runs quickly); every other decision drawn; the given activation."""
    rng = random.Random(seed)

    def pick(decision, weights):
        options = decision.options
        return options[0] if decision.ordered or decision.name in SMALLEST else rng.choice(options)

    return dataclasses.replace(space.assemble(pick), activation=activation)


def images_for(arch: Arch, count: int) -> np.ndarray:
    """Demo images (held-out split) at the candidate's input size; uniform noise for colour inputs."""
    if arch.input_shape[0] != 1:
        return np.random.default_rng(0).integers(0, 256, (count, *arch.input_shape)).astype(np.float32) / 255
    return unit_images(demo_data(arch.input_shape).test.images[:count])


def random_net(arch: Arch, seed: int = 0):
    model = seeded_model(arch, seed)
    calibration = unit_images(demo_data(arch.input_shape).train.images[:16]) if arch.input_shape[0] == 1 else \
        np.random.default_rng(1).random((16, *arch.input_shape), dtype=np.float32)
    return model, quantize(arch, state_arrays(model), calibration)


EXAMPLES = [  # every activation, both paddings, strides, both pools, both heads, colour input
    "1x16x16_c8k3-m2_c16k5-a2_flat-d32-o8_hardswish_bn",
    "1x12x12_c4k5v-a2_gap-d8-o3_tanh",
    "3x10x10_c6k3s2-m3s2_flat-o4_sigmoid",
    "1x8x8_c4k3_gap-o2_relu6_bn",
    "1x9x9_c4k3-a3s2_c6k3v-m2_gap-d5-r0.2-o3_relu",
]


@pytest.mark.parametrize("text", EXAMPLES)
def test_folded_float_pass_equals_torch(text):
    # torch: the network with batch norm as separate layers, in eval mode
    arch = parse_arch(text)
    model = seeded_model(arch, 3)
    x = torch.rand(16, *arch.input_shape, generator=torch.Generator().manual_seed(0))
    *_, (_, _, ours) = float_forward(fold(arch, state_arrays(model)), x.numpy())
    with torch.inference_mode():
        assert np.allclose(ours, model(x).numpy(), atol=1e-5)


@pytest.mark.parametrize("text", EXAMPLES)
def test_fast_engine_gives_the_reference_integers(text):
    arch = parse_arch(text)
    _, net = random_net(arch)
    pixels = to_pixels(images_for(arch, 64))
    assert np.array_equal(int8_reference.scores(net, pixels, fast=True), int8_reference.scores(net, pixels))


@pytest.mark.parametrize("text", EXAMPLES)
def test_dequantized_scores_follow_the_float_model(text):
    # torch: int8 scores, read back on their grid, stay within 5% of the score range of the float scores
    arch = parse_arch(text)
    model, net = random_net(arch)
    images = images_for(arch, 64)
    pixels = to_pixels(images)
    with torch.inference_mode():
        expected = model(torch.from_numpy(pixels.astype(np.float32) / 255)).numpy()
    got = net.output.real(int8_reference.scores(net, pixels))
    assert np.abs(got - expected).max() <= 0.05 * 255 * net.output.scale


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_c_source_sizes_equal_the_analytic_costs(shipped, name):
    # searcher.core.cost's int8 figures against what the generated file declares (the compiled object: below)
    for seed in range(6):
        arch = small_candidate(shipped[name], ACTIVATIONS[seed % len(ACTIVATIONS)], seed)
        _, net = random_net(arch)
        code = generate(net)
        analytic = cost(arch, "int8")
        assert code.arena_bytes == analytic.peak_activation_bytes
        assert code.constant_bytes == analytic.weight_bytes("int8") + 256 * len(code.tables)
        activated = [layer for layer in net.layers if layer.weights is not None and layer.name != "out"]
        assert len(code.tables) == (len(activated) if arch.activation in ("hardswish", "tanh", "sigmoid") else 0)


def compile_and_run(net, arch: Arch, folder: Path, pixels: np.ndarray):
    found = c_build.tools()
    if found is None:
        pytest.skip("gcc and binutils' size are needed (Debian: apt-get install gcc binutils)")
    code = generate(net)
    obj = c_build.compile_model(code, found, folder)  # gcc -std=c99 -Wall -Wextra -Werror -pedantic -O2
    scores, classes, _ = c_build.run(c_build.build_runner(found, obj), pixels, net.classes)
    return code, c_build.footprint(code, found, obj), scores, classes


def check_c_build(arch: Arch, folder: Path) -> None:
    _, net = random_net(arch)
    pixels = to_pixels(images_for(arch, IMAGES))
    code, built, scores, classes = compile_and_run(net, arch, folder, pixels)
    expected = int8_reference.scores(net, pixels)
    # gcc: the compiled C gives exactly the reference's int8 scores and class on every image
    assert np.array_equal(scores, expected)
    assert np.array_equal(classes, expected.argmax(axis=1))
    # size -A: RAM is the arena, the analytic peak; constant data the analytic int8 weights plus tables
    analytic = cost(arch, "int8")
    assert built.arena == analytic.peak_activation_bytes
    assert built.constant_bytes == analytic.weight_bytes("int8") + 256 * len(code.tables)
    assert set(built.constants) == {name for name, _ in code.arrays}
    assert not any(k.startswith((".data", ".bss")) for k in built.other_data)  # nothing else writable


def test_c_build_equals_the_reference_on_one_candidate(shipped, tmp_path):
    check_c_build(small_candidate(shipped["mcu"], "hardswish"), tmp_path)


@pytest.mark.slow
@pytest.mark.parametrize("activation", ACTIVATIONS)
@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_c_build_equals_the_reference_for_every_space_and_activation(shipped, name, activation, tmp_path):
    check_c_build(small_candidate(shipped[name], activation, seed=1), tmp_path)


@pytest.mark.slow
@pytest.mark.parametrize("text", EXAMPLES)
def test_c_build_equals_the_reference_on_the_examples(text, tmp_path):
    check_c_build(parse_arch(text), tmp_path)


@pytest.mark.parametrize("text", EXAMPLES[:3])
def test_onnx_files_pass_the_checker_and_match_torch_and_the_reference(text, tmp_path):
    arch = parse_arch(text)
    model, net = random_net(arch)
    onnx_files.write_fp32(model, arch, tmp_path / "model.onnx")
    onnx.checker.check_model(onnx.load(str(tmp_path / "model.onnx")), full_check=True)  # onnx checker
    x = torch.rand(32, *arch.input_shape, generator=torch.Generator().manual_seed(5))
    with torch.inference_mode():
        expected = model(x).numpy()
    # onnxruntime: model.onnx equals the torch model within 1e-4 on random inputs
    assert np.abs(onnx_files.run(onnx_files.session(tmp_path / "model.onnx"), x.numpy()) - expected).max() <= 1e-4
    int8 = onnx_files.int8_model(net)
    onnx.checker.check_model(int8, full_check=True)  # onnx checker
    ops = {node.op_type for node in int8.graph.node}
    assert {"QuantizeLinear", "DequantizeLinear"} <= ops
    pixels = to_pixels(images_for(arch, 64))
    got = onnx_files.run(onnx_files.session(int8, fused=False), pixels.astype(np.float32) / 255)
    # onnxruntime, the file as written: top-1 of model_int8.onnx agrees with the integer reference
    assert np.mean(got.argmax(1) == int8_reference.classify(net, pixels)) >= 0.99


def test_quant_settings_refuse_bad_values():
    with pytest.raises(SearcherError, match="`calibration` must be one of 'minmax', 'percentile'"):
        QuantSettings(calibration="minmx")
    with pytest.raises(SearcherError, match="`percentile` must be in"):
        QuantSettings(percentile=20)
    with pytest.raises(SearcherError, match="`images` must be an int"):
        QuantSettings(images=0)


def test_weights_that_do_not_fit_the_architecture_are_refused():
    arch = parse_arch("1x8x8_c4k3_gap-o2_relu")
    state = state_arrays(build(parse_arch("1x8x8_c5k3_gap-o2_relu")))
    with pytest.raises(SearcherError, match="s1_conv1.weight"):
        quantize(arch, state, np.zeros((2, 1, 8, 8), np.float32))


def test_without_gcc_the_c_files_are_written_and_the_check_skipped(monkeypatch, tmp_path):
    arch = parse_arch(EXAMPLES[3])
    model = seeded_model(arch, 0)
    monkeypatch.setattr(c_build, "tools", lambda: None)
    images = torch.rand(20, *arch.input_shape, generator=torch.Generator().manual_seed(0))
    report = deploy_files.write_deploy_files(tmp_path, model, arch, images, images, torch.zeros(20, dtype=torch.int64),
                                             ("a", "b"))
    assert (tmp_path / "model_int8.c").exists() and (tmp_path / "model_int8.h").exists()
    assert report.latency_c_ms is None and report.footprint is None
    assert report.c_check.startswith("C compile check and C latency skipped")
    metrics = json.loads(json.dumps(report.metrics()))
    assert metrics["latency_c_int8_ms"] is None and metrics["int8"]["c_check"] == report.c_check
    assert report.c_check in int8_section(report, arch)  # the card says so too


NASTY_NAMES = (  # user-named strings that could change the meaning of C if pasted in unescaped
    'quote " and */ end of comment', "back\\slash and ??/ trigraph ??= ??( ??' ??!", "new\nline\r\ttab",
    "/* opens a comment", "\\u0041 universal name", "nul \x00 byte and é ünïcode", "\"", "", "%s %d %n",
)


def test_class_names_stay_data_in_the_c_header(tmp_path):
    """gcc -std=c99 (trigraphs on): a program built against the header prints back each class name's UTF-8
    bytes exactly, and the model still compiles under the strict warnings."""
    found = c_build.tools()
    if found is None:
        pytest.skip("gcc and binutils' size are not installed")
    _, net = random_net(parse_arch(EXAMPLES[3]))
    names = NASTY_NAMES
    code = generate(net, names)
    c_build.compile_model(code, found, tmp_path)
    (tmp_path / "names.c").write_text(
        '#include <stdio.h>\n#include <string.h>\n#include "model_int8.h"\n'
        "static const char *const names[] = MODEL_CLASS_NAMES;\n"
        "int main(void) { size_t i, j; for (i = 0; i < sizeof names / sizeof *names; ++i) {\n"
        "  for (j = 0; j < strlen(names[i]); ++j) printf(\"%02x\", (unsigned char)names[i][j]);\n"
        "  printf(\"\\n\"); } return 0; }\n", encoding="utf-8")
    c_build._run([found.gcc, *c_build.WARNINGS, "-trigraphs", "names.c", "-o", "names"], tmp_path)
    printed = c_build._run([str(tmp_path / "names")], tmp_path).splitlines()
    # C's strings stop at a NUL byte, so a name holding one reads back up to it
    assert printed == [n.encode("utf-8").split(b"\0")[0].hex() for n in names]


# -- trained candidates: accuracy against an independent PTQ, and onnxruntime on held-out images ---

TRAINED = {  # data set -> (architecture, proxy-training settings)
    "digits": ("1x8x8_c16k3-m2_c32k3_flat-o10_relu_bn", TrainSettings(epochs=8, learning_rate=0.005)),
    "demo": ("1x32x32_c8k3-m2_c16k3-m2_flat-d32-o8_relu_bn", TrainSettings()),
}


@pytest.fixture(scope="module", params=sorted(TRAINED))
def trained_case(request):
    pytest.importorskip("sklearn.datasets")
    text, settings = TRAINED[request.param]
    data = digits_data() if request.param == "digits" else demo_data(DEMO_SHAPE)
    arch = parse_arch(text)
    model, _ = trained(arch, data, settings)
    return request.param, arch, model, data


@pytest.mark.slow
def test_int8_accuracy_within_one_point_of_pytorch_ptq(trained_case):
    name, arch, model, data = trained_case
    ours = int8_accuracy(model, arch, data.train.images, data.test.images, data.test.labels)
    theirs = torch_ptq_accuracy(model, data.train.images[:256], data.test.images, data.test.labels)
    fp32, _ = evaluate(model, data.test.images, data.test.labels)
    # PyTorch FX PTQ (per-channel weights) on the UCI digits (scikit-learn) and on the demo: within 1 point
    assert abs(ours - theirs) <= 0.01, (name, ours, theirs, fp32)


@pytest.mark.slow
def test_search_check_fast_and_reference_agree_on_validation(trained_case):
    _, arch, model, data = trained_case
    args = (model, arch, data.train.images, data.val.images, data.val.labels)
    assert int8_accuracy(*args, fast=True) == int8_accuracy(*args, fast=False)


@pytest.mark.slow
def test_int8_onnx_agrees_with_the_reference_on_held_out_images(trained_case):
    _, arch, model, data = trained_case
    net = quantized(model, arch, data.train.images)
    pixels = to_pixels(unit_images(data.test.images))
    got = onnx_files.run(onnx_files.session(onnx_files.int8_model(net), fused=False), pixels.astype(np.float32) / 255)
    # onnxruntime, the file as written: top-1 agrees with the integer reference on ≥ 99% of held-out images.
    # (onnxruntime's default fused int8 kernels saturate 16-bit pair sums on x86 without VNNI: see onnx_files)
    assert np.mean(got.argmax(1) == int8_reference.classify(net, pixels)) >= 0.99


def test_sums_beyond_32_bits_are_accumulated_in_64(tmp_path):
    # 67,600 inputs of 255 times weights of 127 sum to 2.19e9 > 2^31 - 1: the C file must switch to int64_t
    arch = parse_arch("1x260x260_flat-o2_relu")
    state = {"out.weight": np.stack([np.ones(260 * 260), -np.ones(260 * 260)]), "out.bias": np.zeros(2)}
    rng = np.random.default_rng(0)
    images = np.concatenate([np.ones((1, *arch.input_shape)), np.zeros((1, *arch.input_shape)),
                             rng.random((4, *arch.input_shape))]).astype(np.float32)
    net = quantize(arch, state, images)
    assert net.wide and "typedef int64_t acc_t;" in generate(net).source
    pixels = to_pixels(images)
    expected = int8_reference.scores(net, pixels)
    assert np.array_equal(int8_reference.scores(net, pixels, fast=True), expected)
    _, _, scores, _ = compile_and_run(net, arch, tmp_path, pixels)  # gcc
    assert np.array_equal(scores, expected)
    assert expected[0, 0] == 127 and expected[0, 1] == -128  # the extremes land on the grid's ends


def test_search_records_int8_accuracy_when_weights_are_int8(tmp_path):
    """With int8 weights in the budget every fully trained candidate gets its int8 validation accuracy
    (trials.csv's val_accuracy_int8, the report's front tables); with fp32 weights none does."""
    from searchkit import search_here, write_space

    space = write_space(tmp_path)
    int8 = search_here(tmp_path, space, "int8", trials=2, budget={"weight_precision": "int8"})
    fp32 = search_here(tmp_path, space, "fp32", trials=2)
    table = pd.read_csv(int8.folder / "trials.csv")
    trained = table[table["state"] == "trained"]
    assert len(trained) >= 1 and trained["val_accuracy_int8"].between(0, 1).all()
    # an int8 model of a trained network scores close to it (common practice: within a few points)
    assert (trained["val_accuracy_int8"] - trained["val_accuracy"]).abs().max() < 0.15
    # what the check cost is kept beside the training time; an fp32 budget costs nothing
    assert (trained["int8_seconds"] > 0).all()
    assert pd.read_csv(fp32.folder / "trials.csv")["val_accuracy_int8"].isna().all()
    assert (pd.read_csv(fp32.folder / "trials.csv")["int8_seconds"] == 0).all()
    assert "int8 accuracy" in (int8.folder / "report.html").read_text()
