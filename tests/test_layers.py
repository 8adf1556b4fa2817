"""Layer map: parameter counts, MACs, output shapes and receptive fields against outside figures."""

from __future__ import annotations

import json
import warnings

import pytest
import torch
import torchvision
from torch import nn

from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.model.layers import LayerMap, conv_layer_names, layer_map


def _on_meta(builder) -> nn.Module:
    # Built on the meta device: no weight initialisation and no arithmetic, only shapes and counts.
    with torch.device("meta"):
        return builder(weights=None)


def _no_hooks_left(model: nn.Module) -> bool:
    return all(
        not m._forward_hooks and not m._forward_pre_hooks for m in model.modules()
    ) and not nn.modules.module._global_forward_hooks and not nn.modules.module._global_forward_pre_hooks


# ---------------------------------------------------------------------------------------------
# torchvision figures


# Source: torchvision's model documentation, "Models and pre-trained weights" tables (Params, GFLOPS),
# given with three decimals in the weights metadata (meta["num_params"], meta["_ops"]), torchvision 0.29.
TORCHVISION_FIGURES = [
    ("resnet18", torchvision.models.resnet18, torchvision.models.ResNet18_Weights.IMAGENET1K_V1, 11_689_512, 1.814),
    ("resnet50", torchvision.models.resnet50, torchvision.models.ResNet50_Weights.IMAGENET1K_V1, 25_557_032, 4.089),
    ("vgg16", torchvision.models.vgg16, torchvision.models.VGG16_Weights.IMAGENET1K_V1, 138_357_544, 15.470),
    ("alexnet", torchvision.models.alexnet, torchvision.models.AlexNet_Weights.IMAGENET1K_V1, 61_100_840, 0.714),
    ("mobilenet_v2", torchvision.models.mobilenet_v2, torchvision.models.MobileNet_V2_Weights.IMAGENET1K_V1,
     3_504_872, 0.301),
    ("mobilenet_v3_large", torchvision.models.mobilenet_v3_large,
     torchvision.models.MobileNet_V3_Large_Weights.IMAGENET1K_V1, 5_483_032, 0.217),
    ("mobilenet_v3_small", torchvision.models.mobilenet_v3_small,
     torchvision.models.MobileNet_V3_Small_Weights.IMAGENET1K_V1, 2_542_856, 0.057),
]
# The published figure is rounded to 0.001 GFLOPS, so the count must lie within half of that.
HALF_LAST_DIGIT = 0.0005e9


@pytest.mark.parametrize(("arch", "builder", "weights", "params", "gflops"), TORCHVISION_FIGURES,
                         ids=[f[0] for f in TORCHVISION_FIGURES])
def test_params_and_macs_match_torchvision_figures(arch, builder, weights, params, gflops):
    lm = layer_map(_on_meta(builder), input_shape=(3, 224, 224))
    assert lm.total_params == params
    assert lm.total_params == weights.meta["num_params"]
    assert weights.meta["_ops"] == pytest.approx(gflops, abs=1e-9)
    # torchvision's "GFLOPS" count one multiply-add as one operation, i.e. they are GMACs.
    assert abs(lm.total_macs - gflops * 1e9) <= HALF_LAST_DIGIT, lm.total_macs
    # Cross-check: torch's flop counter against the hand count over Conv2d / Linear leaves.
    assert lm.total_macs_analytic == pytest.approx(lm.total_macs, rel=1e-3)
    for row in lm.rows:
        if row.macs_analytic is not None:
            assert row.macs == row.macs_analytic, row.name


def _resnet18_macs_by_hand() -> int:
    # Source: He, Zhang, Ren, Sun, "Deep Residual Learning for Image Recognition", CVPR 2016, Table 1,
    # 18-layer column (layer shapes at 224×224); multiply-adds counted here, biases excluded.
    def conv(c_in: int, c_out: int, k: int, side: int) -> int:
        return c_out * side * side * c_in * k * k

    total = conv(3, 64, 7, 112)  # conv1
    total += 4 * conv(64, 64, 3, 56)  # conv2_x: two blocks of two 3×3 convs
    for c_in, c_out, side in ((64, 128, 28), (128, 256, 14), (256, 512, 7)):
        total += conv(c_in, c_out, 3, side) + 3 * conv(c_out, c_out, 3, side)  # first conv strides by 2
        total += conv(c_in, c_out, 1, side)  # the 1×1 projection shortcut
    return total + 512 * 1000  # fc


