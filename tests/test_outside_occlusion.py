"""Every occlusion engine against a plain loop written here, on real CNNs.

Source: Zeiler & Fergus, "Visualizing and Understanding Convolutional Networks", ECCV 2014, §4.2:
slide a grey square over the image and record the class score at each position. The reference
below is that definition as a first Python loop: positions, baseline fill, one forward per
occluded copy and the per-pixel mean are all computed in this file, never by Pellucid's
positions, baselines or engines. The models are ResNet-18 (He et al., CVPR 2016; torchvision's
builder with seeded weights and batch-norm statistics) and the trained demo model, both on
inputs that are not square, so a grid returned transposed cannot pass.
"""

from __future__ import annotations

import inspect
import math
from pathlib import Path

import numpy as np
import pytest
import torch
import torchvision
from scipy import ndimage, stats
from torch import nn

from pellucid.core.attribution import compute_attribution
from pellucid.core.model.loading import load_model
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.occlusion.engine import occlusion_map

REPO = Path(__file__).resolve().parents[1]
EXACT_ENGINES = ("naive", "batched", "incremental", "auto")
# Float32 forwards of the same image in a batch, alone, or recomputed on a window differ by
# rounding only; the grids are compared at 1e-4 of their own range (and 1e-6 absolute).
REL_TOL = 1e-4


@pytest.fixture(autouse=True, scope="module")
def _one_thread():
    # Shared 2-core machines: one intra-op thread keeps these loops from fighting for cores.
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


# ---------------------------------------------------------------------------------------------
# The reference, written out


def positions_by_hand(size: int, patch: int, stride: int) -> list[int]:
    # Pellucid's documented rule (core/occlusion/engine.py): 0, stride, 2·stride, … ≤ size − patch,
    # plus one flush with the far border when the last step falls short. Written out here.
    out = []
    p = 0
    while p + patch <= size:
        out.append(p)
        p += stride
    if out[-1] != size - patch:
        out.append(size - patch)
    return out


def fill_by_hand(x: torch.Tensor, kind, patch: int) -> torch.Tensor:
    """The (1, C, H, W) fill pasted into the patch, computed independently of Pellucid."""
    if kind == "mean":
        # common practice, no source: the image's own per-channel mean colour
        return x.mean(dim=(2, 3), keepdim=True).expand_as(x).clone()
    if kind == "zero":
        return torch.zeros_like(x)
    if kind == "blur":
        # Gaussian with sigma = patch / 4 (≥ 1 px), radius ⌈3σ⌉, replicated borders, as documented
        # in core/occlusion/positions.py; here with scipy's filter (truncate = radius / sigma).
        sigma = max(1.0, patch / 4)
        radius = math.ceil(3 * sigma)
        arr = ndimage.gaussian_filter(x.double().numpy(), sigma=(0, 0, sigma, sigma), mode="nearest",
                                      truncate=radius / sigma)
        return torch.from_numpy(arr).to(x.dtype)
    return torch.full_like(x, float(kind))


def score_by_hand(logits: torch.Tensor, target: int, output: str) -> float:
    z = logits[0].double()
    if output == "logit":
        return float(z[target])
    return float(torch.softmax(z, dim=0)[target])


def occlusion_by_hand(model: nn.Module, x: torch.Tensor, *, target: int, patch: int, stride: int, baseline,
                      output: str) -> tuple[np.ndarray, np.ndarray, list[int], list[int]]:
    """(grid (rows, cols), drop map (H, W), tops, lefts): one forward per occluded copy."""
    _, _, h, w = x.shape
    fill = fill_by_hand(x, baseline, patch)
    tops, lefts = positions_by_hand(h, patch, stride), positions_by_hand(w, patch, stride)
    with torch.no_grad():
        clean = score_by_hand(model(x), target, output)
        grid = np.zeros((len(tops), len(lefts)))
        for i, top in enumerate(tops):
            for j, left in enumerate(lefts):
                occluded = x.clone()
                occluded[:, :, top:top + patch, left:left + patch] = fill[:, :, top:top + patch, left:left + patch]
                grid[i, j] = clean - score_by_hand(model(occluded), target, output)
    total = np.zeros((h, w))
    count = np.zeros((h, w))
    for i, top in enumerate(tops):
        for j, left in enumerate(lefts):
            total[top:top + patch, left:left + patch] += grid[i, j]
            count[top:top + patch, left:left + patch] += 1
    return grid, total / count, tops, lefts


