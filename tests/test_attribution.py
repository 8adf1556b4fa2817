"""Attribution methods behind the registry: published identities, shared checkers, bad input."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from torch import nn

from pellucid.core.attribution import (
    Method,
    Normalization,
    ParamSchema,
    UnknownMethodError,
    compute_attribution,
    conv_like_layers,
    get_method,
    list_methods,
    method_names,
    register,
)
from pellucid.core.attribution.rise import rise_masks
from pellucid.core.errors import BadParameterError, Cancelled, UnsupportedLayerError
from pellucid.core.progress import CancelToken

ROOT = Path(__file__).resolve().parents[1]
DEMO_WEIGHTS = ROOT / "demo_models" / "tilenet" / "tilenet.safetensors"

# Fast settings per method for the shared checks (the defaults are for real use).
FAST = {
    "gradcam": {},
    "saliency": {},
    "gradient_x_input": {},
    "smoothgrad": {"samples": 6, "batch_size": 4},
    "integrated_gradients": {"baseline": "zero", "steps": 8},
    "rise": {"masks": 40, "batch_size": 16},
    "occlusion": {"patch": 4, "stride": 4},
}


class SmallCNN(nn.Module):
    """conv → ReLU → conv → GAP → linear: the last conv feeds the pooling directly (CAM's shape)."""

    def __init__(self, classes: int = 3) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, 6, 3, padding=1)
        self.relu1 = nn.ReLU()
        self.conv2 = nn.Conv2d(6, 5, 3, padding=1)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.flatten = nn.Flatten()
        self.fc = nn.Linear(5, classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.fc(self.flatten(self.pool(self.conv2(self.relu1(self.conv1(x))))))


class LinearModel(nn.Module):
    """Two logits: S₀ = w·x + b, S₁ = 0."""

    def __init__(self, w: torch.Tensor, b: float = 0.3) -> None:
        super().__init__()
        self.w = nn.Parameter(w.clone())
        self.b = nn.Parameter(torch.tensor(b))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        s = (x * self.w).flatten(1).sum(1) + self.b
        return torch.stack([s, torch.zeros_like(s)], dim=1)


class MinModel(nn.Module):
    """F(x₁, x₂) = min(x₁, x₂) on a (N, 2, 1, 1) 'image'."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.minimum(x[:, 0, 0, 0], x[:, 1, 0, 0]).unsqueeze(1)


class SquareModel(nn.Module):
    """F(x) = x² on a (N, 1, 1, 1) 'image'."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return (x[:, 0, 0, 0] ** 2).unsqueeze(1)


@pytest.fixture()
def cnn() -> nn.Module:
    torch.manual_seed(0)
    return SmallCNN().eval()


@pytest.fixture()
def image() -> torch.Tensor:
    return torch.randn(1, 3, 12, 12, generator=torch.Generator().manual_seed(1))


def _demo_model() -> nn.Module:
    if not DEMO_WEIGHTS.exists():
        pytest.skip(f"demo model not built yet ({DEMO_WEIGHTS.relative_to(ROOT)} missing)")
    from safetensors.torch import load_file

    from pellucid.demo.net import build_tilenet

    model = build_tilenet(num_classes=4)
    model.load_state_dict(load_file(str(DEMO_WEIGHTS)))
    return model.eval()


def _demo_tile(label: str, tagged: bool, seed: int = 7) -> torch.Tensor:
    from pellucid.demo.net import normalise
    from pellucid.demo.tiles import make_tile

    return normalise(torch.from_numpy(make_tile(label=label, tagged=tagged, seed=seed)).unsqueeze(0))


# ---------------------------------------------------------------------------------------------
# shared checkers, every registered method


def test_every_method_has_fast_settings_here():
    # common practice, no source: the shared checks below must cover every registered method.
    assert set(method_names()) == set(FAST)


@pytest.mark.parametrize("name", list(FAST))
class TestEveryMethod:
    def test_map_shape_dtype_and_record(self, name, cnn, image):
        # common practice, no source: a map at input resolution with its method, target and params.
        amap = compute_attribution(name, cnn, image, params=FAST[name])
        assert amap.map.shape == (12, 12) and amap.map.dtype == np.float32
        assert np.isfinite(amap.map).all()
        assert amap.method == name and amap.target_source == "top-1"
        assert amap.target == int(cnn(image).argmax())
        assert set(get_method(name).schema.names) <= set(amap.params)
        assert amap.n_forwards >= 1 and amap.seconds >= 0
        json.dumps(amap.summary())

    def test_model_state_and_hooks_untouched(self, name, cnn, image):
        # common practice, no source: explaining a model must not change it.
        cnn.train()
        cnn.conv1.weight.requires_grad_(False)
        before = {k: v.clone() for k, v in cnn.state_dict().items()}
        compute_attribution(name, cnn, image, params=FAST[name])
        assert cnn.training and all(m.training for m in cnn.modules())
        assert not cnn.conv1.weight.requires_grad and cnn.conv2.weight.requires_grad
        assert all(p.grad is None for p in cnn.parameters())
        assert all(not m._forward_hooks and not m._forward_pre_hooks for m in cnn.modules())
        for k, v in cnn.state_dict().items():
            assert torch.equal(v, before[k]), k

    def test_given_target_is_explained(self, name, cnn, image):
        amap = compute_attribution(name, cnn, image, target=2, params=FAST[name])
        assert amap.target == 2 and amap.target_source == "given"

    def test_deterministic(self, name, cnn, image):
        # common practice, no source: same inputs and seed give the same map.
        a = compute_attribution(name, cnn, image, params=FAST[name])
        b = compute_attribution(name, cnn, image, params=FAST[name])
        np.testing.assert_array_equal(a.map, b.map)

    def test_cancel(self, name, cnn, image):
        token = CancelToken()
        token.cancel()
        with pytest.raises(Cancelled):
            compute_attribution(name, cnn, image, params=FAST[name], cancel=token)
        assert all(not m._forward_hooks for m in cnn.modules())

    def test_progress_reaches_total(self, name, cnn, image):
        seen: list[tuple[int, int]] = []
        compute_attribution(name, cnn, image, params=FAST[name], progress=lambda d, t: seen.append((d, t)))
        assert seen and seen[-1][0] == seen[-1][1]

    def test_works_under_inference_mode(self, name, cnn, image):
        # A web worker may call us from inside torch.inference_mode(); gradients must still work.
        with torch.inference_mode():
            amap = compute_attribution(name, cnn, image, params=FAST[name])
        ref = compute_attribution(name, cnn, image, params=FAST[name])
        np.testing.assert_allclose(amap.map, ref.map, rtol=1e-5, atol=1e-7)


def test_list_methods_is_json_and_complete():
    described = list_methods()
    json.dumps(described)
    names = [m["name"] for m in described]
    assert names == method_names()
    ig = next(m for m in described if m["name"] == "integrated_gradients")
    assert {p["name"] for p in ig["params"]} >= {"baseline", "steps", "rule"}
    assert ig["cost_at_defaults_224"] == 3 * 33  # 32 trapezoid steps = 33 points, forward + backward
    rise = next(m for m in described if m["name"] == "rise")
    assert rise["stochastic"] and not rise["uses_gradients"]
    assert next(m for m in described if m["name"] == "gradcam")["needs_conv_layer"]


# ---------------------------------------------------------------------------------------------
# Grad-CAM


def test_gradcam_equals_cam_over_z_on_gap_linear_net(cnn, image):
    # Source: Selvaraju et al., "Grad-CAM", ICCV 2017, §3.1 — with global average pooling and a
    # linear layer, CAM's weights (Zhou et al., "Learning Deep Features for Discriminative
    # Localization", CVPR 2016) equal Z·αₖ, so Grad-CAM == ReLU(CAM)/Z with Z = h·w.
    target = 1
    amap = compute_attribution("gradcam", cnn, image, target=target)
    assert amap.params["layer"] == "conv2"
    with torch.no_grad():
        act = cnn.conv2(cnn.relu1(cnn.conv1(image)))[0]  # (C, h, w)
        cam = torch.einsum("c,chw->hw", cnn.fc.weight[target], act)
    z = act.shape[1] * act.shape[2]
    expected = torch.relu(cam) / z
    np.testing.assert_allclose(amap.raw, expected.numpy(), rtol=1e-5, atol=1e-7)
    up = F.interpolate(expected[None, None], size=(12, 12), mode="bilinear", align_corners=False)[0, 0]
    np.testing.assert_allclose(amap.map, up.numpy(), rtol=1e-5, atol=1e-7)


def test_gradcam_at_a_named_activation_layer(cnn, image):
    amap = compute_attribution("gradcam", cnn, image, params={"layer": "relu1"})
    assert amap.params["layer"] == "relu1" and amap.raw.shape == (12, 12)


def test_gradcam_with_inplace_relu_after_the_conv():
    # An in-place ReLU right after the chosen conv must not change the activations Grad-CAM uses.
    torch.manual_seed(3)
    net = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(inplace=True), nn.AdaptiveAvgPool2d(1),
                        nn.Flatten(), nn.Linear(4, 2)).eval()
    x = torch.randn(1, 3, 8, 8)
    amap = compute_attribution("gradcam", net, x, target=0, params={"layer": "0"})
    with torch.no_grad():
        act = net[0](x)[0]
        grad = (act > 0).float() * net[4].weight[0].view(-1, 1, 1) / 64  # ∂y/∂A through the ReLU
        expected = torch.relu((grad.mean(dim=(1, 2)).view(-1, 1, 1) * act).sum(0))
    np.testing.assert_allclose(amap.raw, expected.numpy(), rtol=1e-5, atol=1e-7)


