"""The cascading-randomisation sanity check (Adebayo et al., NeurIPS 2018, §3.1)."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pytest
import torch
from torch import nn

from pellucid.core.attribution import Method, ParamSchema, register, sanity_check
from pellucid.core.attribution import registry as _registry
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.attribution.sanity import FAIL_SPEARMAN, similarity
from pellucid.core.errors import BadParameterError, Cancelled
from pellucid.core.progress import CancelToken

ROOT = Path(__file__).resolve().parents[1]
DEMO_WEIGHTS = ROOT / "demo_models" / "tilenet" / "tilenet.safetensors"


def _net() -> nn.Module:
    torch.manual_seed(0)
    return nn.Sequential(
        nn.Conv2d(3, 6, 3, padding=1), nn.BatchNorm2d(6), nn.ReLU(),
        nn.Conv2d(6, 8, 3, padding=1), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 3),
    ).eval()


@pytest.fixture()
def image() -> torch.Tensor:
    return torch.randn(1, 3, 12, 12, generator=torch.Generator().manual_seed(4))


@pytest.fixture()
def input_only_method():
    """A test-only 'method' whose map is the input's magnitude: it ignores the weights entirely."""

    def fn(model, x, *, target, params, context, progress, cancel) -> MethodOutput:
        return MethodOutput(map=x[0].abs().sum(0).numpy().astype(np.float32), signed=False)

    name = "_test_input_magnitude"
    register(Method(name=name, title="input magnitude", fn=fn, schema=ParamSchema(()), description="test only",
                    reference="", signed=False, cost=lambda p, s: 0.0, uses_gradients=False))
    yield name
    del _registry._REGISTRY[name]


def test_original_model_is_never_touched(image):
    net = _net()
    net.train()
    before = {k: v.clone() for k, v in net.state_dict().items()}
    sanity_check("saliency", net, image)
    assert net.training
    for k, v in net.state_dict().items():
        assert torch.equal(v, before[k]), k


def test_steps_run_from_the_logits_layer_down(image):
    # Source: Adebayo et al., "Sanity Checks for Saliency Maps", NeurIPS 2018, §3.1 — cascading
    # randomisation starts at the top (logits) layer and proceeds to the input.
    res = sanity_check("gradcam", _net(), image, params={"layer": "3"})
    assert [s.layers for s in res.steps] == [["7"], ["3"], ["1"], ["0"]]
    assert res.params["layer"] == "3"
    assert all(-1.0 <= s.spearman <= 1.0 for s in res.steps)
    grouped = sanity_check("saliency", _net(), image, max_steps=2)
    assert [s.layers for s in grouped.steps] == [["7", "3"], ["1", "0"]]


def test_weight_independent_method_fails(image, input_only_method):
    # Source: Adebayo et al., NeurIPS 2018, §1 and §3 — a map that does not change when the
    # model's weights are randomised cannot explain the model (their edge-detector argument).
    res = sanity_check(input_only_method, _net(), image)
    assert res.verdict == "fail" and not res.passed
    assert all(s.spearman == pytest.approx(1.0) and s.ssim == pytest.approx(1.0) for s in res.steps)
    assert str(FAIL_SPEARMAN) in res.reason


def test_gradient_saliency_passes_on_small_net(image):
    # Source: Adebayo et al., NeurIPS 2018, §3.1, Fig. 2 — gradient maps decorrelate under
    # cascading randomisation.
    res = sanity_check("saliency", _net(), image, seed=1)
    assert res.steps[-1].spearman < FAIL_SPEARMAN and res.verdict == "pass"


def test_seed_makes_it_reproducible(image):
    a = sanity_check("saliency", _net(), image, seed=3)
    b = sanity_check("saliency", _net(), image, seed=3)
    c = sanity_check("saliency", _net(), image, seed=4)
    assert [s.spearman for s in a.steps] == [s.spearman for s in b.steps]
    assert [s.spearman for s in a.steps] != [s.spearman for s in c.steps]
    assert a.seed == 3 and a.to_dict()["steps"][0]["layer"] == "7"


def test_similarity_measures():
    # Source: Adebayo et al., NeurIPS 2018, §2.2 — Spearman of absolute maps and SSIM.
    rng = np.random.default_rng(0)
    a = rng.random((16, 16))
    rho, ssim, note = similarity(a, -a)  # absolute values: the sign does not matter
    assert rho == pytest.approx(1.0) and ssim == pytest.approx(1.0) and note is None
    rho, ssim, _ = similarity(a, rng.random((16, 16)))
    assert abs(rho) < 0.3 and ssim < 0.5
    rho, _, note = similarity(a, np.zeros((16, 16)))
    assert rho == 0.0 and "constant" in note
    rho, ssim, _ = similarity(np.ones((2, 2)), np.ones((2, 2)))
    assert rho == 1.0 and ssim is None


