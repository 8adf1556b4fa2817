"""Kernel views: dead and near-duplicate flags, the RGB and per-channel grids, layer errors."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import torch
from torch import nn

from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.views.kernels import DEAD_FRACTION, channel_grid, kernel_view, rgb_grid


def _model(first: nn.Conv2d) -> nn.Sequential:
    # Weights are read, never run: the shapes after the convs do not matter here.
    return nn.Sequential(first, nn.ReLU(), nn.Conv2d(first.out_channels, 4, 3), nn.Flatten(), nn.Linear(4, 2))


def _seeded_conv(cin: int, cout: int, k: int, **kw) -> nn.Conv2d:
    torch.manual_seed(0)
    return nn.Conv2d(cin, cout, k, **kw)


def test_zeroed_filter_is_dead_and_others_are_not():
    conv = _seeded_conv(3, 8, 3)
    with torch.no_grad():
        conv.weight[5].zero_()
        conv.weight[2] *= DEAD_FRACTION / 2  # well below the 1 % rule
    view = kernel_view(_model(conv))
    assert view.layer == "0"
    assert view.weights.shape == (8, 3, 3, 3)
    assert view.norms[5] == 0.0
    assert np.flatnonzero(view.dead).tolist() == [2, 5]
    np.testing.assert_allclose(view.norms, conv.weight.detach().flatten(1).norm(dim=1).numpy(), rtol=1e-6)


def test_identical_and_scaled_filters_are_near_duplicates():
    conv = _seeded_conv(3, 6, 3)
    with torch.no_grad():
        conv.weight[4] = conv.weight[1]
        conv.weight[3] = 2.5 * conv.weight[0]  # cosine ignores scale
        conv.weight[5] = -conv.weight[2]  # anti-parallel: opposite detector, not a duplicate
    view = kernel_view(_model(conv))
    pairs = {(a, b): c for a, b, c in view.near_duplicates}
    assert set(pairs) == {(0, 3), (1, 4)}
    assert pairs[(1, 4)] == pytest.approx(1.0, abs=1e-9)
    assert pairs[(0, 3)] == pytest.approx(1.0, abs=1e-9)
    assert view.duplicates_total == 2
    json.dumps(view.to_dict())


def test_rgb_grid_shape_and_mid_grey_zero():
    # First-layer kernels drawn as colour with zero at mid-grey, each scaled to its own extreme
    # (common practice, no source; cf. Krizhevsky et al., NIPS 2012, Fig. 3).
    conv = _seeded_conv(3, 6, 3, bias=False)
    with torch.no_grad():
        conv.weight[0] = 0.0
        conv.weight[0, 1, 1, 1] = 0.7  # one positive peak: it becomes 255, the zeros 128
        conv.weight[1, 0, 0, 0] = -10.0  # dominant negative weight: it becomes 1
    grid = rgb_grid(kernel_view(_model(conv)))
    cols = math.ceil(math.sqrt(6))
    assert (grid.rows, grid.cols) == (2, cols)
    assert grid.image.dtype == np.uint8
    assert grid.image.shape == (2 * (3 + 1) + 1, cols * (3 + 1) + 1, 3)
    tile0 = grid.image[1:4, 1:4]  # first cell starts after one gap pixel
    assert tile0[1, 1, 1] == 255
    assert tile0[0, 0, 0] == 128 and tile0[2, 2, 2] == 128  # zero weight → mid-grey
    tile1 = grid.image[1:4, 5:8]
    assert tile1[0, 0, 0] == 1
    assert grid.scales[1] == pytest.approx(10.0)
    zoomed = rgb_grid(kernel_view(_model(conv)), zoom=4, gap=2)
    assert zoomed.image.shape == (2 * (12 + 2) + 2, cols * (12 + 2) + 2, 3)


def test_rgb_grid_needs_three_input_channels():
    view = kernel_view(_model(_seeded_conv(1, 4, 3)))
    with pytest.raises(UnsupportedLayerError, match="3 input channels"):
        rgb_grid(view)


def test_channel_grid_layout_and_shared_diverging_scale():
    model = _model(_seeded_conv(3, 5, 3))
    view = kernel_view(model, layer="2")  # 5 → 4 channels
    grid = channel_grid(view, max_filters=3, max_channels=2)
    assert (grid.rows, grid.cols) == (3, 2)
    assert grid.image.shape == (3 * 4 + 1, 2 * 4 + 1, 3)
    bound = float(np.abs(view.weights[:3, :2]).max())
    assert grid.value_range == pytest.approx((-bound, bound))
    single = channel_grid(view, filter_index=3)
    assert single.filters == [3] and single.channels == list(range(5))
    with pytest.raises(BadParameterError, match="filter_index"):
        channel_grid(view, filter_index=4)


def test_depthwise_filters_compare_only_within_their_group():
    conv = _seeded_conv(4, 8, 3, groups=4)  # two filters per group, each reading one channel
    with torch.no_grad():
        conv.weight[1] = conv.weight[0]  # same group (0): a real duplicate
        conv.weight[2] = conv.weight[0]  # group 1: reads another channel, not a duplicate
    view = kernel_view(nn.Sequential(conv))
    assert view.groups == 4 and view.in_channels == 4
    assert [(a, b) for a, b, _ in view.near_duplicates] == [(0, 1)]
    assert view.input_channels_of(2) == [1]
    assert channel_grid(view).image.shape == (8 * 4 + 1, 1 * 4 + 1, 3)


def test_non_conv_layer_error_lists_conv_layers():
    model = _model(_seeded_conv(3, 4, 3))
    with pytest.raises(UnsupportedLayerError, match=r"'4' is a Linear.*conv layers: 0, 2"):
        kernel_view(model, layer="4")
    with pytest.raises(UnsupportedLayerError, match=r"no layer named 'conv'.*conv layers: 0, 2"):
        kernel_view(model, layer="conv")
    with pytest.raises(UnsupportedLayerError, match="none"):
        kernel_view(nn.Sequential(nn.Linear(3, 2)))
