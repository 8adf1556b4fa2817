"""Rendering: colour scales, overlays, grids and PNG round trips."""

from __future__ import annotations

import io

import numpy as np
import pytest
from PIL import Image

from pellucid.core.errors import BadParameterError
from pellucid.core.views import render


@pytest.mark.parametrize("shape, mode", [((5, 7, 3), "RGB"), ((5, 7), "L"), ((4, 9, 4), "RGBA")])
def test_png_round_trip(shape, mode):
    # Decoded by Pillow, an independent PNG reader, so the hand-written encoder must follow the format.
    arr = np.random.default_rng(0).integers(0, 256, shape, dtype=np.uint8)
    decoded = Image.open(io.BytesIO(render.encode_png(arr)))
    assert decoded.mode == mode and np.array_equal(np.asarray(decoded), arr)


def test_signed_range_is_symmetric_and_zero_is_the_centre_colour():
    # A diverging map for signed values is centred at zero (common practice, no source).
    values = np.array([[-0.2, 0.0, 1.0]])
    lo, hi = render.value_range(values, signed=True)
    assert (lo, hi) == (-1.0, 1.0)
    coloured = render.colorize(values, cmap=render.SIGNED_CMAP, vmin=lo, vmax=hi)
    centre = render._lut(render.SIGNED_CMAP)[128]
    assert np.abs(coloured[0, 1].astype(int) - centre.astype(int)).max() <= 1


def test_overlay_blends_and_resizes():
    base = np.zeros((16, 16, 3), dtype=np.uint8)
    out = render.overlay(base, np.ones((4, 4)), alpha=1.0, vmin=0.0, vmax=1.0)
    assert out.shape == (16, 16, 3)
    assert np.array_equal(out[0, 0], render._lut(render.MAGNITUDE_CMAP)[255])
    assert np.array_equal(render.overlay(base, np.ones((4, 4)), alpha=0.0, vmin=0, vmax=1), base)
    with pytest.raises(BadParameterError, match="opacity"):
        render.overlay(base, np.ones((4, 4)), alpha=2.0, vmin=0, vmax=1)


def test_activation_grid_layout_maps_cells_back_to_channels():
    maps = np.stack([np.full((3, 3), i, dtype=np.float32) for i in range(5)])
    maps[2, 0, 0] = 10.0
    image, layout = render.activation_grid(maps, order=[4, 2, 0], cols=2, cell=6, gap=1)
    assert layout.channels == [4, 2, 0] and layout.rows == 2 and layout.cell == 6
    assert image.shape == (2 * 7 + 1, 2 * 7 + 1, 3)
    # The second cell holds channel 2, whose max sits top-left.
    assert np.array_equal(image[1, 8], render._lut(render.MAGNITUDE_CMAP)[255])


def test_colorbar_is_a_png():
    data = render.colorbar_png(vmin=-1, vmax=1, cmap=render.SIGNED_CMAP, label="drop")
    assert Image.open(io.BytesIO(data)).format == "PNG"


def test_unknown_colour_map():
    with pytest.raises(BadParameterError, match="colour map must be one of"):
        render.colorize(np.zeros((2, 2)), cmap="jet", vmin=0, vmax=1)
