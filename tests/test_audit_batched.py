"""Audits batch the gradient methods: one forward and one backward for a shard of images.

References computed here, one image at a time, with plain autograd: Grad-CAM (Selvaraju et al.,
"Grad-CAM", ICCV 2017, §3: αₖ = mean over the map of ∂y_c/∂Aᵏ, map = ReLU(Σₖ αₖ Aᵏ), upsampled
bilinearly), gradient saliency (Simonyan, Vedaldi, Zisserman, arXiv:1312.6034, 2013, §3: max over
channels of |∂S_c/∂x|) and gradient × input (Σ over channels of x ⊙ ∂S_c/∂x).
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
import torch
import torch.nn.functional as F
import torchvision
from PIL import Image
from torch import nn

from pellucid.core.attribution.batched import batched_maps
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.audit.worker import audit_image, audit_images
from pellucid.core.model.loading import load_model


def _resnet() -> nn.Module:
    torch.manual_seed(0)
    model = torchvision.models.resnet18(num_classes=5).eval()
    g = torch.Generator().manual_seed(1)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
                m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
    return model


def _by_hand(model: nn.Module, x: torch.Tensor, target: int, method: str) -> np.ndarray:
    """One image (1, C, H, W): the map by plain autograd (Grad-CAM at ResNet's layer4 output)."""
    store = {}
    handle = model.layer4.register_forward_hook(lambda _m, _i, out: store.__setitem__("a", out))
    xg = x.clone().requires_grad_(True)
    try:
        score = model(xg)[0, target]
    finally:
        handle.remove()
    if method == "gradcam":
        (g,) = torch.autograd.grad(score, store["a"])
        cam = torch.relu((g.mean(dim=(2, 3), keepdim=True) * store["a"]).sum(1, keepdim=True))
        return F.interpolate(cam, size=x.shape[-2:], mode="bilinear", align_corners=False)[0, 0].detach().numpy()
    (g,) = torch.autograd.grad(score, xg)
    if method == "saliency":
        return g[0].abs().amax(0).numpy()
    return (g * x)[0].sum(0).detach().numpy()


@pytest.mark.parametrize("method", ["gradcam", "saliency", "gradient_x_input"])
def test_batched_maps_equal_one_image_at_a_time(method):
    model = _resnet()
    xb = torch.randn(5, 3, 64, 64, generator=torch.Generator().manual_seed(2))
    wanted = [3, 0, 4, 1, 2]
    res = batched_maps(method, model, xb, choose_targets=lambda logits: wanted)
    assert res.targets == wanted and len(res.maps) == 5
    with torch.no_grad():
        np.testing.assert_allclose(res.logits.numpy(), model(xb).numpy(), rtol=1e-5, atol=1e-5)
    if method == "gradcam":
        # the feature map feeding ResNet's pooled head: the last block's output, which is layer4's
        assert res.params["layer"] == "layer4.1"
    for b in range(5):
        ref = _by_hand(model, xb[b : b + 1], wanted[b], method)
        scale = max(float(np.abs(ref).max()), 1e-6)
        assert float(np.abs(res.maps[b] - ref).max()) <= 1e-4 * scale, (method, b)


def test_targets_are_chosen_from_the_same_forward():
    model = _resnet()
    xb = torch.randn(3, 3, 48, 48, generator=torch.Generator().manual_seed(3))
    seen = {}

    def top1(logits: torch.Tensor) -> list[int]:
        seen["logits"] = logits.clone()
        return logits.argmax(1).tolist()

    res = batched_maps("saliency", model, xb, choose_targets=top1)
    assert torch.equal(seen["logits"], res.logits) and res.targets == res.logits.argmax(1).tolist()


def _items(folder, count: int, labels) -> list[dict]:
    items = []
    rng = np.random.default_rng(4)
    for i in range(count):
        path = folder / f"img-{i}.png"
        Image.fromarray(rng.integers(0, 256, (40, 40, 3), dtype=np.uint8)).save(path)
        data = path.read_bytes()
        items.append({"index": i, "rel": path.name, "path": str(path), "sha256": hashlib.sha256(data).hexdigest(),
                      "label": labels[i % len(labels)]})
    return items


@pytest.mark.parametrize("method,target", [("gradcam", "label"), ("saliency", "predicted")])
def test_an_audit_shard_gives_the_one_image_outcomes(tmp_path, tiny_spec, method, target):
    model = load_model(tiny_spec)
    settings = AuditSettings(method=method, target=target)
    items = _items(tmp_path, 5, model.labels)
    items[2]["sha256"] = "0" * 64  # changed on disk after the dataset was read: this one fails alone
    batched = audit_images(model, items, settings)
    single = [audit_image(model, item, settings) for item in items]
    assert [o.status for o in batched] == [o.status for o in single] == ["done", "done", "failed", "done", "done"]
    assert batched[2].data["reason"] == single[2].data["reason"]
    for a, b in zip(batched, single):
        if a.status != "done":
            continue
        assert a.data["target"] == b.data["target"] and a.data["predicted"] == b.data["predicted"]
        assert a.data["map_params"] == b.data["map_params"]
        np.testing.assert_allclose(a.map, b.map, rtol=1e-4, atol=1e-6 * max(1.0, float(np.abs(b.map).max())))
        for key, value in b.data["measures"].items():
            if isinstance(value, float):
                assert a.data["measures"][key] == pytest.approx(value, rel=1e-3, abs=1e-6), key
