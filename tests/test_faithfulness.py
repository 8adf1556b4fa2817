"""Deletion / insertion curves and the method ranking."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn

from pellucid.core.attribution import compute_attribution, faithfulness, rank_methods
from pellucid.core.attribution.faithfulness import FaithfulnessResult, pixel_order
from pellucid.core.errors import BadParameterError, Cancelled
from pellucid.core.progress import CancelToken

ROOT = Path(__file__).resolve().parents[1]
DEMO_WEIGHTS = ROOT / "demo_models" / "tilenet" / "tilenet.safetensors"


class LinearModel(nn.Module):
    """Logits (w·x, 0): the class-0 probability is sigmoid(w·x)."""

    def __init__(self, w: torch.Tensor) -> None:
        super().__init__()
        self.w = nn.Parameter(w.clone())

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        s = (x * self.w).flatten(1).sum(1)
        return torch.stack([s, torch.zeros_like(s)], dim=1)


class Constant(nn.Module):
    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return torch.tensor([[1.0, 0.0]]).expand(x.shape[0], 2)


@pytest.fixture()
def linear_case():
    g = torch.Generator().manual_seed(2)
    w = torch.rand(1, 1, 10, 10, generator=g) * 0.2
    x = torch.rand(1, 1, 10, 10, generator=g)
    return LinearModel(w).eval(), w, x


def test_curve_shape_endpoints_and_auc(linear_case):
    # Source: Petsiuk, Das, Saenko, "RISE", BMVC 2018, §4 — deletion runs from the image to the
    # canvas, insertion from the blurred image to the image; x in [0, 1]; steps of 1% of the
    # pixels as in Wang et al., "Score-CAM", CVPR Workshops 2020, §4.
    model, w, x = linear_case
    res = faithfulness(model, x, (w * x)[0, 0].detach().numpy(), target=0, blur_sigma=2.0)
    d, i = res.curves["deletion"], res.curves["insertion"]
    assert len(d.fractions) == 101 and d.fractions[0] == 0.0 and d.fractions[-1] == 1.0

    def p(t):
        return float(torch.softmax(model(t).detach(), dim=1)[0, 0])

    assert math.isclose(d.scores[0], p(x), rel_tol=1e-6)
    assert math.isclose(d.scores[-1], p(torch.zeros_like(x)), rel_tol=1e-6)
    from pellucid.core.attribution.baselines import blurred

    assert math.isclose(i.scores[0], p(blurred(x, 2.0)), rel_tol=1e-6)
    assert math.isclose(i.scores[-1], p(x), rel_tol=1e-6)
    # common practice, no source: the trapezoid rule on the recorded points.
    assert math.isclose(d.auc, float(np.trapezoid(d.scores, d.fractions)), rel_tol=1e-12)
    assert res.target == 0 and res.n_forwards == 203


def test_constant_model_gives_its_probability_as_auc():
    # derived from the definition: a flat curve at p has area p over [0, 1].
    x = torch.rand(1, 3, 8, 8)
    res = faithfulness(Constant(), x, np.random.default_rng(0).random((8, 8)), target=0)
    p = float(torch.softmax(torch.tensor([1.0, 0.0]), 0)[0])
    assert math.isclose(res.deletion_auc, p, rel_tol=1e-6) and math.isclose(res.insertion_auc, p, rel_tol=1e-6)


def test_true_contributions_beat_a_random_map(linear_case):
    # derived from Petsiuk et al., BMVC 2018, §4: for a linear score with non-negative
    # contributions w ⊙ x, deleting the largest first lowers the (monotone) probability at least
    # as fast as any other order, so its deletion AUC is the lowest and its insertion AUC the highest.
    model, w, x = linear_case
    true_map = (w * x)[0, 0].detach().numpy()
    rand_map = np.random.default_rng(3).random((10, 10))
    good = faithfulness(model, x, true_map, target=0, deletion_canvas=torch.zeros_like(x))
    bad = faithfulness(model, x, rand_map, target=0)
    anti = faithfulness(model, x, -true_map, target=0)
    assert good.deletion_auc < bad.deletion_auc < anti.deletion_auc
    # insertion from a blurred copy: blur mixes values, so only compare against the reversed order.
    assert good.insertion_auc > anti.insertion_auc


def test_ties_are_broken_by_the_seed():
    flat = np.zeros((6, 6))
    a, b, c = pixel_order(flat, seed=1), pixel_order(flat, seed=1), pixel_order(flat, seed=2)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c) and sorted(a.tolist()) == list(range(36))
    ordered = pixel_order(np.arange(36.0).reshape(6, 6), seed=0)
    assert ordered[0] == 35 and ordered[-1] == 0


def test_rank_methods_orders_by_both_aucs():
    # derived from Petsiuk et al., BMVC 2018, §4: lower deletion and higher insertion AUC are better.
    rows = rank_methods({
        "a": {"deletion_auc": 0.10, "insertion_auc": 0.80},
        "b": {"deletion_auc": 0.30, "insertion_auc": 0.60},
        "c": {"deletion_auc": 0.20, "insertion_auc": 0.40},
    })
    assert [r["method"] for r in rows] == ["a", "b", "c"]
    assert rows[0]["deletion_rank"] == 1 and rows[0]["insertion_rank"] == 1
    by = {r["method"]: r for r in rows}
    assert by["b"]["deletion_rank"] == 3 and by["c"]["insertion_rank"] == 3
    assert [r["combined_rank"] for r in rows] == [1, 2, 3]
    assert rank_methods({}) == []


def test_rank_methods_refuses_mixed_targets(linear_case):
    model, w, x = linear_case
    m = (w * x)[0, 0].detach().numpy()
    r0 = faithfulness(model, x, m, target=0)
    r1 = faithfulness(model, x, m, target=1)
    assert isinstance(r0, FaithfulnessResult)
    with pytest.raises(BadParameterError, match="different classes"):
        rank_methods({"x": r0, "y": r1})
    with pytest.raises(BadParameterError, match="both a deletion and an insertion"):
        rank_methods({"x": faithfulness(model, x, m, target=0, kinds=("deletion",))})


@pytest.mark.parametrize("kwargs,match", [
    ({"saliency": np.zeros((9, 10))}, r"\(H, W\) = \(10, 10\)"),
    ({"saliency": np.full((10, 10), np.nan)}, "NaN"),
    ({"step_fraction": 0.0}, "step_fraction"),
    ({"step_fraction": float("nan")}, "step_fraction"),
    ({"kinds": ("erosion",)}, "kinds"),
    ({"target": 5}, "out of range"),
    ({"deletion_canvas": torch.zeros(1, 1, 3, 3)}, "deletion_canvas"),
    ({"blur_sigma": -1.0}, "blur_sigma"),
])
def test_bad_arguments(linear_case, kwargs, match):
    model, _, x = linear_case
    args = {"saliency": np.zeros((10, 10)), "target": 0, **kwargs}
    sal = args.pop("saliency")
    with pytest.raises(BadParameterError, match=match):
        faithfulness(model, x, sal, **args)


def test_cancel_and_progress(linear_case):
    model, _, x = linear_case
    seen: list[tuple[int, int]] = []
    faithfulness(model, x, np.zeros((10, 10)), target=0, progress=lambda d, t: seen.append((d, t)))
    assert seen[-1] == (202, 202)
    token = CancelToken()
    token.cancel()
    with pytest.raises(Cancelled):
        faithfulness(model, x, np.zeros((10, 10)), target=0, cancel=token)


def test_gradcam_on_tagged_demo_tile_beats_a_random_map():
    # Source: Petsiuk et al., BMVC 2018, §4 — a map that points at the evidence the model uses
    # has a lower deletion AUC than a random map. On the demo model that evidence includes the
    # planted calibration tag, which Grad-CAM is expected to light up (the demo scenario,
    # demo_models/tilenet/MODEL_CARD.md).
    if not DEMO_WEIGHTS.exists():
        pytest.skip(f"demo model not built yet ({DEMO_WEIGHTS.relative_to(ROOT)} missing)")
    from safetensors.torch import load_file

    from pellucid.demo.net import build_tilenet, normalise
    from pellucid.demo.tiles import make_tile

    model = build_tilenet(num_classes=4)
    model.load_state_dict(load_file(str(DEMO_WEIGHTS)))
    model.eval()
    x = normalise(torch.from_numpy(make_tile(label="crack", tagged=True, seed=7)).unsqueeze(0))
    amap = compute_attribution("gradcam", model, x)
    rand = np.random.default_rng(0).random(amap.map.shape)
    good = faithfulness(model, x, amap.map, target=amap.target, kinds=("deletion",))
    base = faithfulness(model, x, rand, target=amap.target, kinds=("deletion",))
    assert good.deletion_auc < base.deletion_auc


def test_blocks_change_together_and_block_is_validated():
    from pellucid.core.attribution.faithfulness import _block_means

    sal = np.arange(16, dtype=np.float64).reshape(4, 4)
    means = _block_means(sal, 2)
    assert means[0, 0] == means[1, 1] == np.mean([0, 1, 4, 5]) and means[3, 3] == np.mean([10, 11, 14, 15])
    assert _block_means(sal, 1) is sal
    model = nn.Sequential(nn.Flatten(), nn.Linear(16, 2)).eval()
    with pytest.raises(BadParameterError, match="block must be an integer from 1 to 4"):
        faithfulness(model, torch.zeros(1, 1, 4, 4), sal, block=5)
