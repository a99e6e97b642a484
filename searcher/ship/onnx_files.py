"""The two ONNX files: ``model.onnx`` (fp32, from torch) and ``model_int8.onnx`` (our own grids).

Both take float32 N×C×H×W images in [0, 1], like the torch model, and give one score per class.

``model.onnx`` is written by ``torch.onnx.export(..., dynamo=False)``: torch's TorchScript-based
exporter, which needs only the ``onnx`` package (the newer default exporter also needs
``onnxscript``, one more dependency for the same plain conv nets). It warns that it is deprecated;
when it goes, the ``dynamo=True`` path takes its place here.

``model_int8.onnx`` is built node by node from an :class:`~searcher.int8.quantize.IntegerNet` in
the QuantizeLinear/DequantizeLinear form: every tensor passes through QuantizeLinear and
DequantizeLinear with the scale and zero point the integer reference uses; weights are stored as
int8 with a scale per output channel, biases as int32. Computed as written (float between the
grids) it rounds where the integer reference rounds, so the top-1 class agrees on nearly every
image (the tests ask ≥ 99%). onnxruntime's default optimizations go further and fuse each
Quantize/Dequantize pattern into its own integer kernels; on x86 CPUs without VNNI those multiply
uint8 by int8 in pairs summed in 16 bits, which saturate with full-range int8 weights (measured
here: the differences vanish when the weights are cut to 7 bits; OpenVINO's documentation, "Saturation
(overflow) Issue Workaround", describes the same property of these instructions). On the demo that
cost several points of accuracy. ``session(fused=False)`` runs the file as written; export reports
the agreement both ways and the card tells users how to run it as written.
"""

from __future__ import annotations

import statistics
import time
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import onnx
import onnxruntime
from onnx import TensorProto, helper, numpy_helper

from searcher.core.arch import Arch
from searcher.int8.quantize import Grid, IntegerNet, IntLayer

OPSET = 17  # per-axis QuantizeLinear/DequantizeLinear need 13; HardSwish 14
INPUT, OUTPUT = "images", "scores"  # tensor names in both files


def write_fp32(model: Any, arch: Arch, path: Path) -> None:
    """Export the torch model (in eval mode) to ONNX with a free batch size, and check the file."""
    import torch

    example = torch.zeros(1, *arch.input_shape)
    with warnings.catch_warnings():  # the TorchScript-based exporter is deprecated in torch 2.13 (see module notes)
        warnings.simplefilter("ignore")
        torch.onnx.export(model.eval(), (example,), str(path), dynamo=False, opset_version=OPSET,
                          input_names=[INPUT], output_names=[OUTPUT],
                          dynamic_axes={INPUT: {0: "batch"}, OUTPUT: {0: "batch"}})
    onnx.checker.check_model(onnx.load(str(path)), full_check=True)


class _Graph:
    """Nodes and initializers, with the Quantize/Dequantize pair written once."""

    def __init__(self) -> None:
        self.nodes: list[onnx.NodeProto] = []
        self.constants: list[onnx.TensorProto] = []

    def constant(self, name: str, value: np.ndarray) -> str:
        self.constants.append(numpy_helper.from_array(np.asarray(value), name))
        return name

    def node(self, op: str, inputs: list[str], output: str, **attributes: Any) -> str:
        self.nodes.append(helper.make_node(op, inputs, [output], name=output, **attributes))
        return output

    def snap(self, x: str, grid: Grid, name: str) -> str:
        """Round x to an int8 grid and back: QuantizeLinear then DequantizeLinear."""
        scale = self.constant(f"{name}.scale", np.float32(grid.scale))
        zero = self.constant(f"{name}.zero", np.int8(grid.zero))
        q = self.node("QuantizeLinear", [x, scale, zero], f"{name}.q")
        return self.node("DequantizeLinear", [q, scale, zero], f"{name}.dq")

    def per_channel(self, name: str, values: np.ndarray, scale: np.ndarray) -> str:
        """An integer tensor dequantized with one scale per output channel (axis 0), zero point 0."""
        q = self.constant(f"{name}_q", values)
        s = self.constant(f"{name}_scale", scale.astype(np.float32))
        z = self.constant(f"{name}_zero", np.zeros(len(values), values.dtype))
        return self.node("DequantizeLinear", [q, s, z], name, axis=0)


