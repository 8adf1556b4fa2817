"""Pictures for the report, as ``data:`` URIs: stored PNGs, heat maps on one shared scale, cell shading.

Pictures stay at the resolution the model saw (no resampling): the page enlarges them without
smoothing (``image-rendering: pixelated``, which the PDF keeps as /Interpolate false), so each
input pixel prints as a sharp square and nothing is invented between pixels. Numbers that a
picture would hide (a colour bar's ends, a confusion matrix's counts) are written as text beside
it, so they stay sharp and searchable in the PDF.
"""

from __future__ import annotations

import base64

import numpy as np

from pellucid.core.audit.measures import CORNERS, RegionLayout, region_masks
from pellucid.core.views.render import MAGNITUDE_CMAP, colorize, encode_png

__all__ = ["data_uri", "heat_uri", "png_uri", "scale_uri", "shade"]


def data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def png_uri(image: np.ndarray) -> str:
    """uint8 (H, W) or (H, W, 3) → PNG data URI (compressed harder than the dashboard's: it is archived)."""
    return data_uri(encode_png(np.ascontiguousarray(image), compress_level=6))


def _dash(mask: np.ndarray) -> np.ndarray:
    """The outline of a box mask, every other pair of pixels (a dashed frame)."""
    ys, xs = np.nonzero(mask)
    out = np.zeros_like(mask)
    if ys.size == 0:
        return out
    y0, y1, x0, x1 = ys.min(), ys.max(), xs.min(), xs.max()
    on = (np.arange(max(mask.shape)) // 2) % 2 == 0
    out[y0, x0:x1 + 1] = on[: x1 - x0 + 1]
    out[y1, x0:x1 + 1] = on[: x1 - x0 + 1]
    out[y0:y1 + 1, x0] = on[: y1 - y0 + 1]
    out[y0:y1 + 1, x1] = on[: y1 - y0 + 1]
    return out


def heat_uri(values: np.ndarray, *, vmax: float, layout: RegionLayout | None = None) -> str:
    """An (H, W) evidence map from 0 to ``vmax`` in the magnitude colour map; with ``layout``, the
    corner boxes are drawn as dashed white frames."""
    coloured = colorize(np.asarray(values, dtype=np.float32), cmap=MAGNITUDE_CMAP, vmin=0.0,
                        vmax=max(float(vmax), 1e-6))
    if layout is not None:
        regions = region_masks(values.shape, layout)
        for name in CORNERS:
            coloured[_dash(regions[name])] = 255
    return png_uri(coloured)


def scale_uri(steps: int = 128) -> str:
    """A horizontal strip of the magnitude colour map (its numbers are set as text by the page)."""
    ramp = np.repeat(np.linspace(0.0, 1.0, steps, dtype=np.float32)[None, :], 6, axis=0)
    return png_uri(colorize(ramp, cmap=MAGNITUDE_CMAP, vmin=0.0, vmax=1.0))


def shade(value: float, top: float, *, colour: str = "#d9822b") -> tuple[str, str]:
    """Background and text colour for a table cell holding ``value`` on a 0 … ``top`` scale: from white to
    ``colour`` (a light ramp, so the numbers stay readable in print and on screen)."""
    t = 0.0 if top <= 0 else min(1.0, max(0.0, value / top))
    r, g, b = (round(255.0 + (int(colour[i:i + 2], 16) - 255.0) * t) for i in (1, 3, 5))
    light = 0.299 * r + 0.587 * g + 0.114 * b > 120
    return f"#{r:02x}{g:02x}{b:02x}", ("#1f2a2e" if light else "#ffffff")
