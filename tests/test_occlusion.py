"""Occlusion sensitivity against closed forms and an outside reference model.

Method: Zeiler & Fergus, "Visualizing and Understanding Convolutional Networks", ECCV 2014, §4.2.
For a linear score s(x) = w·x + c, occluding a patch with baseline b changes the score by
Σ over the patch of wᵢ(xᵢ − bᵢ) [derived from the method's definition in that paper, §4.2].
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from torch import nn

from pellucid.core.errors import BadParameterError, Cancelled, ModelOutputError
from pellucid.core.occlusion.engine import MAX_POSITIONS, occlusion_map
from pellucid.core.occlusion.positions import make_baseline, occlusion_positions
from pellucid.core.progress import CancelToken


def _linear(c: int, h: int, w: int, k: int, seed: int = 0, dtype=torch.float64) -> nn.Module:
    g = torch.Generator().manual_seed(seed)
    lin = nn.Linear(c * h * w, k).to(dtype)
    with torch.no_grad():
        lin.weight.copy_(torch.randn(k, c * h * w, generator=g, dtype=dtype))
        lin.bias.copy_(torch.randn(k, generator=g, dtype=dtype))
    return nn.Sequential(nn.Flatten(), lin).eval()


def _analytic_logit_grid(model: nn.Module, x: torch.Tensor, base: torch.Tensor, target: int, patch: int, stride: int):
    _, c, h, w = x.shape
    wt = model[1].weight[target].detach().view(c, h, w)
    diff = (wt * (x[0] - base[0])).sum(0)  # (H, W): per-pixel contribution w·(x − b)
    tops = occlusion_positions(h, patch, stride)
    lefts = occlusion_positions(w, patch, stride)
    return np.array([[float(diff[t : t + patch, c : c + patch].sum()) for c in lefts] for t in tops])


class TestPositions:
    def test_cover_whole_axis_with_flush_last_position(self):
        # common practice, no source: the last window sits flush with the border.
        assert occlusion_positions(13, 4, 3).tolist() == [0, 3, 6, 9]
        assert occlusion_positions(11, 4, 3).tolist() == [0, 3, 6, 7]
        assert occlusion_positions(8, 8, 5).tolist() == [0]
        assert occlusion_positions(224, 16, 8).shape == (27,)


class TestLinear:
    @pytest.mark.parametrize("baseline", ["zero", "mean", 0.7, "blur", "tensor"])
    @pytest.mark.parametrize("hw,patch,stride", [((13, 11), 4, 3), ((8, 8), 3, 2), ((9, 12), 5, 5)])
    def test_logit_drop_equals_analytic_patch_sum(self, baseline, hw, patch, stride):
        # Source: Zeiler & Fergus, ECCV 2014, §4.2 (method); the linear identity is derived from it.
        h, w = hw
        model = _linear(2, h, w, 5, seed=1)
        x = torch.randn(1, 2, h, w, generator=torch.Generator().manual_seed(2), dtype=torch.float64)
        if baseline == "tensor":
            baseline = torch.tensor([0.25, -0.5], dtype=torch.float64)
        base, _ = make_baseline(x, baseline, patch=patch)
        res = occlusion_map(model, x, target=3, patch=patch, stride=stride, baseline=baseline, output="logit",
                            method="batched")
        expected = _analytic_logit_grid(model, x, base, 3, patch, stride)
        np.testing.assert_allclose(res.grid, expected, atol=1e-4, rtol=1e-5)
        assert res.engine == "batched" and res.target == 3 and not res.approximate

    def test_map_is_mean_over_covering_positions(self):
        model = _linear(1, 13, 11, 3)
        x = torch.randn(1, 1, 13, 11, dtype=torch.float64)
        res = occlusion_map(model, x, target=0, patch=4, stride=3, baseline="zero", output="logit")
        assert res.drop.shape == (13, 11) and res.drop.dtype == np.float32
        for y, xx in [(0, 0), (5, 4), (12, 10), (7, 7)]:
            vals = [res.grid[i, j] for i, t in enumerate(res.tops) for j, lft in enumerate(res.lefts)
                    if t <= y < t + 4 and lft <= xx < lft + 4]
            assert vals, "every pixel is covered"
            assert res.drop[y, xx] == pytest.approx(np.mean(vals), abs=1e-5)

    def test_naive_equals_batched(self):
        model = _linear(3, 10, 10, 4, dtype=torch.float32)
        x = torch.randn(1, 3, 10, 10)
        a = occlusion_map(model, x, patch=3, stride=2, method="naive")
        b = occlusion_map(model, x, patch=3, stride=2, method="batched", batch_size=7)
        assert a.engine == "naive" and b.engine == "batched"
        np.testing.assert_allclose(a.grid, b.grid, atol=1e-6)
        assert a.n_forwards == b.n_forwards == a.grid.size + 1

    def test_ignored_pixels_change_nothing(self):
        # Source: Zeiler & Fergus, ECCV 2014, §4.2; "occluding pixels the model ignores changes
        # nothing" [derived from the method's definition].
        model = _linear(1, 12, 12, 3, seed=4)
        with torch.no_grad():
            model[1].weight.view(3, 1, 12, 12)[:, :, :, :6] = 0.0  # the model ignores the left half
        # Seeded, and scored on the logit: a saturated softmax (p ≈ 1) moves by less than float32
        # can show, which made this check depend on the global random state.
        x = torch.randn(1, 1, 12, 12, dtype=torch.float64, generator=torch.Generator().manual_seed(5))
        res = occlusion_map(model, x, patch=3, stride=3, baseline=5.0, output="logit")
        left = res.lefts + 3 <= 6
        # Equal up to float64 rounding: the base score comes from a batch of one, the occluded
        # scores from larger batches, whose matrix products may round differently.
        assert np.all(np.abs(res.grid[:, left]) <= 1e-12)
        assert np.all(np.abs(res.grid[:, ~left]) > 1e-6)
        assert np.all(np.abs(res.drop[:, :6]) <= 1e-12)

    def test_default_target_is_top1_and_base_score(self):
        model = _linear(1, 6, 6, 4, seed=5)
        x = torch.randn(1, 1, 6, 6, dtype=torch.float64)
        with torch.no_grad():
            p = torch.softmax(model(x), 1)[0]
        res = occlusion_map(model, x, patch=2, stride=2)
        assert res.target == int(p.argmax())
        assert res.base_score == pytest.approx(float(p.max()), abs=1e-12)
        res_s = occlusion_map(model, x, patch=2, stride=2, output="sigmoid", target=1)
        with torch.no_grad():
            assert res_s.base_score == pytest.approx(float(torch.sigmoid(model(x)[0, 1])), abs=1e-12)


@pytest.fixture(scope="module")
def fitted():
    from sklearn.datasets import load_digits
    from sklearn.linear_model import LogisticRegression

    # Source: Alpaydin & Kaynak, UCI Optical Recognition of Handwritten Digits (8×8, 0–16),
    # as bundled by scikit-learn (sklearn.datasets.load_digits).
    digits = load_digits()
    xs = digits.data / 16.0
    clf = LogisticRegression(max_iter=2000).fit(xs, digits.target)
    lin = nn.Linear(64, 10).double()
    with torch.no_grad():
        lin.weight.copy_(torch.from_numpy(clf.coef_))
        lin.bias.copy_(torch.from_numpy(clf.intercept_))
    return clf, nn.Sequential(nn.Flatten(), lin).eval(), xs


class TestDigits:
    """scikit-learn's bundled copy of the UCI optical digits, with a fitted LogisticRegression."""

    def test_torch_copy_matches_predict_proba(self, fitted):
        clf, model, xs = fitted
        with torch.no_grad():
            p = torch.softmax(model(torch.from_numpy(xs[:200]).view(-1, 1, 8, 8)), 1).numpy()
        np.testing.assert_allclose(p, clf.predict_proba(xs[:200]), atol=1e-6)

    @pytest.mark.parametrize("index", [0, 17, 123])
    def test_drops_match_sklearn_on_occluded_images(self, fitted, index):
        clf, model, xs = fitted
        img = xs[index].reshape(8, 8)
        x = torch.from_numpy(img).view(1, 1, 8, 8)
        res = occlusion_map(model, x, patch=3, stride=2, baseline="mean", output="softmax")
        t = res.target
        assert t == int(clf.predict(xs[index : index + 1])[0])
        occluded = []
        for top in res.tops:
            for left in res.lefts:
                o = img.copy()
                o[top : top + 3, left : left + 3] = img.mean()
                occluded.append(o.ravel())
        p0 = clf.predict_proba(xs[index : index + 1])[0, t]
        expected = p0 - clf.predict_proba(np.array(occluded))[:, t]
        np.testing.assert_allclose(res.grid.ravel(), expected, atol=1e-6)

    def test_logit_change_follows_coefficients(self, fitted):
        clf, model, xs = fitted
        img = xs[42].reshape(8, 8)
        x = torch.from_numpy(img).view(1, 1, 8, 8)
        res = occlusion_map(model, x, patch=2, stride=2, baseline="zero", output="logit")
        coef = clf.coef_[res.target].reshape(8, 8)
        expected = np.array([[np.sum(coef[t : t + 2, c : c + 2] * img[t : t + 2, c : c + 2]) for c in res.lefts]
                             for t in res.tops])
        np.testing.assert_allclose(res.grid, expected, atol=1e-9)
        # ordering of the patches by drop is the ordering by Σ coef·(x − b)
        assert np.array_equal(np.argsort(res.grid.ravel(), kind="stable"), np.argsort(expected.ravel(), kind="stable"))

    def test_constant_zero_pixels_have_no_effect(self, fitted):
        _, model, xs = fitted
        # pixels that are 0 in every digit get a zero coefficient; occluding one with 0 changes nothing
        always_zero = np.flatnonzero(xs.max(0) == 0)
        assert always_zero.size > 0
        x = torch.from_numpy(xs[7].reshape(8, 8)).view(1, 1, 8, 8)
        res = occlusion_map(model, x, patch=1, stride=1, baseline="zero", output="softmax")
        assert np.all(res.grid.ravel()[always_zero] == 0.0)