@pytest.mark.parametrize("layer", ["fc", "flatten", "pool"])
def test_gradcam_rejects_layers_that_are_not_conv_like(cnn, image, layer):
    # 'pool' outputs (N, C, 1, 1): 4-D, so it is accepted; fc and flatten are 2-D.
    if layer == "pool":
        assert compute_attribution("gradcam", cnn, image, params={"layer": layer}).raw.shape == (1, 1)
        return
    with pytest.raises(UnsupportedLayerError, match="valid layers: conv1, relu1, conv2, pool"):
        compute_attribution("gradcam", cnn, image, params={"layer": layer})
    assert all(not m._forward_hooks for m in cnn.modules())


def test_gradcam_unknown_layer_and_model_without_conv(cnn, image):
    with pytest.raises(UnsupportedLayerError, match="no layer named 'conv9'"):
        compute_attribution("gradcam", cnn, image, params={"layer": "conv9"})
    lin = LinearModel(torch.ones(1, 3, 4, 4))
    with pytest.raises(UnsupportedLayerError, match=r"no module of this model produces a 4-D"):
        compute_attribution("gradcam", lin, torch.ones(1, 3, 4, 4))
    assert conv_like_layers(cnn, image) == ["conv1", "relu1", "conv2", "pool"]


def _cam_check(amap, feature: torch.Tensor, weight: torch.Tensor) -> None:
    """Grad-CAM's low-resolution map against ReLU(CAM)/Z computed here from the feature map and fc weights.

    Source: Selvaraju et al., "Grad-CAM: Visual Explanations from Deep Networks via Gradient-based
    Localization", ICCV 2017, §3.1 — for global average pooling followed by a linear layer,
    Grad-CAM = ReLU(CAM)/Z; CAM: Zhou et al., "Learning Deep Features for Discriminative
    Localization", CVPR 2016, Eq. for M_c = Σ_k w_k^c f_k(x, y).
    """
    f = feature.detach().double()[0]  # (C, h, w)
    weight = weight.detach().double()
    cam = torch.zeros(f.shape[1:], dtype=torch.float64)
    for k in range(f.shape[0]):  # the CAM sum written out, channel by channel
        cam += float(weight[k]) * f[k]
    expected = torch.relu(cam) / (f.shape[1] * f.shape[2])
    assert float(expected.max()) > 0, "pick a target with positive evidence"
    got = torch.from_numpy(amap.raw).double()
    assert got.shape == expected.shape
    scale = float(expected.max())
    assert float((got / scale - expected / scale).abs().max()) <= 1e-4
    assert int(got.argmax()) == int(expected.argmax())  # the peak cell is the same one


