"""Analytic cost: shape inference against torch, published reference networks, the layer table."""

from __future__ import annotations

from dataclasses import fields

import pytest
import torch
import torch.nn.functional as F
from hypothesis import given, settings
from hypothesis import strategies as st

from searcher.core.arch import Conv, Head, Stage, parse_arch
from searcher.core.cost import cost
from searcher.errors import SearcherError

# VGG-16, configuration D: 13 3x3 'same' convs in five blocks, each block closed by 2x2 max
# pooling, then dense 4096-4096-1000 (Simonyan & Zisserman, "Very Deep Convolutional Networks for
# Large-Scale Image Recognition", ICLR 2015, Table 1 column D; Table 2 gives 138M parameters).
VGG16 = ("3x224x224_c64k3-c64k3-m2_c128k3-c128k3-m2_c256k3-c256k3-c256k3-m2_c512k3-c512k3-c512k3-m2"
         "_c512k3-c512k3-c512k3-m2_flat-d4096-d4096-r0.5-o1000_relu")
# The dense LeNet-5 variant: 6 and 16 5x5 valid convs, 2x2 average pooling, dense 120-84-10, tanh
# (common practice; LeCun et al. 1998 wire C3 through a partial connection table, ~60k parameters).
LENET5 = "1x32x32_c6k5v-a2_c16k5v-a2_flat-d120-d84-o10_tanh"


def test_vgg16_configuration_d():
    result = cost(parse_arch(VGG16))
    # 138,357,544: the exact count behind Table 2's "138M" (also torchvision's vgg16, recalled from memory)
    assert result.params == 138_357_544
    # ~15.47 G multiply-adds at 224x224 (common practice; often quoted as "15.5 GFLOPs")
    assert result.macs == pytest.approx(15.47e9, rel=1e-3)
    shapes = [layer.output_shape for layer in result.layers if layer.kind == "maxpool"]
    assert shapes == [(64, 112, 112), (128, 56, 56), (256, 28, 28), (512, 14, 14), (512, 7, 7)]  # Table 1


def test_vgg16_built_in_torch_has_the_same_parameters():
    """Builds the real 138M-parameter module: about 550 MB of fp32 weights, about 1.5 s."""
    import searcher

    model = searcher.build(parse_arch(VGG16))
    assert sum(p.numel() for p in model.parameters()) == 138_357_544  # counted by torch itself


def test_lenet5_dense_variant():
    result = cost(parse_arch(LENET5))
    assert result.params == 61_706  # common practice for the dense LeNet-5 variant
    assert result.macs == 416_520  # 117,600 + 240,000 + 48,000 + 10,080 + 840, counted by hand
    assert [layer.output_shape for layer in result.layers if layer.kind == "conv"] == [(6, 28, 28), (16, 10, 10)]


def test_other_classic_networks_cannot_be_written():
    """Why only plain conv-pool chains are reference-checked.

    * AlexNet (Krizhevsky et al. 2012): its second, fourth and fifth convs are split into two
      groups (one per GPU) and it uses local response normalisation; neither exists here. Its
      overlapping 3x3 stride-2 max pooling can be written (``m3s2``), but its first conv, 11x11 at
      stride 4 with padding 2 on 224x224 input as commonly implemented, is neither 'same' (pad 5)
      nor 'valid' (pad 0), so its 55x55 first map cannot be had from 224x224 input.
    * ResNet: residual blocks add a block's input to its output (skip connections); an Arch is a
      plain feed-forward chain of stages.
    * MobileNet: depthwise separable convs need a per-channel (grouped) 3x3 conv; only the 1x1
      pointwise half can be written.
    * Inception / GoogLeNet: parallel branches of 1x1, 3x3, 5x5 convs and pooling, concatenated.
    """
    assert {f.name for f in fields(Conv)} == {"out_channels", "kernel", "stride", "padding"}  # no groups
    assert {f.name for f in fields(Stage)} == {"convs", "pool"}  # a chain: no branch, no shortcut
    assert {f.name for f in fields(Head)} == {"features", "hidden", "dropout", "classes"}
    first_maps = {pad: cost(parse_arch(f"3x224x224_c96k11s4{pad}_gap-o10_relu")).layers[0].output_shape[1:]
                  for pad in ("", "v")}
    assert (55, 55) not in first_maps.values()  # 'same' gives 56x56, 'valid' 54x54
    overlapping = cost(parse_arch("3x227x227_c96k11s4v-m3s2_gap-o10_relu")).layers[1]
    assert overlapping.output_shape == (96, 27, 27)  # AlexNet's first pooled map, 27x27x96


def test_lenet5_lies_in_the_classic_space(shipped):
    texts = {arch.to_text() for arch in shipped["classic"].enumerate()}
    assert LENET5 in texts


def test_layer_table_names_kinds_and_order():
    result = cost(parse_arch("1x16x16_c4k3-c4k3-m2_c8k3_gap-d6-o3_relu_bn"))
    assert [(x.name, x.kind) for x in result.layers] == [
        ("s1_conv1", "conv"), ("s1_bn1", "batchnorm"), ("s1_conv2", "conv"), ("s1_bn2", "batchnorm"),
        ("s1_pool", "maxpool"), ("s2_conv1", "conv"), ("s2_bn1", "batchnorm"), ("gap", "gap"),
        ("fc1", "dense"), ("out", "dense"),
    ]
    rows = result.table()
    assert [r["layer"] for r in rows] == [x.name for x in result.layers]
    assert rows[4]["output"] == "4x8x8"
    assert sum(r["params"] for r in rows) == result.params
    assert max(r["activation_bytes"] for r in rows) == result.peak_activation_bytes


def test_batch_norm_drops_the_conv_bias():
    plain, normed = (cost(parse_arch(f"1x8x8_c4k3_gap-o2_relu{bn}")) for bn in ("", "_bn"))
    conv_plain, conv_normed = plain.layers[0], normed.layers[0]
    assert (conv_plain.weights, conv_plain.biases) == (36, 4)
    assert (conv_normed.weights, conv_normed.biases) == (36, 0)
    assert normed.layers[1].biases == 8 and normed.layers[1].buffers == 8  # scale+shift, mean+var
    assert normed.macs == plain.macs  # batch norm folds into the conv at inference


def test_activation_precision_scales_peak_bytes():
    arch = parse_arch(LENET5)
    fp32, fp16, int8 = (cost(arch, p).peak_activation_bytes for p in ("fp32", "fp16", "int8"))
    assert fp32 == 2 * fp16 == 4 * int8 == 4 * cost(arch).peak_activation_elements


@pytest.mark.parametrize(
    ("text", "stage"),
    [("1x8x8_c4k5v_c4k5v_gap-o2_relu", "stage 2 conv 1"), ("1x3x3_c4k3-m2_c4k3-m2_gap-o2_relu", "stage 2 pool")],
)
def test_shrinking_below_one_pixel_is_refused(text, stage):
    with pytest.raises(SearcherError, match=f"{stage} shrinks"):
        cost(parse_arch(text))


def test_unknown_precision_is_a_user_error():
    with pytest.raises(SearcherError, match="did you mean 'int8'"):
        cost(parse_arch(LENET5), "int4")
    with pytest.raises(SearcherError, match="precision"):
        cost(parse_arch(LENET5)).weight_bytes("fp64")