def test_resnet18_real_forward_matches_hand_count():
    torch.manual_seed(0)
    model = torchvision.models.resnet18(weights=None)
    model.train()
    lm = layer_map(model, input_shape=(3, 224, 224))
    by_hand = _resnet18_macs_by_hand()
    assert by_hand == 1_814_073_344  # and 1.814 GFLOPS in torchvision's table
    assert lm.total_macs == by_hand
    assert lm.total_macs_analytic == by_hand
    assert model.training, "the training flag must be restored"
    assert _no_hooks_left(model)
    assert lm.by_name("conv1").output_shape == (1, 64, 112, 112)
    assert lm.by_name("layer4").output_shape == (1, 512, 7, 7)
    assert lm.by_name("fc").output_shape == (1, 1000)
    # Residual additions: the largest path is kept and flagged; after global pooling the field is global.
    assert lm.by_name("layer1.0").rf_multipath
    assert not lm.by_name("layer1.0.conv1").rf_multipath
    assert lm.by_name("avgpool").rf_global and lm.by_name("fc").rf_global
    assert lm.by_name("fc").rf_size == (224, 224)
    assert lm.first_conv().name == "conv1"
    assert lm.last_conv().name == "layer4.1.conv2"


# ---------------------------------------------------------------------------------------------
# LeNet-5


class _LeNet5(nn.Module):
    """LeNet-5's dense layers as described by LeCun et al. 1998 (C3 made dense; it is not checked)."""

    def __init__(self) -> None:
        super().__init__()
        self.c1 = nn.Conv2d(1, 6, 5)
        self.s2 = nn.AvgPool2d(2)
        self.c3 = nn.Conv2d(6, 16, 5)
        self.s4 = nn.AvgPool2d(2)
        self.c5 = nn.Conv2d(16, 120, 5)
        self.f6 = nn.Linear(120, 84)
        self.out = nn.Linear(84, 10)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.s2(torch.tanh(self.c1(x)))
        x = self.s4(torch.tanh(self.c3(x)))
        x = torch.tanh(self.c5(x)).flatten(1)
        return self.out(torch.tanh(self.f6(x)))


def test_lenet5_counts():
    lm = layer_map(_LeNet5(), input_shape=(1, 32, 32))
    c1 = lm.by_name("c1")
    # Source: LeCun, Bottou, Bengio, Haffner, "Gradient-Based Learning Applied to Document
    # Recognition", Proc. IEEE 1998, §II-B: C1 has 156 trainable parameters and 122,304 connections.
    assert c1.params == 156
    assert c1.output_shape == (1, 6, 28, 28)
    positions = 28 * 28
    assert c1.params * positions == 122_304
    # connections = multiply-adds plus one bias term per output value
    assert c1.macs_analytic + 6 * positions == 122_304
    assert c1.macs == c1.macs_analytic
    # Source: same paper, §II-B: C5 has 48,120 trainable connections (= parameters), F6 10,164.
    assert lm.by_name("c5").params == 48_120
    assert lm.by_name("c5").output_shape == (1, 120, 1, 1)
    assert lm.by_name("f6").params == 10_164
    # C5's 5×5 kernels cover the whole 32×32 input: r = 1 + 4 + 1·1 + 4·2 + 1·2 + 4·4 = 32
    # Source: Araujo, Norris, Sim, "Computing Receptive Fields of CNNs", Distill 2019, closed form.
    assert lm.by_name("c5").rf_size == (32, 32)


# ---------------------------------------------------------------------------------------------
# Receptive fields


def test_vgg16_receptive_field_at_pool5():
    lm = layer_map(_on_meta(torchvision.models.vgg16), input_shape=(3, 224, 224))
    pool5 = lm.by_name("features.30")
    assert pool5.type == "MaxPool2d"
    # Source: Araujo, Norris, Sim, "Computing Receptive Fields of Convolutional Neural Networks",
    # Distill 2019, table of receptive fields (vgg_16: r = 212, effective stride 32, padding 90).
    assert pool5.rf_size == (212, 212)
    assert pool5.rf_jump == (32, 32)
    assert pool5.rf_padding == (90, 90)
    assert not pool5.rf_multipath
    for row in lm.rows:
        if row.rf_size is not None and not row.rf_global:
            # Same paper: centre of the first unit = (r − 1)/2 − P in input pixel indices [derived].
            assert row.rf_start[0] == pytest.approx((row.rf_size[0] - 1) / 2 - row.rf_padding[0])
    assert lm.by_name("classifier.0").rf_global


def test_alexnet_receptive_field_at_last_pool():
    lm = layer_map(_on_meta(torchvision.models.alexnet), input_shape=(3, 224, 224))
    pool = lm.by_name("features.12")
    assert pool.type == "MaxPool2d"
    # Source: Araujo, Norris, Sim, Distill 2019, table (alexnet_v2: r = 195, stride 32); torchvision's
    # AlexNet gives the same r with effective padding 66 by the paper's recurrence [derived].
    assert pool.rf_size == (195, 195)
    assert pool.rf_jump == (32, 32)
    assert pool.rf_padding == (66, 66)