def _resnet18() -> nn.Module:
    import torchvision

    torch.manual_seed(0)
    return torchvision.models.resnet18(weights=None).eval()


def test_gradcam_default_layer_equals_cam_on_resnet18():
    # Source: Selvaraju et al., ICCV 2017, §3.1 (Grad-CAM = ReLU(CAM)/Z at the map feeding GAP);
    # torchvision's ResNet-18 feeds layer4's output to avgpool, then fc (He et al., CVPR 2016).
    net = _resnet18()
    x = torch.randn(1, 3, 224, 224, generator=torch.Generator().manual_seed(5))
    with torch.no_grad():
        logits = net(x)
    target = int(logits[0].argmax())
    amap = compute_attribution("gradcam", net, x, target=target)
    assert amap.params["layer"] == "layer4.1"  # the last block: after its residual sum and ReLU
    assert amap.extras["layer_shape"] == [512, 7, 7]
    seen = {}
    handle = net.avgpool.register_forward_pre_hook(lambda _m, args: seen.update(f=args[0].clone()))
    with torch.no_grad():
        net(x)
    handle.remove()
    _cam_check(amap, seen["f"], net.fc.weight[target])


def test_gradcam_default_layer_is_not_the_last_conv():
    # The old default (the last nn.Conv2d, before batch norm, ReLU and the skip sum) is not CAM:
    # the same check must fail there, so the test above cannot pass by accident.
    net = _resnet18()
    x = torch.randn(1, 3, 224, 224, generator=torch.Generator().manual_seed(5))
    with torch.no_grad():
        target = int(net(x)[0].argmax())
    seen = {}
    handle = net.avgpool.register_forward_pre_hook(lambda _m, args: seen.update(f=args[0].clone()))
    with torch.no_grad():
        net(x)
    handle.remove()
    old = compute_attribution("gradcam", net, x, target=target, params={"layer": "layer4.1.conv2"})
    with pytest.raises(AssertionError):
        _cam_check(old, seen["f"], net.fc.weight[target])


def test_gradcam_default_layer_on_a_torch_export_model():
    # torch.export programs turned back into modules keep the submodule names; the default layer
    # is found from the recorded graph, so it is the same layer and the same map as the eager model.
    net = _resnet18()
    x = torch.randn(1, 3, 112, 112, generator=torch.Generator().manual_seed(6))
    exported = torch.export.unflatten(torch.export.export(net, (x,)))
    eager = compute_attribution("gradcam", net, x)
    other = compute_attribution("gradcam", exported, x, target=eager.target)
    assert other.params["layer"] == eager.params["layer"] == "layer4.1"
    np.testing.assert_allclose(other.map, eager.map, rtol=1e-4, atol=1e-6)


