"""Incremental occlusion must equal brute force.

Source: Nakandala, Kumar & Papakonstantinou, "Incremental and Approximate Inference for Faster
Occlusion-based Deep CNN Explanations", SIGMOD 2019 (recompute only the projective field of the
patch); the reference is the brute-force occlusion of Zeiler & Fergus, ECCV 2014, §4.2.
Tolerance 1e-4 on probabilities is the acceptance criterion of issue 6.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from torch import nn

from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.occlusion.engine import compare_to_exact, occlusion_map
from pellucid.core.occlusion.incremental import IncrementalOcclusion, NotIncremental
from pellucid.core.occlusion.positions import make_baseline

TOL = 1e-4
REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    # The test machines are shared; one intra-op thread avoids spinning threads fighting for
    # cores and keeps these tests fast. Results do not depend on the thread count.
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


def _random_bn(model: nn.Module, seed: int = 0) -> nn.Module:
    """Eval mode with random running statistics, so batch norm is not the identity."""
    g = torch.Generator().manual_seed(seed)
    with torch.no_grad():
        for m in model.modules():
            if isinstance(m, nn.BatchNorm2d):
                m.running_mean.copy_(torch.rand(m.num_features, generator=g) - 0.5)
                m.running_var.copy_(torch.rand(m.num_features, generator=g) + 0.5)
                m.weight.copy_(torch.rand(m.num_features, generator=g) + 0.5)
                m.bias.copy_(torch.rand(m.num_features, generator=g) * 0.4 - 0.2)
    return model.eval()


def _small_vgg() -> nn.Module:
    def block(ci: int, co: int) -> list[nn.Module]:
        return [nn.Conv2d(ci, co, 3, padding=1), nn.BatchNorm2d(co), nn.ReLU(inplace=True)]

    return nn.Sequential(
        *block(3, 16), *block(16, 16), nn.MaxPool2d(2),
        *block(16, 32), *block(32, 32), nn.MaxPool2d(2, ceil_mode=True),
        *block(32, 32), nn.AvgPool2d(2), nn.Conv2d(32, 32, 3, padding=2, dilation=2), nn.ReLU(),
        nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(32, 6),
    )


def _assert_same(model: nn.Module, x: torch.Tensor, **kw) -> None:
    ref = occlusion_map(model, x, method="batched", **kw)
    inc = occlusion_map(model, x, method="incremental", **kw)
    assert inc.engine == "incremental" and ref.engine == "batched"
    assert inc.target == ref.target
    diff = float(np.abs(inc.grid - ref.grid).max())
    assert diff <= TOL, f"max |incremental − brute force| = {diff:.2e}"
    np.testing.assert_array_equal(inc.top_class, ref.top_class)


@pytest.fixture(scope="module")
def resnet():
    torch.manual_seed(0)
    return _random_bn(torchvision.models.resnet18(num_classes=10), seed=1)


@pytest.fixture(scope="module")
def mobilenet():
    torch.manual_seed(0)
    return _random_bn(torchvision.models.mobilenet_v2(num_classes=10), seed=2)


class TestEqualsBruteForce:
    @pytest.mark.parametrize("hw,patch,stride,baseline", [
        ((64, 64), 16, 12, "mean"),
        ((61, 67), 13, 9, "zero"),
        ((64, 64), 20, 11, "blur"),
    ])
    def test_resnet18(self, resnet, hw, patch, stride, baseline):
        x = torch.randn(1, 3, *hw, generator=torch.Generator().manual_seed(3))
        _assert_same(resnet, x, patch=patch, stride=stride, baseline=baseline)

    @pytest.mark.parametrize("hw,patch,stride,baseline", [
        ((40, 40), 6, 5, "mean"),
        ((37, 43), 7, 5, 0.5),
        ((40, 40), 11, 9, torch.tensor([0.1, -0.2, 0.3])),
    ])
    def test_vgg_style(self, hw, patch, stride, baseline):
        torch.manual_seed(4)
        model = _random_bn(_small_vgg(), seed=5)
        x = torch.randn(1, 3, *hw, generator=torch.Generator().manual_seed(6))
        _assert_same(model, x, patch=patch, stride=stride, baseline=baseline)

    @pytest.mark.parametrize("hw,patch,stride", [((64, 64), 13, 12), ((57, 63), 16, 8)])
    def test_mobilenet_v2(self, mobilenet, hw, patch, stride):
        # depthwise convolutions (groups = channels), ReLU6 and inverted residual additions
        x = torch.randn(1, 3, *hw, generator=torch.Generator().manual_seed(7))
        _assert_same(mobilenet, x, patch=patch, stride=stride, baseline="mean")

    def test_exact_in_double_precision(self, resnet):
        # In float64 the only difference between crop and full-map convolution is rounding, so the
        # maps agree to ~1e-12: the windows really cover every changed value (nothing is missed).
        torch.manual_seed(18)
        vgg = _random_bn(_small_vgg(), seed=19).double()
        x = torch.randn(1, 3, 36, 36, generator=torch.Generator().manual_seed(20), dtype=torch.float64)
        ref = occlusion_map(vgg, x, patch=7, stride=3, method="batched", output="logit")
        inc = occlusion_map(vgg, x, patch=7, stride=3, method="incremental", output="logit")
        assert float(np.abs(inc.grid - ref.grid).max()) <= 1e-9
        import copy

        res64 = copy.deepcopy(resnet).double()
        x = torch.randn(1, 3, 40, 40, generator=torch.Generator().manual_seed(21), dtype=torch.float64)
        ref = occlusion_map(res64, x, patch=9, stride=7, method="batched", output="logit")
        inc = occlusion_map(res64, x, patch=9, stride=7, method="incremental", output="logit")
        assert float(np.abs(inc.grid - ref.grid).max()) <= 1e-9

    def test_tilenet_architecture(self):
        from pellucid.demo.net import build_tilenet

        torch.manual_seed(8)
        model = _random_bn(build_tilenet(), seed=9)
        x = torch.randn(1, 3, 96, 96, generator=torch.Generator().manual_seed(10))
        _assert_same(model, x, patch=16, stride=8, baseline="mean")
        _assert_same(model, x, patch=10, stride=7, baseline="blur")

    def test_trained_demo_model(self):
        spec_path = REPO / "demo_models" / "tilenet" / "spec.toml"
        tile = REPO / "demo_models" / "tilenet" / "samples" / "sound_tagged_01.png"
        if not spec_path.exists() or not tile.exists():
            pytest.skip("demo_models/tilenet is not built yet")
        from PIL import Image
        from safetensors.torch import load_file

        from pellucid.demo.net import build_tilenet, normalise

        spec = tomllib.loads(spec_path.read_text())
        weights = spec_path.parent / str(spec.get("source", {}).get("weights", "tilenet.safetensors"))
        model = build_tilenet()
        model.load_state_dict(load_file(str(weights)))
        model.eval()
        rgb = np.array(Image.open(tile).convert("RGB").resize((96, 96)), dtype=np.uint8)
        x = normalise(torch.from_numpy(rgb)[None])
        _assert_same(model, x, patch=16, stride=8, baseline="mean")
        _assert_same(model, x, patch=12, stride=4, baseline="zero")
        # a real tile gives a map that is not flat, so the comparison above means something
        res = occlusion_map(model, x, patch=16, stride=8)
        assert float(res.grid.max() - res.grid.min()) > 1e-3

    def test_windows_are_really_used(self, resnet):
        # The engine must not silently recompute everything: early layers run on windows.
        x = torch.randn(1, 3, 64, 64)
        base, _ = make_baseline(x, "mean", patch=8)
        eng = IncrementalOcclusion(resnet, x, base, patch=8)
        modes = eng.modes(28, 28)
        assert modes["conv1"] == "win" and modes["layer1_0_conv1"] == "win"
        assert modes["fc"] == "full" and modes["avgpool"] == "full"
        assert eng.estimated_speedup > 1.0 and eng.ideal_speedup >= eng.estimated_speedup * 0.99


class _Weird(nn.Module):
    """A spatial shuffle the engine cannot reason about: rolled columns plus a flipped copy."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.roll(x, shifts=3, dims=3) * 0.5 + x.flip(2)


