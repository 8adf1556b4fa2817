"""The probe, activation maps and the conv facts they rest on."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
import scipy.special
import torch
from torch import nn

from pellucid.core.errors import UnsupportedLayerError
from pellucid.core.views.activations import activation_maps, activations_with_prediction
from pellucid.core.views.predict import predict
from pellucid.core.views.probe import Probe, count_hooks


def net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(3, 6, 3), nn.ReLU(), nn.MaxPool2d(2), nn.Conv2d(6, 8, 3), nn.ReLU(),
                         nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 5)).eval()


def test_probe_leaves_outputs_bit_identical_and_no_hooks():
    model, x = net(), torch.randn(2, 3, 20, 20)
    with torch.inference_mode():
        before = model(x)
        with Probe(model, ["0", "3", "7"]) as probe:
            during = model(x)
        after = model(x)
    assert torch.equal(before, during) and torch.equal(before, after)
    assert set(probe.outputs) == {"0", "3", "7"} and probe.outputs["3"].shape == (2, 8, 7, 7)
    assert count_hooks(model) == 0


def test_probe_removes_hooks_after_an_exception():
    model = net()
    with pytest.raises(RuntimeError):
        with Probe(model, ["0", "3"]):
            model(torch.randn(1, 4, 20, 20))  # wrong channel count raises inside the block
    assert count_hooks(model) == 0


def test_unknown_layer_suggests_close_names():
    with pytest.raises(UnsupportedLayerError, match="no layer named 'O'"):
        Probe(net(), ["O"])


def test_single_channel_conv_equals_correlate2d():
    # Deep-learning "convolution" is cross-correlation (common practice, no source).
    rng = np.random.default_rng(0)
    image, kernel = rng.normal(size=(12, 12)), rng.normal(size=(3, 3))
    conv = nn.Conv2d(1, 1, 3, bias=False)
    with torch.no_grad():
        conv.weight.copy_(torch.tensor(kernel)[None, None])
    model = nn.Sequential(conv).double().eval()
    maps = activation_maps(model, torch.tensor(image)[None, None], layer="0").maps
    # atol allows for the maps being float32
    np.testing.assert_allclose(maps[0], scipy.signal.correlate2d(image, kernel, mode="valid"), atol=1e-5)


def _one_kernel(kernel: list[list[float]]) -> nn.Module:
    k = torch.tensor(kernel, dtype=torch.float64)
    conv = nn.Conv2d(1, 1, k.shape, bias=False).double()
    with torch.no_grad():
        conv.weight.copy_(k[None, None])
    return nn.Sequential(conv).eval()


def test_central_difference_sees_vertical_edges_only():
    # A 1×3 central-difference kernel responds to vertical edges (common practice, no source).
    model = _one_kernel([[-1.0, 0.0, 1.0]])
    vertical = torch.zeros(1, 1, 10, 10, dtype=torch.float64)
    vertical[..., 5:] = 1.0  # a step from left to right
    horizontal = vertical.transpose(2, 3).contiguous()
    assert activation_maps(model, vertical, layer="0").maps.max() == pytest.approx(1.0)
    assert np.abs(activation_maps(model, horizontal, layer="0").maps).max() == 0.0


def test_box_kernel_keeps_a_constant_image():
    # A kernel whose weights sum to 1 leaves a constant image unchanged away from the border
    # (common practice, no source).
    model = _one_kernel([[1 / 9] * 3] * 3)
    maps = activation_maps(model, torch.full((1, 1, 9, 9), 0.7, dtype=torch.float64), layer="0").maps
    np.testing.assert_allclose(maps, 0.7, atol=1e-6)


def test_valid_conv_and_pool_shapes():
    # 'valid' 5×5 conv on 28×28 → 24×24; 2×2 max-pool halves each side (common practice, no source).
    model = nn.Sequential(nn.Conv2d(1, 2, 5), nn.MaxPool2d(2)).eval()
    x = torch.randn(1, 1, 28, 28)
    assert activation_maps(model, x, layer="0").maps.shape == (2, 24, 24)
    assert activation_maps(model, x, layer="1").maps.shape == (2, 12, 12)


def test_softmax_matches_scipy():
    # Source: scipy.special.softmax, the reference implementation's documented definition.
    model, x = net(), torch.randn(1, 3, 20, 20)
    pred = predict(model, x, labels=list("abcde"), k=5)
    with torch.inference_mode():
        logits = model(x).numpy()[0]
    np.testing.assert_allclose(pred.probabilities, scipy.special.softmax(logits), rtol=1e-6)
    assert [c.index for c in pred.top] == list(np.argsort(-logits))
    expected_entropy = -(scipy.special.softmax(logits) * np.log2(scipy.special.softmax(logits))).sum()
    assert pred.entropy_bits == pytest.approx(expected_entropy, rel=1e-5)
    assert pred.margin == pytest.approx(pred.top[0].probability - pred.top[1].probability)


def test_activations_and_prediction_from_one_pass():
    model, x = net(), torch.randn(1, 3, 20, 20)
    acts, pred = activations_with_prediction(model, x, layer="3", labels=list("abcde"), k=3)
    assert acts.maps.shape == (8, 7, 7) and len(pred.top) == 3
    assert list(acts.order("max")) == list(np.argsort(-acts.maps.reshape(8, -1).max(1), kind="stable"))
    dense = activation_maps(model, x, layer="7")
    assert dense.maps.shape == (5, 1, 1)