@pytest.mark.imagenet
def test_gradcam_default_layer_equals_cam_on_efficientnet_lite0():
    # Source: Selvaraju et al., ICCV 2017, §3.1; the photo is scikit-image's bundled "chelsea" (a cat).
    pytest.importorskip("efficientnet_lite_pytorch", reason="needs the optional imagenet extra")
    skimage_data = pytest.importorskip("skimage.data")
    from pellucid.core.model.bundled import bundled_spec_path
    from pellucid.core.model.loading import load_model
    from pellucid.core.model.preprocess import prepare, read_image

    lm = load_model(bundled_spec_path("efficientnet-lite0"))
    net = lm.module
    from PIL import Image

    buf = __import__("io").BytesIO()
    Image.fromarray(skimage_data.chelsea()).save(buf, format="PNG")
    x = prepare(lm.spec, read_image(buf.getvalue())).tensor
    amap = compute_attribution("gradcam", net, x)
    # EfficientNet-Lite's head: conv_head → bn → ReLU6 → global average pooling → fc.
    assert amap.params["layer"] == "_avg_pooling:input"
    with torch.no_grad():
        feature = net.extract_features(x)
    _cam_check(amap, feature, net._fc.weight[amap.target])


def test_gradcam_layer_refused_up_front_with_the_valid_layers(cnn):
    from pellucid.core.attribution import check_request

    listing = "valid layers: conv1, relu1, conv2, pool"
    with pytest.raises(UnsupportedLayerError, match=r"layer 'fc' gives \(1, 3\).*" + listing):
        check_request("gradcam", cnn, (3, 12, 12), {"layer": "fc"})
    with pytest.raises(UnsupportedLayerError, match="no layer named 'head'"):
        check_request("gradcam", cnn, (3, 12, 12), {"layer": "head"})
    assert check_request("gradcam", cnn, (3, 12, 12), {"layer": "relu1"})["layer"] == "relu1"
    assert check_request("gradcam", cnn, (3, 12, 12), {})["layer"] is None
    assert all(not m._forward_hooks and not m._forward_pre_hooks for m in cnn.modules())


def test_gradcam_at_the_input_of_a_module(cnn, image):
    # "NAME:input" hooks the module's first input: the pooling's input is conv2's output here.
    a = compute_attribution("gradcam", cnn, image, target=0, params={"layer": "pool:input"})
    b = compute_attribution("gradcam", cnn, image, target=0, params={"layer": "conv2"})
    assert a.params["layer"] == "pool:input"
    np.testing.assert_array_equal(a.raw, b.raw)


# ---------------------------------------------------------------------------------------------
# gradients and Integrated Gradients on models with known answers


@pytest.fixture()
def linear_case():
    g = torch.Generator().manual_seed(5)
    w = torch.randn(1, 3, 6, 6, generator=g)
    x = torch.randn(1, 3, 6, 6, generator=g)
    return LinearModel(w).eval(), w, x


def test_gradient_x_input_on_linear_model_is_w_times_x(linear_case):
    # Source: Adebayo et al., "Sanity Checks for Saliency Maps", NeurIPS 2018, §5.3 — for a linear
    # model the gradient is w, so gradient × input is w ⊙ x.
    model, w, x = linear_case
    amap = compute_attribution("gradient_x_input", model, x, target=0)
    np.testing.assert_array_equal(amap.raw, (w * x)[0].detach().numpy())
    np.testing.assert_allclose(amap.map, (w * x)[0].sum(0).detach().numpy(), rtol=1e-6)
    assert amap.signed


def test_saliency_on_linear_model_is_max_abs_w(linear_case):
    # Source: Simonyan, Vedaldi, Zisserman, "Deep Inside Convolutional Networks", arXiv:1312.6034
    # (2013), §3 — map = max over colour channels of |∂S/∂x|, which is |w| for a linear score.
    model, w, x = linear_case
    amap = compute_attribution("saliency", model, x, target=0)
    np.testing.assert_array_equal(amap.map, w[0].abs().amax(0).detach().numpy())


def test_smoothgrad_on_linear_model_is_w(linear_case):
    # Source: Adebayo et al., NeurIPS 2018, §5.3 — for a linear model SmoothGrad = w.
    model, w, x = linear_case
    amap = compute_attribution("smoothgrad", model, x, target=0, params={"samples": 5})
    np.testing.assert_allclose(amap.raw, w[0].detach().numpy(), rtol=1e-6)


