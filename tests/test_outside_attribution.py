"""Every attribution method against its published definition, written out here with torch.autograd.

Each reference below calls the model and ``torch.autograd.grad`` directly, one input at a time,
and never Pellucid's helpers (its gradient helper, baselines, quadrature or masks). The models are
ResNet-18 (torchvision's builder, seeded weights and batch-norm statistics) at a reduced,
non-square input, and the trained demo model on a real sample, also cut to a non-square size.
Both run in float64 here: in float32 the CPU convolutions of a batch and of a single image round
differently (about 1e-3 of the map's range for IG on the random ResNet), which would hide a small
error; in float64 the method and its reference agree to rounding. Occlusion has its own file
(test_outside_occlusion.py), in float32.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
import torchvision
from torch import nn

from pellucid.core.attribution import Normalization, compute_attribution
from pellucid.core.model.loading import load_model
from pellucid.core.model.preprocess import prepare, read_image

REPO = Path(__file__).resolve().parents[1]
# Source: torchvision's model documentation, ImageNet weights transforms (mean, std on 0–1 pixels).
IMAGENET_MEAN = (0.485, 0.456, 0.406)
IMAGENET_STD = (0.229, 0.224, 0.225)
REL_TOL = 1e-7  # float64 rounding between a batch and single images, as a share of the map's range


@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def _random_bn(model: nn.Module, seed: int) -> nn.Module:
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
                m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
                m.weight.copy_(torch.rand(m.num_features, generator=g) + 0.5)
                m.bias.copy_(torch.rand(m.num_features, generator=g) * 0.4 - 0.2)
    return model.eval()


@pytest.fixture(scope="module")
def resnet():
    torch.manual_seed(0)
    model = _random_bn(torchvision.models.resnet18(num_classes=10), seed=1).double()
    x = torch.randn(1, 3, 48, 40, generator=torch.Generator().manual_seed(2), dtype=torch.float64)
    return model, x, 3, Normalization.of(IMAGENET_MEAN, IMAGENET_STD)


@pytest.fixture(scope="module")
def tile():
    spec = REPO / "demo_models" / "tilenet" / "spec.toml"
    sample = REPO / "demo_models" / "tilenet" / "samples" / "chip_tagged_01.png"
    if not spec.is_file() or not sample.is_file():
        pytest.skip("demo_models/tilenet is not built")
    loaded = load_model(spec)
    model = loaded.module.double()
    x = prepare(loaded.spec, read_image(sample)).tensor[:, :, 4:92, :].double().contiguous()  # 88×96
    with torch.no_grad():
        target = int(model(x).argmax())
    norm = Normalization.of(loaded.spec.preprocess.mean, loaded.spec.preprocess.std)
    return model, x, target, norm


CASES = ["resnet", "tile"]


@pytest.fixture(params=CASES)
def case(request):
    return request.getfixturevalue(request.param)


def gradient_by_hand(model: nn.Module, z: torch.Tensor, target: int) -> tuple[torch.Tensor, float]:
    """∂S_target/∂z and S_target for one input (1, C, H, W); S is the score before softmax."""
    z = z.detach().clone().requires_grad_(True)
    score = model(z)[0, target]
    (grad,) = torch.autograd.grad(score, z)
    return grad.detach(), float(score.detach())


def black_by_hand(x: torch.Tensor, norm: Normalization) -> torch.Tensor:
    # A black pixel (0 on the 0–1 scale) after Normalize: (0 − mean) / std per channel.
    mean = torch.tensor(norm.mean).view(1, -1, 1, 1)
    std = torch.tensor(norm.std).view(1, -1, 1, 1)
    return ((0.0 - mean) / std).expand_as(x).to(x.dtype)


def assert_close(ours: np.ndarray, reference: np.ndarray, what: str) -> None:
    reference = np.asarray(reference, dtype=np.float64)
    assert ours.shape == reference.shape, f"{what}: shape {ours.shape} against {reference.shape}"
    scale = float(np.abs(reference).max())
    assert scale > 0, f"{what}: the reference is zero everywhere, so the comparison would mean nothing"
    diff = float(np.abs(ours.astype(np.float64) - reference).max())
    assert diff <= REL_TOL * scale, f"{what}: max |difference| {diff:.3g} on a scale of {scale:.3g}"


# ---------------------------------------------------------------------------------------------
# Gradients


def test_saliency_is_the_largest_absolute_gradient(case):
    model, x, target, _ = case
    # Source: Simonyan, Vedaldi, Zisserman, "Deep Inside Convolutional Networks", arXiv:1312.6034
    # (2013), §3.1: w = ∂S_c/∂I at the image; the map is max over colour channels of |w|.
    grad, _ = gradient_by_hand(model, x, target)
    amap = compute_attribution("saliency", model, x, target=target)
    assert_close(amap.map, grad[0].abs().amax(dim=0).numpy(), "saliency")
    assert not amap.signed


def test_gradient_times_input(case):
    model, x, target, _ = case
    # Source: Shrikumar et al., "Learning Important Features Through Propagating Activation
    # Differences", ICML 2017, §2 (gradient × input); summed over channels for one map.
    grad, _ = gradient_by_hand(model, x, target)
    amap = compute_attribution("gradient_x_input", model, x, target=target)
    assert_close(amap.map, (grad * x)[0].sum(dim=0).numpy(), "gradient × input")
    assert amap.signed


# ---------------------------------------------------------------------------------------------
# Integrated Gradients


def integrated_gradients_by_hand(model, x, baseline, target, steps, rule) -> torch.Tensor:
    # Source: Sundararajan, Taly, Yan, "Axiomatic Attribution for Deep Networks", ICML 2017, Eq. 3
    # (right Riemann sum over k = 1…m); the trapezoid rule halves the weights of α = 0 and α = 1.
    total = torch.zeros_like(x, dtype=torch.float64)
    ks = range(1, steps + 1) if rule == "right" else range(0, steps + 1)
    for k in ks:
        weight = 1.0 / steps
        if rule == "trapezoid" and k in (0, steps):
            weight /= 2
        grad, _ = gradient_by_hand(model, baseline + (k / steps) * (x - baseline), target)
        total += weight * grad.double()
    return ((x - baseline).double() * total)[0]


@pytest.mark.parametrize("rule", ["right", "trapezoid"])
def test_integrated_gradients_equal_the_riemann_sum(case, rule):
    model, x, target, norm = case
    baseline = black_by_hand(x, norm)
    reference = integrated_gradients_by_hand(model, x, baseline, target, 16, rule)
    amap = compute_attribution("integrated_gradients", model, x, target=target, normalization=norm,
                               params={"steps": 16, "max_steps": 16, "rule": rule, "baseline": "black",
                                       "batch_size": 5})
    assert_close(amap.raw, reference.numpy(), f"IG per channel ({rule})")
    assert_close(amap.map, reference.sum(dim=0).numpy(), f"IG map ({rule})")


def test_integrated_gradients_completeness(case):
    model, x, target, norm = case
    # Source: Sundararajan, Taly, Yan, ICML 2017, Prop. 1 (completeness): the attributions add up
    # to F(x) − F(x′). F here is computed by calling the model in the test, not taken from IG.
    baseline = black_by_hand(x, norm)
    with torch.no_grad():
        f_x = float(model(x)[0, target])
        f_base = float(model(baseline)[0, target])
    delta = f_x - f_base
    assert abs(delta) > 0.1, "the baseline must score differently for the check to mean anything"
    amap = compute_attribution("integrated_gradients", model, x, target=target, normalization=norm,
                               params={"steps": 64, "baseline": "black", "batch_size": 32})
    total = float(amap.raw.astype(np.float64).sum())
    # Same paper, §"Computing Integrated Gradients": 20–300 steps get within 5%.
    our_error = abs(total - delta) / abs(delta)
    assert our_error <= 0.05, (total, delta)
    # What IG reports about itself must agree with the test's own F values.
    assert amap.extras["score_input"] == pytest.approx(f_x, rel=1e-5, abs=1e-5)
    assert amap.extras["score_baseline"] == pytest.approx(f_base, rel=1e-5, abs=1e-5)
    assert amap.extras["completeness_error"] == pytest.approx(our_error, rel=1e-3, abs=1e-5)


# ---------------------------------------------------------------------------------------------
# SmoothGrad and RISE (their random draws follow the order their modules document)


def test_smoothgrad_is_the_mean_noisy_gradient(case):
    model, x, target, _ = case
    # Source: Smilkov et al., "SmoothGrad: removing noise by adding noise", arXiv:1706.03825 (2017),
    # Eq. 3: the mean of ∂S_c/∂x at x + N(0, σ²), σ a share of the input's range. The draws are one
    # standard normal tensor per copy from a generator seeded with the seed, in order (documented).
    samples, noise, seed = 6, 0.15, 11
    sigma = noise * float(x.max() - x.min())
    gen = torch.Generator().manual_seed(seed)
    total = torch.zeros_like(x, dtype=torch.float64)
    for _ in range(samples):
        eps = torch.randn(x.shape[1:], generator=gen, dtype=x.dtype).unsqueeze(0)
        grad, _ = gradient_by_hand(model, x + sigma * eps, target)
        total += grad.double()
    mean = total / samples
    amap = compute_attribution("smoothgrad", model, x, target=target,
                               params={"samples": samples, "noise": noise, "seed": seed, "batch_size": 4})
    assert_close(amap.raw, mean[0].numpy(), "SmoothGrad mean gradient")
    assert_close(amap.map, mean[0].abs().amax(dim=0).numpy(), "SmoothGrad map")


def test_rise_is_the_mask_weighted_probability(case):
    model, x, target, _ = case
    # Source: Petsiuk, Das, Saenko, "RISE", BMVC 2018, Eq. 6 and §3.2: S = 1/(p·N) Σ f(I ⊙ Mᵢ) Mᵢ,
    # masks from a binary s×s grid (keep probability p), upsampled bilinearly to (s + 1)·⌈H/s⌉ ×
    # (s + 1)·⌈W/s⌉ and cropped at a random shift below one cell. Draw order as documented: all
    # grids, then row shifts, then column shifts, from one generator seeded with the seed.
    n, s, p, seed = 24, 5, 0.5, 7
    _, _, h, w = x.shape
    gen = torch.Generator().manual_seed(seed)
    cells = (torch.rand((n, s, s), generator=gen) < p).float()
    ch, cw = math.ceil(h / s), math.ceil(w / s)
    dys = torch.randint(0, ch, (n,), generator=gen)
    dxs = torch.randint(0, cw, (n,), generator=gen)
    total = torch.zeros((h, w), dtype=torch.float64)
    mask_sum = torch.zeros((h, w), dtype=torch.float64)
    probs = []
    with torch.no_grad():
        for i in range(n):
            big = F.interpolate(cells[i][None, None], size=((s + 1) * ch, (s + 1) * cw), mode="bilinear",
                                align_corners=False)[0, 0]
            mask = big[int(dys[i]):int(dys[i]) + h, int(dxs[i]):int(dxs[i]) + w]
            prob = float(torch.softmax(model(x * mask).double(), dim=1)[0, target])
            probs.append(prob)
            total += prob * mask.double()
            mask_sum += mask.double()
    amap = compute_attribution("rise", model, x, target=target,
                               params={"masks": n, "grid": s, "keep": p, "seed": seed, "batch_size": 10,
                                       "agreement": 1.0})
    # The paper's sum minus the control variate f̄·(Σ Mᵢ/(p·N) − 1), f̄ the mean score (rise.py's
    # docstring; a control variate has expectation zero because every mask pixel has mean p).
    # Common practice in Monte Carlo estimation, no source.
    f_mean = sum(probs) / n
    centred = total / (p * n) - f_mean * (mask_sum / (p * n) - 1.0)
    assert_close(amap.map, centred.numpy(), "RISE")
    # Expectation check: the control variate's own mean over the pixels is near zero (masks keep
    # about p of the pixels), so the two estimators agree on average (Eq. 6 of the paper).
    assert abs(float((mask_sum / (p * n)).mean()) - 1.0) < 0.25


# ---------------------------------------------------------------------------------------------
# Grad-CAM


def _last_feature_map(model: nn.Module) -> tuple[nn.Module, nn.Linear]:
    """The module whose output feeds global pooling, and the linear head (for these two models)."""
    if isinstance(model, torchvision.models.ResNet):
        return model.layer4, model.fc
    return model.features, model.head


def test_gradcam_by_hook_and_autograd(case):
    model, x, target, _ = case
    # Source: Selvaraju et al., "Grad-CAM", ICCV 2017, §3, Eq. 1–2: αₖ = (1/Z) Σᵢⱼ ∂y_c/∂Aᵏᵢⱼ,
    # L = ReLU(Σₖ αₖ Aᵏ), upsampled bilinearly to the input.
    layer, _ = _last_feature_map(model)
    seen = {}
    handle = layer.register_forward_hook(lambda _m, _i, out: seen.__setitem__("a", out))
    try:
        z = x.detach().clone().requires_grad_(True)
        score = model(z)[0, target]
        (grad,) = torch.autograd.grad(score, seen["a"])
    finally:
        handle.remove()
    act = seen["a"].detach()
    low = torch.relu((grad.mean(dim=(2, 3), keepdim=True) * act).sum(dim=1))[0]
    up = F.interpolate(low[None, None], size=x.shape[-2:], mode="bilinear", align_corners=False)[0, 0]
    amap = compute_attribution("gradcam", model, x, target=target)
    assert_close(amap.raw, low.numpy(), "Grad-CAM at the layer")
    assert_close(amap.map, up.numpy(), "Grad-CAM upsampled")


def test_gradcam_equals_cam_over_z(case):
    model, x, target, _ = case
    # Source: Selvaraju et al., ICCV 2017, §3.1: with global average pooling and a linear head,
    # αₖ = w_k^c / Z, so Grad-CAM = ReLU(CAM) / Z, CAM = Σₖ w_k^c Aᵏ (Zhou et al., "Learning Deep
    # Features for Discriminative Localization", CVPR 2016). No gradient is taken here.
    layer, head = _last_feature_map(model)
    seen = {}
    handle = layer.register_forward_hook(lambda _m, _i, out: seen.__setitem__("a", out.detach()))
    try:
        with torch.no_grad():
            model(x)
    finally:
        handle.remove()
    act = seen["a"][0]
    z = act.shape[1] * act.shape[2]
    cam = torch.einsum("k,khw->hw", head.weight[target].detach(), act)
    amap = compute_attribution("gradcam", model, x, target=target)
    assert_close(amap.raw, (torch.relu(cam) / z).numpy(), "Grad-CAM against CAM / Z")