def test_bad_arguments_and_cancel(image):
    with pytest.raises(BadParameterError, match="seed"):
        sanity_check("saliency", _net(), image, seed=-1)
    with pytest.raises(BadParameterError, match="max_steps"):
        sanity_check("saliency", _net(), image, max_steps=0)
    with pytest.raises(BadParameterError, match="unknown attribution method"):
        sanity_check("guided", _net(), image)
    token = CancelToken()
    token.cancel()
    with pytest.raises(Cancelled):
        sanity_check("saliency", _net(), image, cancel=token)
    seen: list[Any] = []
    sanity_check("saliency", _net(), image, progress=lambda d, t: seen.append((d, t)))
    assert seen[-1][0] == seen[-1][1]


def test_gradient_saliency_of_demo_model_decorrelates_after_full_randomisation():
    # Source: Adebayo et al., NeurIPS 2018, §3.1, Fig. 2 — after cascading randomisation of all
    # layers the gradient map's Spearman rank correlation (absolute values) with the trained
    # model's map falls well below 0.5.
    if not DEMO_WEIGHTS.exists():
        pytest.skip(f"demo model not built yet ({DEMO_WEIGHTS.relative_to(ROOT)} missing)")
    from safetensors.torch import load_file

    from pellucid.demo.net import build_tilenet, normalise
    from pellucid.demo.tiles import make_tile

    model = build_tilenet(num_classes=4)
    model.load_state_dict(load_file(str(DEMO_WEIGHTS)))
    x = normalise(torch.from_numpy(make_tile(label="crack", tagged=True, seed=7)).unsqueeze(0))
    res = sanity_check("saliency", model, x)
    assert res.steps[-1].spearman < 0.5 and res.verdict == "pass"


def test_block_steps_follow_the_residual_blocks_and_progress_counts_maps():
    # Source: Adebayo et al., NeurIPS 2018, §3.1 — cascading randomisation from the logits down.
    # Blocks of torchvision's ResNet-18 (He et al., CVPR 2016): fc, layer4.1 … layer1.0, bn1, conv1.
    import torchvision

    from pellucid.core.attribution.sanity import block_of

    torch.manual_seed(0)
    net = torchvision.models.resnet18(num_classes=3).eval()
    x = torch.randn(1, 3, 32, 32, generator=torch.Generator().manual_seed(1))
    seen: list[tuple[int, int]] = []
    res = sanity_check("saliency", net, x, time_budget=None, progress=lambda d, t: seen.append((d, t)))
    expected = ["fc", "layer4.1", "layer4.0", "layer3.1", "layer3.0", "layer2.1", "layer2.0", "layer1.1",
                "layer1.0", "bn1", "conv1"]
    assert [block_of(s.layers[0]) for s in res.steps] == expected
    assert all(len({block_of(n) for n in s.layers}) == 1 for s in res.steps)
    assert res.extras["granularity"] == "block" and res.extras["layers_randomised"] == 41
    # progress is in maps: the trained model's, then one per step; it only moves forward
    assert seen[0] == (0, 12) and seen[-1] == (12, 12)
    assert [d for d, _ in seen] == sorted(d for d, _ in seen) and {t for _, t in seen} == {12}
    per_layer = sanity_check("saliency", net, x, granularity="layer", max_steps=5, time_budget=None)
    assert len(per_layer.steps) == 5 and per_layer.extras["planned_steps"] == 41
    assert [n for s in per_layer.steps for n in s.layers] == [n for s in res.steps for n in s.layers]


def test_time_budget_merges_neighbouring_steps_but_keeps_the_minimum():
    from pellucid.core.attribution.sanity import MIN_STEPS

    torch.manual_seed(0)
    net = nn.Sequential(*[m for _ in range(4) for m in (nn.Conv2d(3, 3, 3, padding=1), nn.ReLU())],
                        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(3, 2)).eval()
    x = torch.randn(1, 3, 10, 10, generator=torch.Generator().manual_seed(2))
    res = sanity_check("saliency", net, x, time_budget=1e-6)  # no time at all: the minimum
    assert len(res.steps) == MIN_STEPS and res.extras["merged"] and res.extras["planned_steps"] == 5
    assert [n for s in res.steps for n in s.layers] == ["10", "6", "4", "2", "0"]  # top down, none lost
    with pytest.raises(BadParameterError, match="time_budget"):
        sanity_check("saliency", net, x, time_budget=0)
    with pytest.raises(BadParameterError, match="granularity"):
        sanity_check("saliency", net, x, granularity="module")


@pytest.mark.imagenet
def test_efficientnet_lite0_steps_by_block():
    # EfficientNet-Lite0 (Tan & Le, ICML 2019) has 16 inverted-residual blocks plus stem, head and
    # classifier layers: 99 parameterised layers, 21 block steps.
    pytest.importorskip("efficientnet_lite_pytorch", reason="needs the optional imagenet extra")
    from pellucid.core.attribution.sanity import _layers_in_order, _steps
    from pellucid.core.model.bundled import bundled_spec_path
    from pellucid.core.model.loading import load_model

    lm = load_model(bundled_spec_path("efficientnet-lite0"))
    layers = list(reversed(_layers_in_order(lm.module, torch.zeros(1, 3, 224, 224))))
    steps = _steps(layers, "block")
    assert len(layers) == 99 and len(steps) == 21
    assert steps[0] == ["_fc"] and steps[-1] == ["_conv_stem"] and steps[3][0].startswith("_blocks.15.")