@pytest.mark.parametrize("rule", ["right", "trapezoid"])
def test_integrated_gradients_zero_baseline_on_linear_model_is_w_times_x(linear_case, rule):
    # Source: Adebayo et al., NeurIPS 2018, §5.3 and Sundararajan, Taly, Yan, "Axiomatic
    # Attribution for Deep Networks", ICML 2017, Eq. 1 — IG with a zero baseline is w ⊙ x.
    model, w, x = linear_case
    amap = compute_attribution("integrated_gradients", model, x, target=0,
                               params={"baseline": "zero", "steps": 7, "rule": rule})
    np.testing.assert_allclose(amap.raw, (w * x)[0].detach().numpy(), rtol=1e-5, atol=1e-6)
    assert amap.extras["completeness_error"] < 1e-5


def test_integrated_gradients_min_example():
    # Source: Sundararajan, Taly, Yan, ICML 2017, Remark 5 — F = min(x₁, x₂) at (1, 3) with
    # baseline 0 gives IG = (1, 0). The paper's Riemann sum (Eq. 3) is the right rule.
    x = torch.tensor([1.0, 3.0]).view(1, 2, 1, 1)
    amap = compute_attribution("integrated_gradients", MinModel(), x, target=0,
                               params={"baseline": "zero", "steps": 64, "rule": "right"})
    np.testing.assert_allclose(amap.raw[:, 0, 0], [1.0, 0.0], atol=1e-6)


@pytest.mark.parametrize("steps", [1, 4, 64])
def test_integrated_gradients_riemann_rules_on_square(steps):
    # Source: derived from Sundararajan et al., ICML 2017, Eq. 3 — for F = x² on [0, 1] the right
    # Riemann sum with m steps gives (1/m) Σₖ 2k/m = (m+1)/m; the trapezoid rule is exact (the
    # integrand 2α is linear).
    x = torch.ones(1, 1, 1, 1)
    fixed = {"baseline": "zero", "steps": steps, "max_steps": steps}  # no automatic doubling
    right = compute_attribution("integrated_gradients", SquareModel(), x, target=0,
                                params={**fixed, "rule": "right"})
    trap = compute_attribution("integrated_gradients", SquareModel(), x, target=0,
                               params={**fixed, "rule": "trapezoid"})
    assert math.isclose(float(right.raw.sum()), (steps + 1) / steps, rel_tol=1e-6)
    assert math.isclose(float(trap.raw.sum()), 1.0, rel_tol=1e-6)
    assert math.isclose(right.extras["completeness_error"], 1 / steps, rel_tol=1e-5)
    assert ("warning" in right.extras) == (1 / steps > 0.05)


def test_integrated_gradients_doubles_steps_until_complete_reusing_points():
    # Source: derived from Sundararajan et al., ICML 2017, Eq. 3 — for F = x² on [0, 1] the right
    # sum with m steps is (m+1)/m, error 1/m: starting at 1 step, doubling stops at m = 32 (error
    # 1/32 ≤ 5%, 1/16 > 5%), and the sum built from reused points must equal the direct 32-step sum.
    x = torch.ones(1, 1, 1, 1)
    amap = compute_attribution("integrated_gradients", SquareModel(), x, target=0,
                               params={"baseline": "zero", "steps": 1, "max_steps": 64, "rule": "right"})
    assert amap.extras["steps_used"] == 32
    assert [h["steps"] for h in amap.extras["steps_history"]] == [1, 2, 4, 8, 16, 32]
    assert math.isclose(float(amap.raw.sum()), 33 / 32, rel_tol=1e-6)
    assert amap.n_backwards == 32  # each point once: 1 + 1 + 2 + 4 + 8 + 16
    capped = compute_attribution("integrated_gradients", SquareModel(), x, target=0,
                                 params={"baseline": "zero", "steps": 1, "max_steps": 8, "rule": "right"})
    assert capped.extras["steps_used"] == 8 and "max_steps" in capped.extras["warning"]
    assert math.isclose(float(capped.raw.sum()), 9 / 8, rel_tol=1e-6)


def _black_score_gap(model, x, mean, std, target):
    """F(x) − F(black) for the target's pre-softmax score, black = (0 − mean) / std per channel."""
    black = ((torch.zeros_like(x) - torch.tensor(mean).view(1, -1, 1, 1)) / torch.tensor(std).view(1, -1, 1, 1))
    with torch.no_grad():
        return float(model(x)[0, target]) - float(model(black)[0, target])


def test_integrated_gradients_defaults_complete_on_bundled_demo_model():
    # Source: Sundararajan, Taly, Yan, ICML 2017, Prop. 1 (completeness) and §"Computing
    # Integrated Gradients" (within 5%); the score gap is computed here, not taken from the method.
    from pellucid.demo.net import TILE_MEAN, TILE_STD

    model = _demo_model()
    x = _demo_tile("crack", tagged=True)
    amap = compute_attribution("integrated_gradients", model, x, normalization=Normalization.of(TILE_MEAN, TILE_STD))
    gap = _black_score_gap(model, x, TILE_MEAN, TILE_STD, amap.target)
    assert abs(float(amap.raw.astype(np.float64).sum()) - gap) <= 0.05 * abs(gap)
    assert "warning" not in amap.extras