class TestValidation:
    @pytest.fixture
    def setup(self):
        return _linear(1, 8, 8, 3, dtype=torch.float32), torch.randn(1, 1, 8, 8)

    @pytest.mark.parametrize("kw", [
        {"patch": 0}, {"patch": -2}, {"patch": 2.5}, {"patch": math.nan}, {"patch": math.inf}, {"patch": True},
        {"patch": "4"}, {"patch": 9}, {"stride": 0}, {"stride": 3}, {"stride": 1.5}, {"stride": math.nan},
        {"target": 3}, {"target": -1}, {"target": 1.0}, {"baseline": "grey"}, {"baseline": math.nan},
        {"baseline": torch.zeros(5)}, {"output": "probability"}, {"method": "fast"}, {"batch_size": 0},
        {"refine_tolerance": -1.0},
    ])
    def test_bad_parameters_raise(self, setup, kw):
        model, x = setup
        with pytest.raises(BadParameterError) as info:
            occlusion_map(model, x, **{"patch": 2, "stride": 2, **kw})
        assert "receive" in str(info.value) or "limit" in str(info.value)

    def test_whole_float_patch_is_accepted(self, setup):
        model, x = setup
        assert occlusion_map(model, x, patch=4.0, stride=2.0).patch == 4

    def test_too_many_positions(self):
        model = nn.Sequential(nn.Flatten(), nn.Linear(300 * 300, 2)).eval()
        with pytest.raises(BadParameterError, match=f"{MAX_POSITIONS:,}"):
            occlusion_map(model, torch.zeros(1, 1, 300, 300), patch=1, stride=1)

    @pytest.mark.parametrize("x", [torch.zeros(2, 1, 8, 8), torch.zeros(1, 8, 8), torch.full((1, 1, 8, 8), math.nan),
                                   torch.zeros(1, 1, 8, 8, dtype=torch.int64)])
    def test_bad_input(self, setup, x):
        model, _ = setup
        with pytest.raises(BadParameterError):
            occlusion_map(model, x, patch=2, stride=2)

    def test_model_must_return_logits(self):
        model = nn.Conv2d(1, 1, 3).eval()
        with pytest.raises(ModelOutputError, match=r"\(N, K\)"):
            occlusion_map(model, torch.zeros(1, 1, 8, 8), patch=2, stride=2, method="batched")