def _affine(g: _Graph, layer: IntLayer, x: str, flat: bool) -> str:
    weight = g.per_channel(f"{layer.name}.weight", layer.weights, layer.weight_scale)
    bias = g.per_channel(f"{layer.name}.bias", layer.bias, layer.source.scale * layer.weight_scale)
    if layer.kind == "conv":
        k, p = layer.weights.shape[-1], layer.padding
        y = g.node("Conv", [x, weight, bias], f"{layer.name}.conv", kernel_shape=[k, k], pads=[p, p, p, p],
                   strides=[layer.stride, layer.stride])
    else:
        x = x if flat else g.node("Flatten", [x], f"{layer.name}.flatten", axis=1)
        y = g.node("Gemm", [x, weight, bias], f"{layer.name}.gemm", transB=1)
    if layer.activation == "relu":
        y = g.node("Relu", [y], f"{layer.name}.relu")
    elif layer.activation == "relu6":
        low, high = g.constant(f"{layer.name}.low", np.float32(0)), g.constant(f"{layer.name}.high", np.float32(6))
        y = g.node("Clip", [y, low, high], f"{layer.name}.relu6")
    elif layer.activation is not None:
        y = g.snap(y, layer.pre, f"{layer.name}.pre")
        op = {"hardswish": "HardSwish", "tanh": "Tanh", "sigmoid": "Sigmoid"}[layer.activation]
        y = g.node(op, [y], f"{layer.name}.{layer.activation}")
    return g.snap(y, layer.target, f"{layer.name}.out")


def int8_model(net: IntegerNet) -> onnx.ModelProto:
    """The quantized network as an ONNX model with QuantizeLinear/DequantizeLinear on our grids; checked."""
    g = _Graph()
    c, h, w = net.input_shape
    x = g.snap(INPUT, net.layers[0].source, "input")
    flat = False  # is x already N×features?
    for layer in net.layers:
        if layer.weights is not None:
            x = _affine(g, layer, x, flat)
            flat = flat or layer.kind == "dense"
        elif layer.kind == "maxpool":  # a maximum of grid values is on the grid
            x = g.node("MaxPool", [x], f"{layer.name}.max", kernel_shape=[layer.window] * 2, strides=[layer.stride] * 2)
        elif layer.kind == "avgpool":
            x = g.node("AveragePool", [x], f"{layer.name}.avg", kernel_shape=[layer.window] * 2,
                       strides=[layer.stride] * 2)
            x = g.snap(x, layer.target, f"{layer.name}.out")
        else:  # gap
            x = g.node("Flatten", [g.node("GlobalAveragePool", [x], f"{layer.name}.avg")], f"{layer.name}.flatten", axis=1)
            x = g.snap(x, layer.target, f"{layer.name}.out")
            flat = True
    g.nodes.append(helper.make_node("Identity", [x], [OUTPUT], name=OUTPUT))
    graph = helper.make_graph(
        g.nodes, "searcher_int8",
        [helper.make_tensor_value_info(INPUT, TensorProto.FLOAT, ["batch", c, h, w])],
        [helper.make_tensor_value_info(OUTPUT, TensorProto.FLOAT, ["batch", net.classes])], g.constants)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="searcher",
                              doc_string=f"{net.arch}, int8 grids of searcher's integer reference")
    model.ir_version = 8  # onnxruntime releases of the last years all read IR 8
    onnx.checker.check_model(model, full_check=True)
    return model


def session(model: str | Path | onnx.ModelProto, threads: int = 1, fused: bool = True) -> onnxruntime.InferenceSession:
    """An onnxruntime CPU session; one thread by default, for steady timings.

    ``fused=False`` keeps onnxruntime to its basic graph optimizations, which leave quantized
    patterns as written instead of replacing them by integer kernels (see the module notes).
    """
    options = onnxruntime.SessionOptions()
    if not fused:
        options.graph_optimization_level = onnxruntime.GraphOptimizationLevel.ORT_ENABLE_BASIC
    options.intra_op_num_threads = threads
    options.inter_op_num_threads = 1
    data = model.SerializeToString() if isinstance(model, onnx.ModelProto) else str(model)
    return onnxruntime.InferenceSession(data, options, providers=["CPUExecutionProvider"])


def run(sess: onnxruntime.InferenceSession, images: np.ndarray, batch: int = 256) -> np.ndarray:
    """Scores for float32 images N×C×H×W."""
    images = np.asarray(images, np.float32)
    return np.concatenate([sess.run([OUTPUT], {INPUT: images[i:i + batch]})[0] for i in range(0, len(images), batch)])


def median_latency(sess: onnxruntime.InferenceSession, images: np.ndarray, repeats: int = 3) -> float:
    """Median seconds of one batch-1 run, over `repeats` passes of every image given."""
    images = np.asarray(images, np.float32)
    sess.run([OUTPUT], {INPUT: images[:1]})  # first-run set-up is not latency
    times = []
    for _ in range(repeats):
        for image in images:
            start = time.perf_counter()
            sess.run([OUTPUT], {INPUT: image[None]})
            times.append(time.perf_counter() - start)
    return statistics.median(times)