@pytest.mark.imagenet
def test_integrated_gradients_defaults_complete_on_bundled_imagenet_model():
    # Source: as above, on the bundled EfficientNet-Lite0 with scikit-image's chelsea.png.
    pytest.importorskip("efficientnet_lite_pytorch", reason="needs the optional imagenet extra")
    skimage_data = pytest.importorskip("skimage.data")
    import io

    from PIL import Image

    from pellucid.core.model.bundled import bundled_spec_path
    from pellucid.core.model.loading import load_model
    from pellucid.core.model.preprocess import prepare, read_image

    lm = load_model(bundled_spec_path("efficientnet-lite0"))
    buf = io.BytesIO()
    Image.fromarray(skimage_data.chelsea()).save(buf, format="PNG")
    x = prepare(lm.spec, read_image(buf.getvalue())).tensor
    mean, std = lm.spec.preprocess.mean, lm.spec.preprocess.std
    amap = compute_attribution("integrated_gradients", lm.module, x, normalization=Normalization.of(mean, std))
    gap = _black_score_gap(lm.module, x, mean, std, amap.target)
    assert abs(float(amap.raw.astype(np.float64).sum()) - gap) <= 0.05 * abs(gap)
    assert amap.extras["steps_used"] >= 32 and "warning" not in amap.extras


def test_integrated_gradients_completeness_on_small_cnn(cnn, image):
    # Source: Sundararajan, Taly, Yan, ICML 2017, Prop. 1 (completeness): Σ IG = F(x) − F(x′);
    # within 1% at 64 steps for this small ReLU network.
    norm = Normalization.of((0.5, 0.5, 0.5), (0.25, 0.25, 0.25))
    for kind in ("black", "blur", "zero"):
        amap = compute_attribution("integrated_gradients", cnn, image, params={"baseline": kind, "steps": 64},
                                   normalization=norm)
        assert amap.extras["completeness_error"] < 0.01, kind
        delta = amap.extras["score_input"] - amap.extras["score_baseline"]
        assert math.isclose(float(amap.raw.astype(np.float64).sum()), delta, rel_tol=0.01)


def test_integrated_gradients_completeness_on_demo_model():
    # Source: Sundararajan, Taly, Yan, ICML 2017, Prop. 1 — completeness within 1% at ≥ 64 steps,
    # black baseline (the paper's choice for images) through the demo spec's mean/std.
    from pellucid.demo.net import TILE_MEAN, TILE_STD

    model = _demo_model()
    x = _demo_tile("crack", tagged=True)
    amap = compute_attribution("integrated_gradients", model, x, params={"steps": 64},
                               normalization=Normalization.of(TILE_MEAN, TILE_STD))
    assert amap.extras["completeness_error"] < 0.01
    assert "warning" not in amap.extras


def test_black_baseline_is_black_after_normalisation():
    # common practice, no source: a black pixel after Normalize is (0 − mean) / std per channel.
    norm = Normalization.of((0.5, 0.25), (0.5, 0.25))
    from pellucid.core.attribution.baselines import make_baseline

    base = make_baseline(torch.zeros(1, 2, 2, 2), "black", normalization=norm)
    assert base[0, :, 0, 0].tolist() == [-1.0, -1.0]
    grey = make_baseline(torch.zeros(1, 2, 2, 2), "constant", normalization=norm, value=0.5)
    assert grey[0, :, 0, 0].tolist() == [0.0, 1.0]


def test_integrated_gradients_custom_baseline(linear_case):
    # Sundararajan et al., ICML 2017, Eq. 1 on a linear score: IG = w ⊙ (x − x′).
    model, w, x = linear_case
    ref = torch.full_like(x, 0.2)
    amap = compute_attribution("integrated_gradients", model, x, target=0,
                               params={"baseline": "custom", "steps": 3}, baseline_input=ref)
    np.testing.assert_allclose(amap.raw, (w * (x - ref))[0].detach().numpy(), rtol=1e-5, atol=1e-6)


# ---------------------------------------------------------------------------------------------
# stochastic methods


@pytest.mark.parametrize("name,params", [
    ("smoothgrad", {"samples": 7, "batch_size": 3}),
    ("rise", {"masks": 50, "batch_size": 16}),
])
def test_stochastic_methods_reproducible_with_seed(cnn, image, name, params):
    # common practice, no source: the seed fixes the map; another seed changes it; batching does not.
    a = compute_attribution(name, cnn, image, params={**params, "seed": 11})
    b = compute_attribution(name, cnn, image, params={**params, "seed": 11, "batch_size": 1})
    c = compute_attribution(name, cnn, image, params={**params, "seed": 12})
    assert a.params["seed"] == 11
    np.testing.assert_allclose(a.map, b.map, rtol=1e-5, atol=1e-7)
    assert not np.allclose(a.map, c.map)