def test_dilation_padding_modules_and_same_padding():
    model = nn.Sequential(
        nn.ZeroPad2d((2, 0, 1, 0)),  # left 2, right 0, top 1, bottom 0
        nn.Conv2d(1, 1, 3, dilation=2),
        nn.Conv2d(1, 1, 3, padding="same"),
        nn.MaxPool2d(2),
    )
    lm = layer_map(model, input_shape=(1, 20, 20))
    # Source: Araujo, Norris, Sim, Distill 2019: dilation d makes a k-kernel act as d·(k − 1) + 1.
    assert lm.by_name("1").rf_size == (5, 5)
    # The pad module shifts the start by its left/top padding and leaves the size alone.
    assert lm.by_name("0").rf_start == (-1.0, -2.0)
    assert lm.by_name("1").rf_start == (1.0, 0.0)
    assert lm.by_name("2").rf_size == (7, 7)
    assert lm.by_name("2").rf_padding == (2, 3)
    assert lm.by_name("3").rf_size == (8, 8) and lm.by_name("3").rf_jump == (2, 2)


class _SelfPaddingConv(nn.Conv2d):
    """A conv that pads itself in forward through a ZeroPad2d child (a "static same" layer)."""

    def __init__(self, cin: int, cout: int, k: int, stride: int, pad: tuple[int, int, int, int]) -> None:
        super().__init__(cin, cout, k, stride=stride, padding=0)
        self.static_padding = nn.ZeroPad2d(pad)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return nn.functional.conv2d(self.static_padding(x), self.weight, self.bias, self.stride)


def test_self_padding_conv_subclass_is_a_conv_leaf():
    model = nn.Sequential(_SelfPaddingConv(3, 4, 3, 2, (0, 1, 0, 1)), _SelfPaddingConv(4, 4, 3, 1, (1, 1, 1, 1)))
    lm = layer_map(model, input_shape=(3, 16, 16))
    first = lm.by_name("0")
    assert first.kind == "leaf" and first.is_conv and first.params == 3 * 4 * 9 + 4
    assert lm.by_name("0.static_padding").type == "ZeroPad2d"
    assert first.output_shape == (1, 4, 8, 8)
    # Padding only on the right/bottom: the first unit's field starts at the first pixel.
    assert first.rf_start == (1.0, 1.0) and first.rf_padding == (0, 0)
    second = lm.by_name("1")
    assert second.rf_size == (7, 7) and second.rf_padding == (2, 2) and second.rf_start == (1.0, 1.0)
    assert [r.name for r in lm.conv_layers()] == ["0", "1"]
    assert "0.static_padding" in lm.leaf_layer_names()