_REFERENCES: dict[tuple, tuple] = {}


def reference_for(model: nn.Module, x: torch.Tensor, **kw) -> tuple:
    """The loop's result, computed once per model, input and settings for the engines that share it."""
    key = (id(model), x.numpy().tobytes(), tuple(sorted(kw.items())))
    if key not in _REFERENCES:
        _REFERENCES[key] = occlusion_by_hand(model, x, **kw)
    return _REFERENCES[key]


def assert_close(ours: np.ndarray, reference: np.ndarray, what: str) -> None:
    assert ours.shape == reference.shape, f"{what}: shape {ours.shape} against {reference.shape}"
    scale = max(float(np.ptp(reference)), 1e-2)
    diff = float(np.abs(ours.astype(np.float64) - reference).max())
    assert diff <= REL_TOL * scale + 1e-6, f"{what}: max |difference| {diff:.3g} on a range of {scale:.3g}"


# ---------------------------------------------------------------------------------------------
# Models and inputs


def _random_bn(model: nn.Module, seed: int) -> nn.Module:
    # Eval mode with seeded running statistics, so batch norm is not the identity.
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
def resnet18():
    torch.manual_seed(0)
    return _random_bn(torchvision.models.resnet18(num_classes=10), seed=1)


@pytest.fixture(scope="module")
def resnet_input():
    # 40×56: not square, and neither side a multiple of the stride used below.
    return torch.randn(1, 3, 40, 56, generator=torch.Generator().manual_seed(2))


@pytest.fixture(scope="module")
def tilenet():
    spec = REPO / "demo_models" / "tilenet" / "spec.toml"
    if not spec.is_file():
        pytest.skip("demo_models/tilenet is not built")
    return load_model(spec)


@pytest.fixture(scope="module")
def tile_input(tilenet):
    tile = REPO / "demo_models" / "tilenet" / "samples" / "crack_tagged_01.png"
    if not tile.is_file():
        pytest.skip("the demo samples are not built")
    x = prepare(tilenet.spec, read_image(tile)).tensor
    return x[:, :, :, 8:88].contiguous()  # 96×80: TileNet takes any size ≥ 8 (global pooling)


# ---------------------------------------------------------------------------------------------
# Exact engines


@pytest.mark.parametrize("engine", EXACT_ENGINES)
@pytest.mark.parametrize(("patch", "stride", "baseline", "output"), [
    (8, 5, "mean", "logit"),
    (11, 11, "zero", "logit"),
    (8, 6, "blur", "softmax"),
])
def test_resnet18_engines_equal_the_loop(resnet18, resnet_input, engine, patch, stride, baseline, output):
    x = resnet_input
    target = 3
    grid, drop, tops, lefts = reference_for(resnet18, x, target=target, patch=patch, stride=stride,
                                            baseline=baseline, output=output)
    assert np.ptp(grid) > 1e-3, "the reference map is flat, so the comparison would mean nothing"
    res = occlusion_map(resnet18, x, target=target, patch=patch, stride=stride, baseline=baseline,
                        output=output, method=engine)
    assert list(res.tops) == tops and list(res.lefts) == lefts
    assert_close(res.grid, grid, f"{engine} grid")
    assert_close(res.drop, drop, f"{engine} map")
    assert res.evaluated.all() and not res.approximate
    if engine != "auto":
        assert res.engine == engine
    else:
        assert res.engine in ("batched", "incremental")


@pytest.mark.parametrize("engine", EXACT_ENGINES)
def test_demo_model_engines_equal_the_loop(tilenet, tile_input, engine):
    x = tile_input
    grid, drop, _, _ = reference_for(tilenet.module, x, target=1, patch=16, stride=7, baseline="mean",
                                     output="softmax")
    assert grid.shape == (13, 11)
    assert np.ptp(grid) > 0.05, "a real tile moves the class probability"
    res = occlusion_map(tilenet.module, x, target=1, patch=16, stride=7, baseline="mean", output="softmax",
                        method=engine)
    assert_close(res.grid, grid, f"{engine} grid")
    assert_close(res.drop, drop, f"{engine} map")