def test_rise_masks_follow_the_paper():
    # Source: Petsiuk, Das, Saenko, "RISE", BMVC 2018 — binary s×s grids upsampled bilinearly,
    # then a shifted H×W crop: values in [0, 1], the mean close to p.
    gen = torch.Generator().manual_seed(0)
    masks = rise_masks(400, 7, 0.5, (20, 30), gen)
    assert masks.shape == (400, 1, 20, 30)
    assert float(masks.min()) >= 0.0 and float(masks.max()) <= 1.0
    assert abs(float(masks.mean()) - 0.5) < 0.05


def test_rise_finds_the_only_region_that_matters():
    # Source: Petsiuk et al., BMVC 2018 — saliency is the score averaged over masks that keep a
    # pixel; a model that only looks at the top-left quarter must rank that quarter highest.
    class Corner(nn.Module):
        def forward(self, x):
            s = x[:, :, :8, :8].mean(dim=(1, 2, 3)) * 6 - 3
            return torch.stack([s, -s], dim=1)

    x = torch.ones(1, 3, 16, 16)
    amap = compute_attribution("rise", Corner(), x, target=0, params={"masks": 300})
    assert amap.map[:8, :8].mean() > amap.map[8:, 8:].mean() + 0.05


class _Corner(nn.Module):
    """Only the top-left quarter of a 16×16 input matters to class 0."""

    def forward(self, x):
        s = x[:, :, :8, :8].mean(dim=(1, 2, 3)) * 6 - 3
        return torch.stack([s, -s], dim=1)


class _Ramp(nn.Module):
    """Class 0's score grows with the columns: each column matters more than the one to its left."""

    def forward(self, x):
        ramp = torch.linspace(0, 1, x.shape[-1]).view(1, 1, 1, -1)
        s = (x * ramp).mean(dim=(1, 2, 3)) * 8 - 2
        return torch.stack([s, -s], dim=1)


def test_rise_stops_when_two_halves_agree_and_reports_it():
    # Source: Petsiuk, Das, Saenko, BMVC 2018 — saliency = (1/(p·N)) Σ f(I ⊙ Mᵢ) Mᵢ. The masks are
    # regenerated here from the documented draw order (all grids, then all shifts, one seeded
    # generator); the halves (even and odd draws), their centred sums and their Spearman
    # correlation are computed here with scipy, independently of the method's own bookkeeping.
    from scipy.stats import spearmanr

    from pellucid.core.attribution.rise import CHECK_EVERY, MIN_MASKS

    x = torch.ones(1, 3, 16, 16)
    cap, seed, s, p = 4000, 5, 7, 0.5
    amap = compute_attribution("rise", _Ramp(), x, target=0, params={"masks": cap, "seed": seed})
    used = amap.extras["masks_used"]
    assert amap.extras["converged"] and used < cap
    assert (used - MIN_MASKS) % CHECK_EVERY == 0  # checks at 256, 384, …: independent of the batch size
    gen = torch.Generator().manual_seed(seed)
    cells = (torch.rand((cap, s, s), generator=gen) < p).float()
    shifts = torch.stack([torch.randint(0, 3, (cap,), generator=gen), torch.randint(0, 3, (cap,), generator=gen)], 1)

    def halves(n):
        masks = rise_masks(n, s, p, (16, 16), gen, cells=cells[:n], shifts=shifts[:n])[:, 0].double()
        with torch.no_grad():
            f = torch.softmax(_Ramp()(x * masks.unsqueeze(1).float()).double(), 1)[:, 0]
        fbar = f.mean()
        parts = [((f[k::2] - fbar).view(-1, 1, 1) * masks[k::2]).sum(0) for k in (0, 1)]
        return f, masks, parts

    f, masks, (a, b) = halves(used)
    rho = spearmanr(a.flatten().numpy(), b.flatten().numpy()).statistic
    assert amap.extras["halves_spearman"] == pytest.approx(rho, abs=1e-9) and rho >= 0.95
    if used > MIN_MASKS:  # the check before did not yet agree, so it stopped at the first chance
        _, _, (a0, b0) = halves(used - CHECK_EVERY)
        assert spearmanr(a0.flatten().numpy(), b0.flatten().numpy()).statistic < 0.95
    assert [h["masks"] for h in amap.extras["agreement_history"]][-1] == used
    # the map: the centred sum / (p·N) plus the mean score, which has the paper's expectation
    centred = ((f - f.mean()).view(-1, 1, 1) * masks).sum(0) / (p * used) + f.mean()
    np.testing.assert_allclose(amap.map, centred.numpy(), rtol=1e-5, atol=1e-6)
    paper = (f.view(-1, 1, 1) * masks).sum(0) / (p * used)
    assert spearmanr(paper.flatten().numpy(), centred.flatten().numpy()).statistic > 0.9
    assert amap.map[:, 12:].mean() > amap.map[:, :4].mean()  # the right columns matter most