def test_concatenation_takes_largest_path():
    class TwoPaths(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.small = nn.Conv2d(1, 2, 1)
            self.big = nn.Conv2d(1, 2, 5, padding=2)
            self.join = nn.Conv2d(4, 1, 1)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            return self.join(torch.cat([self.small(x), self.big(x)], dim=1))

    lm = layer_map(TwoPaths(), input_shape=(1, 12, 12))
    assert lm.by_name("join").rf_size == (5, 5)
    assert lm.by_name("join").rf_multipath
    assert any("largest" in note for note in lm.by_name("join").notes)
    assert not lm.by_name("big").rf_multipath


@pytest.mark.imagenet
def test_efficientnet_lite0_layer_map():
    pytest.importorskip("efficientnet_lite_pytorch")
    from efficientnet_lite_pytorch import EfficientNet

    model = EfficientNet.from_name("efficientnet-lite0")
    lm = layer_map(model, input_shape=(3, 224, 224))
    assert _no_hooks_left(model)
    assert lm.total_params == sum(p.numel() for p in model.parameters())
    stem = lm.by_name("_conv_stem")
    assert stem.is_conv and stem.kind == "leaf" and stem.output_shape == (1, 32, 112, 112)
    # The package's static "same" padding for k = 3, s = 2 on 224 pads 0 left and 1 right
    # ([derived] from its padding rule), so the first unit's field is centred on pixel 1.
    assert lm.by_name("_conv_stem.static_padding").output_shape == (1, 3, 225, 225)
    assert stem.rf_size == (3, 3) and stem.rf_start == (1.0, 1.0) and stem.rf_padding == (0, 0)
    convs = [r for r in lm.conv_layers() if r.calls]
    sizes = [r.rf_size[0] for r in convs]
    assert sizes == sorted(sizes), "the field never shrinks along the conv path"
    head = lm.by_name("_conv_head")
    assert head.output_shape == (1, 1280, 7, 7)
    assert head.rf_jump == (32, 32)  # five stride-2 stages: 224 / 7
    assert head.rf_size[0] > 224 and head.rf_multipath
    assert lm.by_name("_fc").rf_global
    assert lm.total_macs == pytest.approx(lm.total_macs_analytic, rel=1e-3)
    assert lm.by_name("_swish").calls == 2


# ---------------------------------------------------------------------------------------------
# Shapes, calls, errors, other module kinds


def test_valid_conv_and_pool_shapes():
    model = nn.Sequential(nn.Conv2d(1, 3, 5), nn.MaxPool2d(2))
    lm = layer_map(model, input_shape=(1, 28, 28))
    # common practice, no source: a 'valid' k×k conv gives (n − k + 1)², 2×2 max pooling halves each side
    assert lm.by_name("0").output_shape == (1, 3, 24, 24)
    assert lm.by_name("1").output_shape == (1, 3, 12, 12)
    # common practice, no source: k·k·c_in·c_out + c_out parameters
    assert lm.by_name("0").params == 5 * 5 * 1 * 3 + 3
    assert lm.by_name("1").rf_size == (6, 6)


def test_shared_module_and_tuple_output():
    class Splitter(nn.Module):
        def forward(self, x: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
            return x[:, :2], x[:, 2:]

    class Net(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.conv = nn.Conv2d(3, 4, 3, padding=1)
            self.act = nn.ReLU()
            self.split = Splitter()
            self.head = nn.Sequential(nn.Conv2d(2, 2, 3, padding=1))

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            a, b = self.split(self.act(self.conv(x)))
            return self.act(self.head(a)) + b

    lm = layer_map(Net(), input_shape=(3, 8, 8))
    act = lm.by_name("act")
    assert act.calls == 2 and any("called 2 times" in n for n in act.notes)
    assert act.output_shape == (1, 4, 8, 8)  # first call
    assert any("differs" in n for n in act.notes)
    assert lm.by_name("split").output_shape == (1, 2, 8, 8)
    assert lm.by_name("head").kind == "container" and lm.by_name("head.0").kind == "leaf"
    assert lm.by_name("head").params == lm.by_name("head.0").params == 2 * 2 * 9 + 2
    json.dumps(lm.to_dict())


def test_hooks_removed_when_forward_raises():
    class Broken(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.conv = nn.Conv2d(3, 3, 3)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            self.conv(x)
            raise RuntimeError("boom")

    model = Broken()
    model.train()
    with pytest.raises(BadParameterError, match=r"boom.*\(1, 3, 10, 10\)|\(1, 3, 10, 10\).*boom"):
        layer_map(model, input_shape=(3, 10, 10))
    assert _no_hooks_left(model)
    assert model.training


def test_wrong_channels_and_bad_shape_are_clear_errors():
    model = nn.Sequential(nn.Conv2d(3, 2, 3))
    with pytest.raises(BadParameterError, match="input_shape"):
        layer_map(model, input_shape=(1, 8, 8))
    with pytest.raises(BadParameterError, match="three positive integers"):
        layer_map(model, input_shape=(8, 8))  # type: ignore[arg-type]
    assert _no_hooks_left(model)


def test_by_name_lists_close_names():
    lm = layer_map(nn.Sequential(nn.Conv2d(1, 2, 3), nn.ReLU()), input_shape=(1, 6, 6))
    assert isinstance(lm, LayerMap)
    with pytest.raises(UnsupportedLayerError, match="no layer named 'l'"):
        lm.by_name("l")
    tv = layer_map(_on_meta(torchvision.models.resnet18), input_shape=(3, 64, 64))
    with pytest.raises(UnsupportedLayerError, match=r"layer1\.0\.conv1"):
        tv.by_name("layer1.0.conv")


def test_torchscript_is_refused_with_export_advice():
    model = nn.Sequential(nn.Conv2d(1, 2, 3))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # torch.jit.script is deprecated in this torch version
        scripted = torch.jit.script(model)
    with pytest.raises(UnsupportedLayerError, match=r"TorchScript.*torch.export"):
        layer_map(scripted, input_shape=(1, 6, 6))


def test_unflattened_export_gets_a_map():
    class Tiny(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.conv = nn.Conv2d(3, 4, 3, padding=1)
            self.pool = nn.MaxPool2d(2)
            self.fc = nn.Linear(4 * 4 * 4, 2)

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            return self.fc(torch.flatten(self.pool(torch.relu(self.conv(x))), 1))

    program = torch.export.export(Tiny().eval(), (torch.randn(1, 3, 8, 8),))
    module = torch.export.unflatten(program)
    lm = layer_map(module, input_shape=(3, 8, 8))
    assert lm.by_name("conv").is_conv and lm.by_name("conv").params == 3 * 4 * 9 + 4
    assert lm.by_name("pool").rf_size == (4, 4)
    assert lm.by_name("fc").rf_global
    # flop counter: conv 4·8·8 outputs × 27 + Linear 64 × 2
    assert lm.total_macs == 4 * 8 * 8 * 27 + 64 * 2
    assert conv_layer_names(module) == ["conv"]
    assert _no_hooks_left(module)
