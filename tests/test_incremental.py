"""Incremental occlusion must equal occlusion computed by hand.

Source: Nakandala, Kumar & Papakonstantinou, "Incremental and Approximate Inference for Faster
Occlusion-based Deep CNN Explanations", SIGMOD 2019 (recompute only the projective field of the
patch). The reference is the definition of Zeiler & Fergus, ECCV 2014, §4.2, written in this file
as a plain loop (copy the image, paste the fill, one forward per position); it shares no code with
Pellucid's engines, positions or baselines. Tolerance 1e-4 on probabilities: float32 convolutions
of a window and of the whole map differ by rounding only (float64 checks below find ≤ 1e-9).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
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


def _axis_by_hand(size: int, patch: int, stride: int) -> list[int]:
    # common practice, no source: 0, stride, … and a last window flush with the far border
    pos = list(range(0, size - patch + 1, stride))
    return pos if pos[-1] == size - patch else [*pos, size - patch]


def _fill_by_hand(x: torch.Tensor, baseline) -> torch.Tensor:
    if isinstance(baseline, torch.Tensor):
        return baseline.view(1, -1, 1, 1).to(x.dtype).expand_as(x)
    if baseline == "mean":
        return x.mean(dim=(2, 3), keepdim=True).expand_as(x)
    if baseline == "zero":
        return torch.zeros_like(x)
    return torch.full_like(x, float(baseline))


def _loop(model: nn.Module, x: torch.Tensor, *, patch: int, stride: int, baseline="mean", output="softmax",
          rows: list[int] | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """(grid of drops, top class per position, target) by one forward per occluded copy."""
    fill = _fill_by_hand(x, baseline)
    tops = _axis_by_hand(x.shape[2], patch, stride)
    lefts = _axis_by_hand(x.shape[3], patch, stride)
    if rows is not None:
        tops = [tops[r] for r in rows]

    def score(z: torch.Tensor) -> float:
        z = z[0].double()
        return float(z[target] if output == "logit" else torch.softmax(z, 0)[target])

    with torch.no_grad():
        clean = model(x)
        target = int(clean.argmax())
        grid = np.zeros((len(tops), len(lefts)))
        cls = np.zeros((len(tops), len(lefts)), dtype=np.int64)
        for i, t in enumerate(tops):
            for j, left in enumerate(lefts):
                xo = x.clone()
                xo[:, :, t : t + patch, left : left + patch] = fill[:, :, t : t + patch, left : left + patch]
                z = model(xo)
                grid[i, j] = score(clean) - score(z)
                cls[i, j] = int(z.argmax())
    return grid, cls, target


def _assert_same(model: nn.Module, x: torch.Tensor, *, patch: int, stride: int, baseline="mean",
                 output="softmax") -> None:
    ref, ref_cls, target = _loop(model, x, patch=patch, stride=stride, baseline=baseline, output=output)
    inc = occlusion_map(model, x, method="incremental", patch=patch, stride=stride, baseline=baseline,
                        output=output)
    assert inc.engine == "incremental"
    assert inc.target == target
    diff = float(np.abs(inc.grid - ref).max())
    assert diff <= TOL, f"max |incremental − loop| = {diff:.2e}"
    np.testing.assert_array_equal(inc.top_class, ref_cls)


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
        ((64, 64), 20, 11, 0.25),
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
        # maps agree to the float32 grid's own rounding (~1e-7 of values up to a few units): the
        # windows really cover every changed value (a missed one would differ by ~1e-2).
        torch.manual_seed(18)
        vgg = _random_bn(_small_vgg(), seed=19).double()
        x = torch.randn(1, 3, 36, 36, generator=torch.Generator().manual_seed(20), dtype=torch.float64)
        ref, _, _ = _loop(vgg, x, patch=7, stride=3, output="logit")
        inc = occlusion_map(vgg, x, patch=7, stride=3, method="incremental", output="logit")
        assert float(np.abs(inc.grid - ref).max()) <= 1e-6
        import copy

        res64 = copy.deepcopy(resnet).double()
        x = torch.randn(1, 3, 40, 40, generator=torch.Generator().manual_seed(21), dtype=torch.float64)
        ref, _, _ = _loop(res64, x, patch=9, stride=7, output="logit")
        inc = occlusion_map(res64, x, patch=9, stride=7, method="incremental", output="logit")
        assert float(np.abs(inc.grid - ref).max()) <= 1e-6

    def test_tilenet_architecture(self):
        from pellucid.demo.net import build_tilenet

        torch.manual_seed(8)
        model = _random_bn(build_tilenet(), seed=9)
        x = torch.randn(1, 3, 96, 96, generator=torch.Generator().manual_seed(10))
        _assert_same(model, x, patch=16, stride=8, baseline="mean")
        _assert_same(model, x, patch=10, stride=7, baseline="zero")

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
        ref, _, _ = _loop(model, x, patch=5, stride=3)
        np.testing.assert_allclose(auto.grid, ref, atol=1e-6)
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


class TestAuto:
    def test_auto_records_engine_and_is_exact(self, resnet):
        x = torch.randn(1, 3, 64, 64, generator=torch.Generator().manual_seed(14))
        auto = occlusion_map(resnet, x, patch=12, stride=12)
        assert auto.engine in ("incremental", "batched") and not auto.approximate
        ref, _, _ = _loop(resnet, x, patch=12, stride=12)
        assert float(np.abs(auto.grid - ref).max()) <= TOL

    def test_auto_races_on_a_large_grid_and_keeps_every_position(self, mobilenet):
        # 14 × 14 positions in batches of 28: enough for the race (one batch of each engine)
        x = torch.randn(1, 3, 60, 60, generator=torch.Generator().manual_seed(22))
        auto = occlusion_map(mobilenet, x, patch=8, stride=4, batch_size=28)
        ref, ref_cls, _ = _loop(mobilenet, x, patch=8, stride=4)
        assert float(np.abs(auto.grid - ref).max()) <= TOL
        np.testing.assert_array_equal(auto.top_class, ref_cls)
        race = auto.details["race_ms_per_position"]
        assert set(race) == {"incremental", "batched"} and all(v > 0 for v in race.values())
        faster = min(race, key=race.get)
        assert auto.engine == faster  # it keeps the engine it measured faster
        assert auto.details["self_check_positions"] >= 5  # corners, centre, spread positions

    def test_auto_skips_the_race_when_the_estimate_is_hopeless(self):
        # squeeze-and-excitation pools each block's whole map, so from the first such block on
        # every value depends on the whole image; MobileNetV3-Small has one in its first block
        torch.manual_seed(23)
        model = _random_bn(torchvision.models.mobilenet_v3_small(num_classes=10), seed=24)
        x = torch.randn(1, 3, 64, 64, generator=torch.Generator().manual_seed(25))
        auto = occlusion_map(model, x, patch=16, stride=8)
        assert auto.engine == "batched" and "too small" in auto.details["incremental_skipped"]
        assert auto.details["estimated_speedup"] < 1.2


class _SamePadConv(nn.Module):
    """A convolution that pads itself like TensorFlow's 'SAME' (a pad module, then F.conv2d with
    padding 0); for stride 2 and even inputs the pad is asymmetric: one more row and column at the
    bottom and right. Written here after the layer in EfficientNet-Lite (Tan & Le, ICML 2019)."""

    def __init__(self, ci: int, co: int, k: int, stride: int = 1, groups: int = 1, size: int = 32) -> None:
        super().__init__()
        self.weight = nn.Parameter(torch.randn(co, ci // groups, k, k) / math.sqrt(ci // groups * k * k))
        self.stride, self.groups = stride, groups
        out = math.ceil(size / stride)
        pad = max((out - 1) * stride + k - size, 0)
        self.pad = nn.ZeroPad2d((pad // 2, pad - pad // 2, pad // 2, pad - pad // 2))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return F.conv2d(self.pad(x), self.weight, None, self.stride, 0, 1, self.groups)


class _SameNet(nn.Module):
    """Inverted residual blocks with same-padding depthwise convolutions, F.pad, a global mean."""

    def __init__(self) -> None:
        super().__init__()
        self.stem = _SamePadConv(3, 8, 3, stride=2, size=32)
        self.bn0 = nn.BatchNorm2d(8)
        self.expand = nn.Conv2d(8, 24, 1)
        self.dw = _SamePadConv(24, 24, 5, stride=1, groups=24, size=16)
        self.project = nn.Conv2d(24, 8, 1)
        self.dw2 = _SamePadConv(8, 8, 3, stride=2, groups=8, size=16)
        self.head = nn.Linear(8, 5)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = F.relu6(self.bn0(self.stem(x)))
        x = x + self.project(F.relu6(self.dw(F.relu6(self.expand(x)))))
        x = F.pad(x, (0, 1, 0, 1))  # functional, asymmetric: one column right, one row below
        x = F.conv2d(x, self.dw2.weight, None, 2, 0, 1, 8)
        return self.head(x.mean((2, 3)))


class TestSamePaddingAndGlobalPooling:
    def test_same_padding_network_is_exact_and_windowed(self):
        torch.manual_seed(26)
        model = _random_bn(_SameNet(), seed=27)
        x = torch.randn(1, 3, 32, 32, generator=torch.Generator().manual_seed(28))
        _assert_same(model, x, patch=6, stride=5)
        _assert_same(model, x, patch=7, stride=3, baseline="zero", output="logit")
        base, _ = make_baseline(x, "mean", patch=6)
        eng = IncrementalOcclusion(model, x, base, patch=6)
        kinds = eng.summary()["kinds"]
        assert kinds.get("shift", 0) == 3 and kinds.get("gpool", 0) == 1  # 2 pad modules + F.pad; the mean
        modes = eng.modes(13, 13)
        assert modes["stem_pad"] == "win" and modes["conv2d"] == "win" and modes["dw_pad"] == "win"
        assert eng.ideal_speedup > 1.0

    @pytest.mark.parametrize("pool", ["module", "function", "mean", "mean_keepdim"])
    def test_global_average_from_windows_is_exact(self, pool):
        # The pooled value of an occluded map is the clean one plus each window's change / (H·W);
        # in float64 it must match the loop to rounding (the grid itself is stored as float32).
        class Net(nn.Module):
            def __init__(self) -> None:
                super().__init__()
                self.conv = nn.Conv2d(3, 6, 3, padding=1)
                self.pool = nn.AdaptiveAvgPool2d(1)
                self.fc = nn.Linear(6, 4)

            def forward(self, x: torch.Tensor) -> torch.Tensor:
                y = torch.relu(self.conv(x))
                if pool == "module":
                    y = self.pool(y).flatten(1)
                elif pool == "function":
                    y = F.adaptive_avg_pool2d(y, 1).flatten(1)
                elif pool == "mean":
                    y = y.mean((2, 3))
                else:
                    y = y.mean((-1, -2), keepdim=True).flatten(1)
                return self.fc(y)

        torch.manual_seed(29)
        model = Net().double().eval()
        x = torch.randn(1, 3, 30, 30, generator=torch.Generator().manual_seed(30), dtype=torch.float64)
        ref, _, _ = _loop(model, x, patch=5, stride=4, output="logit")
        inc = occlusion_map(model, x, patch=5, stride=4, method="incremental", output="logit")
        assert float(np.abs(inc.grid - ref).max()) <= 1e-6
        base, _ = make_baseline(x, "mean", patch=5)
        eng = IncrementalOcclusion(model, x, base, patch=5)
        assert eng.summary()["kinds"]["gpool"] == 1
        assert eng.modes(12, 12)["conv"] == "win"  # the pool reads windows, no full map is rebuilt


class TestRealNetworks:
    """torchvision architectures with seeded weights, and the bundled ImageNet model on a photo."""

    def test_mobilenet_v3_small_squeeze_excitation(self):
        torch.manual_seed(31)
        model = _random_bn(torchvision.models.mobilenet_v3_small(num_classes=10), seed=32)
        x = torch.randn(1, 3, 48, 48, generator=torch.Generator().manual_seed(33))
        _assert_same(model, x, patch=12, stride=9)
        base, _ = make_baseline(x, "mean", patch=12)
        eng = IncrementalOcclusion(model, x, base, patch=12)
        modes = eng.modes(18, 18)
        assert modes["features_0_0"] == "win" and modes["features_1_block_0_0"] == "win"  # stem, depthwise
        # the block's squeeze pools windows (exactly), but its per-channel scale multiplies the whole
        # map, so from there on every value changes with the patch
        assert eng.summary()["kinds"]["gpool"] >= 1 and modes["features_1_block_1_avgpool"] == "full"
        assert modes["mul"] == "full" and modes["features_1_block_2_0"] == "full"

    def test_resnet50(self):
        torch.manual_seed(34)
        model = _random_bn(torchvision.models.resnet50(num_classes=10), seed=35)
        x = torch.randn(1, 3, 64, 64, generator=torch.Generator().manual_seed(36))
        _assert_same(model, x, patch=16, stride=16)

    @pytest.mark.imagenet
    def test_efficientnet_lite0_on_a_photo(self):
        # Source of the photo: scikit-image's bundled data (chelsea.png). Rows 0 and 13 of the
        # 16/8 grid (border and middle), by the loop; the engine's analysis must follow the
        # network's same-padding convolutions (before, its pads counted as global operations).
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
        rows = [0, 13]
        ref, ref_cls, target = _loop(lm.module, x, patch=16, stride=8, rows=rows)
        base, _ = make_baseline(x, "mean", patch=16)
        eng = IncrementalOcclusion(lm.module, x, base, patch=16)
        assert eng.summary()["kinds"]["shift"] == 17 and eng.ideal_speedup > 1.5
        tops = torch.tensor(_axis_by_hand(224, 16, 8))
        with torch.inference_mode():
            p0 = torch.softmax(lm.module(x).double(), 1)[0, target]
            for k, r in enumerate(rows):
                logits = eng.logits(tops[r].repeat(len(tops)), tops)
                got = (p0 - torch.softmax(logits.double(), 1)[:, target]).numpy()
                assert float(np.abs(got - ref[k]).max()) <= TOL
                np.testing.assert_array_equal(logits.argmax(1).numpy(), ref_cls[k])


class TestApproximate:
    def test_labelled_exact_where_evaluated_and_reports_sampled_error(self):
        from pellucid.demo.net import build_tilenet

        torch.manual_seed(15)
        model = _random_bn(build_tilenet(), seed=16)
        x = torch.randn(1, 3, 96, 96, generator=torch.Generator().manual_seed(17))
        ref, _, _ = _loop(model, x, patch=16, stride=4)
        approx = occlusion_map(model, x, patch=16, stride=4, method="approximate", refine_tolerance=1.0,
                               drill_down=0.1, check_sample=7)
        assert approx.engine == "approximate" and approx.approximate
        assert approx.details["exact_engine"] in ("incremental", "batched")
        assert 0 < approx.evaluated.mean() < 1 and approx.n_forwards < approx.grid.size + 1
        assert np.all(approx.top_class[~approx.evaluated] == -1)
        # at evaluated positions the approximate map is exact
        assert float(np.abs(approx.grid - ref)[approx.evaluated].max()) <= TOL
        sampled = approx.details["sampled_error"]
        assert sampled["positions"] == 7 and sampled["max_abs"] >= sampled["mean_abs"] >= 0
        err = compare_to_exact(approx, model, x)
        assert err["grid_max_abs"] == pytest.approx(float(np.abs(approx.grid - ref).max()), abs=TOL)

    def test_sampled_error_is_the_interpolation_error_at_the_sampled_positions(self):
        # A smooth grid, evaluated through a fake engine: the positions the check sample added
        # are those evaluated with check_sample=7 but not with 0; there the error of the map
        # without the sample against the truth (computed here) is what the result reports.
        from pellucid.core.occlusion.approximate import approximate_grid

        n = 25
        ii, jj = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
        truth = np.sin(ii / 3.0) * np.cos(jj / 4.0) + 0.02 * ii

        def evaluate(t: torch.Tensor, left: torch.Tensor) -> torch.Tensor:
            return torch.as_tensor(-truth[t.numpy(), left.numpy()])[:, None]

        kw = dict(score=lambda lg: lg[:, 0], base_score=0.0, batch_size=10, tolerance=0.5, drill_down=0.05)
        pos = np.arange(n)
        without = approximate_grid(evaluate, pos, pos, check_sample=0, **kw)
        with_check = approximate_grid(evaluate, pos, pos, check_sample=7, **kw)
        added = with_check.evaluated & ~without.evaluated
        assert added.sum() == 7
        err = np.abs(without.grid[added] - truth[added])
        assert with_check.sampled_error["max_abs"] == pytest.approx(float(err.max()))
        assert with_check.sampled_error["mean_abs"] == pytest.approx(float(err.mean()))
        np.testing.assert_allclose(with_check.grid[with_check.evaluated], truth[with_check.evaluated])

    def test_zero_tolerance_is_exact(self):
        model = _net_with(nn.Identity())
        x = torch.randn(1, 3, 24, 24)
        approx = occlusion_map(model, x, patch=4, stride=2, method="approximate", refine_tolerance=0.0)
        ref, _, _ = _loop(model, x, patch=4, stride=2)
        # a zero tolerance refines every cell whose corners differ at all
        assert float(np.abs(approx.grid - ref).max()) <= TOL

    def test_field_threshold_cuts_windows_and_one_is_exact(self, resnet):
        x = torch.randn(1, 3, 64, 64, generator=torch.Generator().manual_seed(37))
        base, _ = make_baseline(x, "mean", patch=12)
        eng = IncrementalOcclusion(model := resnet, x, base, patch=12)
        t, left = torch.tensor([24, 24]), torch.tensor([0, 24])
        exact = eng.logits(t, left)
        same = eng.logits(t, left, field_threshold=1.0)
        assert torch.equal(exact, same)
        cut = eng._plan(t.numpy(), left.numpy(), field_threshold=0.3)
        full = eng._plan(t.numpy(), left.numpy())
        node = next(n for n in eng.nodes if n.name == "layer3_1_conv2")
        assert cut[node].mode == "win" and full[node].mode == "full"
        approx = occlusion_map(model, x, patch=12, stride=12, method="approximate", field_threshold=0.5)
        assert approx.details["field_threshold"] in (0.5, 1.0)  # 1.0 when auto chose batched
        with pytest.raises(BadParameterError, match="approximate"):
            occlusion_map(model, x, patch=12, stride=12, field_threshold=0.5)

    def test_compare_to_exact_rejects_mismatched_grids(self):
        model = _net_with(nn.Identity())
        x = torch.randn(1, 3, 24, 24)
        a = occlusion_map(model, x, patch=4, stride=2, method="approximate")
        b = occlusion_map(model, x, patch=4, stride=4)
        with pytest.raises(BadParameterError, match="grid"):
            compare_to_exact(a, model, x, exact=b)