class _DataDependent(nn.Module):
    """Control flow on tensor values: torch.fx cannot trace it."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        if x.mean() > 0:
            return x * 2
        return x


def _net_with(middle: nn.Module) -> nn.Module:
    torch.manual_seed(12)
    return _random_bn(nn.Sequential(
        nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(), middle,
        nn.Conv2d(8, 8, 3, stride=2, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(), nn.Linear(8, 5),
    ), seed=13)


class TestFallback:
    @pytest.mark.parametrize("middle", [_Weird(), nn.Upsample(scale_factor=1), nn.GroupNorm(2, 8),
                                        nn.LocalResponseNorm(3)])
    def test_unknown_module_recomputes_fully_and_stays_exact(self, middle):
        model = _net_with(middle)
        x = torch.randn(1, 3, 24, 24)
        _assert_same(model, x, patch=5, stride=3)
        base, _ = make_baseline(x, "mean", patch=5)
        modes = IncrementalOcclusion(model, x, base, patch=5).modes(9, 9)
        assert modes["_0"] == "win"
        assert modes["_8"] == "full"  # everything after the unknown module is recomputed

    def test_untraceable_model_falls_back_to_batched(self):
        model = _net_with(_DataDependent())
        x = torch.randn(1, 3, 24, 24)
        auto = occlusion_map(model, x, patch=5, stride=3)
        assert auto.engine == "batched" and "traced" in auto.details["incremental_skipped"]
        ref = occlusion_map(model, x, patch=5, stride=3, method="naive")
        np.testing.assert_allclose(auto.grid, ref.grid, atol=1e-6)
        with pytest.raises(UnsupportedLayerError, match="method='batched'"):
            occlusion_map(model, x, patch=5, stride=3, method="incremental")

    def test_inplace_on_shared_value_is_refused(self):
        class Shared(nn.Module):
            def forward(self, x: torch.Tensor) -> torch.Tensor:
                y = x.relu_()
                return x + y

        model = _net_with(Shared())
        x = torch.randn(1, 3, 16, 16)
        with pytest.raises(NotIncremental, match="in place"):
            IncrementalOcclusion(model, x, torch.zeros_like(x), patch=4)
        assert occlusion_map(model, x, patch=4, stride=4).engine == "batched"

    def test_caller_model_is_left_unchanged(self, resnet):
        # in-place ReLUs are run out of place on copies; the caller's modules keep their flag
        x = torch.randn(1, 3, 32, 32)
        occlusion_map(resnet, x, patch=8, stride=8, method="incremental")
        assert resnet.relu.inplace is True


class TestAutoAndApproximate:
    def test_auto_records_engine_and_is_exact(self, resnet):
        x = torch.randn(1, 3, 64, 64, generator=torch.Generator().manual_seed(14))
        auto = occlusion_map(resnet, x, patch=12, stride=12)
        assert auto.engine in ("incremental", "batched") and not auto.approximate
        ref = occlusion_map(resnet, x, patch=12, stride=12, method="batched")
        assert float(np.abs(auto.grid - ref.grid).max()) <= TOL

    def test_approximate_is_labelled_and_close(self):
        from pellucid.demo.net import build_tilenet

        torch.manual_seed(15)
        model = _random_bn(build_tilenet(), seed=16)
        x = torch.randn(1, 3, 96, 96, generator=torch.Generator().manual_seed(17))
        approx = occlusion_map(model, x, patch=16, stride=4, method="approximate", refine_tolerance=0.1)
        assert approx.engine == "approximate" and approx.approximate
        assert approx.details["exact_engine"] in ("incremental", "batched")
        assert 0 < approx.evaluated.mean() < 1 and approx.n_forwards < approx.grid.size + 1
        assert np.all(approx.top_class[~approx.evaluated] == -1)
        exact = occlusion_map(model, x, patch=16, stride=4, method="batched")
        err = compare_to_exact(approx, model, x, exact=exact)
        # at evaluated positions the approximate map is exact
        assert float(np.abs(approx.grid - exact.grid)[approx.evaluated].max()) <= TOL
        assert err["grid_max_abs"] == pytest.approx(float(np.abs(approx.grid - exact.grid).max()), abs=TOL)
        assert err["evaluated_fraction"] == pytest.approx(approx.evaluated.mean())

    def test_approximate_with_zero_tolerance_is_exact(self):
        model = _net_with(nn.Identity())
        x = torch.randn(1, 3, 24, 24)
        approx = occlusion_map(model, x, patch=4, stride=2, method="approximate", refine_tolerance=0.0)
        exact = occlusion_map(model, x, patch=4, stride=2, method="batched")
        # a zero tolerance refines every cell whose corners differ at all
        assert float(np.abs(approx.grid - exact.grid).max()) <= TOL
        assert compare_to_exact(approx, model, x, baseline="mean")["grid_max_abs"] <= TOL

    def test_compare_to_exact_rejects_mismatched_grids(self):
        model = _net_with(nn.Identity())
        x = torch.randn(1, 3, 24, 24)
        a = occlusion_map(model, x, patch=4, stride=2, method="approximate")
        b = occlusion_map(model, x, patch=4, stride=4)
        with pytest.raises(BadParameterError, match="grid"):
            compare_to_exact(a, model, x, exact=b)