def test_rise_without_agreement_draws_every_mask_and_warns():
    x = torch.ones(1, 3, 16, 16)
    amap = compute_attribution("rise", _Corner(), x, target=0, params={"masks": 300, "agreement": 1.0})
    assert amap.extras["masks_used"] == 300 and not amap.extras["converged"]
    assert "raise 'masks'" in amap.warning


def test_occlusion_wrapper_matches_the_occlusion_module(cnn, image):
    from pellucid.core.occlusion.engine import occlusion_map

    amap = compute_attribution("occlusion", cnn, image, target=1, params={"patch": 4, "stride": 2})
    direct = occlusion_map(cnn, image, target=1, patch=4, stride=2, baseline="mean")
    np.testing.assert_allclose(amap.map, direct.drop, rtol=1e-6, atol=1e-7)
    assert amap.extras["engine"] == direct.engine and amap.signed


# ---------------------------------------------------------------------------------------------
# bad input


@pytest.mark.parametrize("name,params,match", [
    ("integrated_gradients", {"steps": 0}, "'steps' must be an integer from 1 to 4096; received 0"),
    ("integrated_gradients", {"steps": "many"}, "received 'many'"),
    ("integrated_gradients", {"steps": 2.5}, "received 2.5"),
    ("integrated_gradients", {"rule": "left"}, "one of 'right', 'trapezoid'"),
    ("smoothgrad", {"noise": -0.1}, "'noise' must be a finite number from 0 to 5"),
    ("smoothgrad", {"noise": float("nan")}, "received nan"),
    ("smoothgrad", {"noise": "inf"}, "received 'inf'"),
    ("smoothgrad", {"samples": True}, "received True"),
    ("rise", {"keep": 1.0}, "'keep'"),
    ("saliency", {"steps": 3}, "unknown parameter.*'steps'.*known parameters: none"),
    ("rise", {"mask": 3}, "unknown parameter.*'mask'.*known parameters: masks, grid"),
])
def test_bad_parameters_are_rejected_in_plain_words(cnn, image, name, params, match):
    with pytest.raises(BadParameterError, match=match):
        compute_attribution(name, cnn, image, params=params)


def test_cli_strings_are_coerced(cnn, image):
    amap = compute_attribution("smoothgrad", cnn, image, params={"samples": "3", "noise": "0.1", "seed": "4"})
    assert amap.params["samples"] == 3 and amap.params["noise"] == 0.1 and amap.params["seed"] == 4


@pytest.mark.parametrize("target", [3, -1, 1.5, "x"])
def test_target_out_of_range(cnn, image, target):
    with pytest.raises(BadParameterError, match="class index"):
        compute_attribution("saliency", cnn, image, target=target)


def test_bad_input_and_unknown_method(cnn, image):
    with pytest.raises(BadParameterError, match=r"\(1, C, H, W\)"):
        compute_attribution("saliency", cnn, image[0])
    with pytest.raises(BadParameterError, match="NaN"):
        compute_attribution("saliency", cnn, image * float("nan"))
    with pytest.raises(UnknownMethodError, match="known methods: gradcam, saliency") as info:
        compute_attribution("guided", cnn, image)
    assert isinstance(info.value, ValueError)
    with pytest.raises(BadParameterError, match="output_kind"):
        compute_attribution("saliency", cnn, image, output_kind="probit")


def test_black_baseline_without_normalisation_explains_what_to_pass(cnn, image):
    with pytest.raises(BadParameterError, match=r"mean and std.*Normalization.of"):
        compute_attribution("integrated_gradients", cnn, image)
    with pytest.raises(BadParameterError, match="baseline tensor"):
        compute_attribution("integrated_gradients", cnn, image, params={"baseline": "custom"})


def test_duplicate_registration_is_a_value_error():
    with pytest.raises(ValueError, match="already registered"):
        register(Method(name="saliency", title="x", fn=get_method("saliency").fn, schema=ParamSchema(()),
                        description="", reference="", signed=False, cost=lambda p, s: 1.0))


def test_public_surface_is_pinned():
    # common practice, no source: the package's public names are declared once and kept stable.
    from pellucid.core import attribution

    assert sorted(attribution.__all__) == sorted([
        "AttributionMap", "Context", "Curve", "FaithfulnessResult", "Method", "Normalization", "Param",
        "ParamSchema", "SanityResult", "SanityStep", "UnknownMethodError", "check_request", "compute_attribution",
        "conv_like_layers", "faithfulness", "get_method", "list_methods", "method_names", "rank_methods",
        "register", "sanity_check",
    ])
    assert all(hasattr(attribution, name) for name in attribution.__all__)


def test_float64_image_on_float32_model(cnn, image):
    # common practice, no source: a double-precision image is cast to the weights' dtype.
    a = compute_attribution("saliency", cnn, image.double())
    b = compute_attribution("saliency", cnn, image)
    np.testing.assert_allclose(a.map, b.map, rtol=1e-6)