class TestProgressAndCancel:
    def test_progress_reaches_total(self):
        model = _linear(1, 10, 10, 3, dtype=torch.float32)
        calls: list[tuple[int, int]] = []
        res = occlusion_map(model, torch.randn(1, 1, 10, 10), patch=2, stride=2, batch_size=4,
                            progress=lambda d, t: calls.append((d, t)))
        total = res.grid.size
        assert calls[-1] == (total, total)
        assert all(t == total for _, t in calls)
        assert [d for d, _ in calls] == sorted(d for d, _ in calls)
        assert len(calls) >= total // 4

    def test_cancel_stops_between_batches(self):
        model = _linear(1, 10, 10, 3, dtype=torch.float32)
        token = CancelToken()
        seen: list[int] = []

        def progress(done: int, total: int) -> None:
            seen.append(done)
            if done >= 8:
                token.cancel()

        with pytest.raises(Cancelled):
            occlusion_map(model, torch.randn(1, 1, 10, 10), patch=2, stride=2, batch_size=4,
                          progress=progress, cancel=token)
        assert max(seen) < 25

    def test_cancelled_before_start(self):
        token = CancelToken()
        token.cancel()
        with pytest.raises(Cancelled):
            occlusion_map(_linear(1, 6, 6, 2, dtype=torch.float32), torch.randn(1, 1, 6, 6), patch=2, stride=2,
                          cancel=token)