def test_registry_occlusion_equals_the_loop(tilenet, tile_input):
    x = tile_input
    _, drop, _, _ = occlusion_by_hand(tilenet.module, x, target=1, patch=16, stride=8, baseline="mean",
                                      output="softmax")
    amap = compute_attribution("occlusion", tilenet.module, x, target=1,
                               params={"patch": 16, "stride": 8, "baseline": "mean"})
    assert amap.signed
    assert_close(amap.map, drop, "registry occlusion map")


def test_transposed_grid_fails_the_comparison(resnet18, resnet_input):
    # The check above must be able to fail: the loop's grid transposed is not accepted.
    grid, _, _, _ = reference_for(resnet18, resnet_input, target=3, patch=8, stride=5, baseline="mean",
                                  output="logit")
    with pytest.raises(AssertionError):
        assert_close(grid.T, grid, "transposed")
    square = grid[:7, :7]
    with pytest.raises(AssertionError):
        assert_close(square.T, square, "transposed square")


# ---------------------------------------------------------------------------------------------
# Approximate engine


def _top_overlap(a: np.ndarray, b: np.ndarray, share: float = 0.1) -> float:
    k = max(1, round(share * a.size))
    top_a = set(np.argsort(a, axis=None)[-k:].tolist())
    top_b = set(np.argsort(b, axis=None)[-k:].tolist())
    return len(top_a & top_b) / k


# The rank floors (our own): at the defaults the ranking and the top tenth must survive well; the
# coarser setting trades them for speed on purpose, so it only has to keep most of them. What it
# claims about itself (exact where evaluated, the size of its sampled error) is held to the same
# standard in both.
@pytest.mark.parametrize("settings, floor", [({}, 0.75), ({"refine_tolerance": 0.6, "drill_down": 0.05}, 0.6)],
                         ids=["defaults", "coarser"])
@pytest.mark.parametrize("sample", ["sound_tagged_01.png", "chip_plain_01.png"])
def test_approximate_is_bounded_against_the_loop(tilenet, sample, settings, floor):
    tile = REPO / "demo_models" / "tilenet" / "samples" / sample
    if not tile.is_file():
        pytest.skip("the demo samples are not built")
    x = prepare(tilenet.spec, read_image(tile)).tensor
    with torch.no_grad():
        target = int(tilenet.module(x).argmax())
    grid, drop, _, _ = reference_for(tilenet.module, x, target=target, patch=12, stride=4, baseline="mean",
                                     output="softmax")
    res = occlusion_map(tilenet.module, x, target=target, patch=12, stride=4, baseline="mean", output="softmax",
                        method="approximate", **settings)
    assert res.approximate and res.engine == "approximate"
    assert res.grid.shape == grid.shape
    spread = float(np.ptp(grid))
    error = np.abs(res.grid.astype(np.float64) - grid)
    # What it claims (core/occlusion/approximate.py): the positions marked evaluated were really run,
    # so there it is exact; the rest is interpolated, and a seeded sample of those was evaluated to
    # measure the interpolation's error, which it reports.
    assert res.evaluated.any() and not res.evaluated.all()
    assert float(error[res.evaluated].max()) <= REL_TOL * spread + 1e-6
    sampled = res.details["sampled_error"]
    asked = inspect.signature(occlusion_map).parameters["check_sample"].default
    assert sampled["positions"] == min(asked, sampled["interpolated_positions"]) > 0
    assert int((~res.evaluated).sum()) == sampled["interpolated_positions"] - sampled["positions"]
    # The sample estimates the error, it does not bound it; the estimate must still be of the right
    # size: the true mean error over the positions left interpolated, within 3× the reported one
    # plus 0.5% of the range (our own tolerance for a sample of about a dozen positions).
    true_mean = float(error[~res.evaluated].mean())
    assert true_mean <= 3 * sampled["mean_abs"] + 0.005 * spread, (true_mean, sampled)
    # A loose floor whatever it claims (our own bounds): no position off by more than a tenth of the
    # range, the ranking of positions and the most sensitive tenth of them survive.
    assert float(error.max()) <= 0.1 * spread
    assert float(np.abs(res.drop - drop).max()) <= 0.1 * float(np.ptp(drop))
    rho = stats.spearmanr(res.grid.ravel(), grid.ravel()).statistic
    assert rho >= floor, rho
    assert _top_overlap(res.grid, grid) >= floor
