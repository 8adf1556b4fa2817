"""Arrays to pictures: colour maps, overlays, grids, colour bars, PNG encoding.

Defaults follow common practice for honest maps: a perceptually uniform, colour-blind-safe map
for magnitudes ("cividis") and a diverging map centred at zero for signed attributions ("PuOr",
a ColorBrewer scheme marked colour-blind safe). Colouring goes through a 256-entry lookup table,
so large activation grids stay cheap.
"""

from __future__ import annotations

import io
import math
import struct
import zlib
from dataclasses import dataclass
from functools import lru_cache

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib import colormaps  # noqa: E402
from PIL import Image  # noqa: E402

from pellucid.core.errors import BadParameterError  # noqa: E402

MAGNITUDE_CMAP = "cividis"
SIGNED_CMAP = "PuOr_r"
ALLOWED_CMAPS = ("cividis", "viridis", "magma", "inferno", "PuOr_r", "RdBu_r", "gray")


@lru_cache(maxsize=16)
def _lut(name: str) -> np.ndarray:
    if name not in ALLOWED_CMAPS:
        raise BadParameterError(f"colour map must be one of {', '.join(ALLOWED_CMAPS)}, got {name!r}")
    table = colormaps[name](np.linspace(0.0, 1.0, 256))[:, :3]
    return (table * 255.0 + 0.5).astype(np.uint8)


def encode_png(image: np.ndarray, *, compress_level: int = 1) -> bytes:
    """uint8 (H, W), (H, W, 3) or (H, W, 4) → PNG bytes. Low compression: these are served locally.

    Written directly (rows with filter type 0, one zlib stream) rather than through Pillow, whose
    per-row filter search costs more than the compression itself at level 1; the page's activation
    grid is re-encoded on every layer or sort change.
    """
    if image.dtype != np.uint8:
        raise TypeError(f"encode_png takes uint8 arrays, got {image.dtype}")
    if image.ndim == 2:
        colour_type, rows = 0, image
    elif image.ndim == 3 and image.shape[2] in (3, 4):
        colour_type, rows = (2 if image.shape[2] == 3 else 6), image.reshape(image.shape[0], -1)
    else:
        raise TypeError(f"encode_png takes (H, W), (H, W, 3) or (H, W, 4) arrays, got shape {image.shape}")
    h, w = image.shape[:2]
    raw = np.empty((h, rows.shape[1] + 1), dtype=np.uint8)
    raw[:, 0] = 0  # filter type "none" for every row
    raw[:, 1:] = rows
    header = struct.pack(">IIBBBBB", w, h, 8, colour_type, 0, 0, 0)
    return b"".join((b"\x89PNG\r\n\x1a\n", _chunk(b"IHDR", header),
                     _chunk(b"IDAT", zlib.compress(raw.tobytes(), compress_level)), _chunk(b"IEND", b"")))


def _chunk(kind: bytes, data: bytes) -> bytes:
    return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)


def value_range(values: np.ndarray, *, signed: bool) -> tuple[float, float]:
    """(vmin, vmax) for a map: symmetric around zero when signed, else [min, max]."""
    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return (-1.0, 1.0) if signed else (0.0, 1.0)
    if signed:
        bound = float(np.abs(finite).max()) or 1.0
        return -bound, bound
    lo, hi = float(finite.min()), float(finite.max())
    if hi <= lo:
        hi = lo + 1.0
    return lo, hi


def colorize(values: np.ndarray, *, cmap: str, vmin: float, vmax: float) -> np.ndarray:
    """(H, W) float → (H, W, 3) uint8 through a colour map, clipping to [vmin, vmax]."""
    if not (math.isfinite(vmin) and math.isfinite(vmax)) or vmax <= vmin:
        raise BadParameterError(f"colour scale needs finite vmin < vmax, got {vmin}, {vmax}")
    scaled = (np.nan_to_num(values.astype(np.float32), nan=vmin) - vmin) * (255.0 / (vmax - vmin))
    index = np.clip(scaled + 0.5, 0, 255).astype(np.uint8)
    return _lut(cmap)[index]


def resize_map(values: np.ndarray, size: tuple[int, int]) -> np.ndarray:
    """Bilinearly resize a float map to (H, W)."""
    h, w = size
    if values.shape == (h, w):
        return values
    img = Image.fromarray(values.astype(np.float32), mode="F")
    return np.asarray(img.resize((w, h), Image.Resampling.BILINEAR), dtype=np.float32)


def overlay(base: np.ndarray, values: np.ndarray, *, alpha: float = 0.55, cmap: str = MAGNITUDE_CMAP,
            vmin: float, vmax: float) -> np.ndarray:
    """Blend a coloured map over an (H, W, 3) uint8 picture; the map is resized to the picture."""
    if not 0.0 <= alpha <= 1.0:
        raise BadParameterError(f"opacity must be between 0 and 1, got {alpha}")
    coloured = colorize(resize_map(values, base.shape[:2]), cmap=cmap, vmin=vmin, vmax=vmax)
    mixed = base.astype(np.float32) * (1.0 - alpha) + coloured.astype(np.float32) * alpha
    return np.clip(mixed + 0.5, 0, 255).astype(np.uint8)


def upscale_nearest(image: np.ndarray, factor: int) -> np.ndarray:
    """Enlarge by an integer factor without smoothing (small maps stay readable)."""
    if factor <= 1:
        return image
    return np.repeat(np.repeat(image, factor, axis=0), factor, axis=1)


@dataclass(frozen=True)
class GridLayout:
    """Where each channel sits in a grid picture: row-major cells of ``cell`` px with ``gap`` px."""

    channels: list[int]
    cols: int
    rows: int
    cell: int
    gap: int

    def to_dict(self) -> dict:
        return {"channels": self.channels, "cols": self.cols, "rows": self.rows, "cell": self.cell, "gap": self.gap}


def activation_grid(maps: np.ndarray, *, order: np.ndarray | list[int] | None = None, cols: int | None = None,
                    cell: int = 48, gap: int = 2, cmap: str = MAGNITUDE_CMAP,
                    shared_scale: bool = False, max_pixels: int = 600_000) -> tuple[np.ndarray, GridLayout]:
    """Tile (C, h, w) channel maps into one RGB picture.

    Each channel is scaled to its own [min, max] unless ``shared_scale`` (then one range for all).
    Cells shrink below ``cell`` px when needed to keep the picture near ``max_pixels``: PNG
    encoding time grows with the area, and a 1,280-channel layer would otherwise take longer to
    encode than the forward pass that made it. Returns the picture and the layout, so a click
    can be mapped back to a channel.
    """
    channels = list(range(maps.shape[0])) if order is None else [int(c) for c in order]
    n = len(channels)
    if n == 0:
        raise BadParameterError("no channels to draw")
    cell = max(8, min(cell, int(math.sqrt(max_pixels / n))))
    cols = cols or max(1, math.ceil(math.sqrt(n * 1.6)))
    rows = math.ceil(n / cols)
    h, w = maps.shape[1:]
    factor = max(1, cell // max(h, w))
    cell_h, cell_w = h * factor, w * factor
    cell_px = max(cell_h, cell_w)
    canvas = np.full((rows * (cell_px + gap) + gap, cols * (cell_px + gap) + gap, 3), 255, dtype=np.uint8)
    selected = maps[channels].astype(np.float32)
    if shared_scale:
        lo = np.full(n, float(selected.min()), dtype=np.float32)
        hi = np.full(n, float(selected.max()), dtype=np.float32)
    else:
        flat = selected.reshape(n, -1)
        lo, hi = flat.min(axis=1), flat.max(axis=1)
    span = np.where(hi > lo, hi - lo, 1.0).astype(np.float32)
    index = np.clip((selected - lo[:, None, None]) * (255.0 / span)[:, None, None] + 0.5, 0, 255).astype(np.uint8)
    coloured = _lut(cmap)[index]  # (n, h, w, 3)
    if factor > 1:
        coloured = np.repeat(np.repeat(coloured, factor, axis=1), factor, axis=2)
    for slot in range(n):
        r, c = divmod(slot, cols)
        y0, x0 = gap + r * (cell_px + gap), gap + c * (cell_px + gap)
        canvas[y0 : y0 + cell_h, x0 : x0 + cell_w] = coloured[slot]
    return canvas, GridLayout(channels=channels, cols=cols, rows=rows, cell=cell_px, gap=gap)


def colorbar_png(*, vmin: float, vmax: float, cmap: str = MAGNITUDE_CMAP, label: str = "",
                 width_px: int = 360, height_px: int = 64) -> bytes:
    """A horizontal colour bar with numbers, as PNG bytes."""
    from matplotlib.figure import Figure  # here: importing it costs more than the rest of this module
    from matplotlib.ticker import MaxNLocator

    dpi = 100
    fig = Figure(figsize=(width_px / dpi, height_px / dpi), dpi=dpi)
    ax = fig.add_axes((0.05, 0.52, 0.9, 0.28))
    gradient = np.linspace(vmin, vmax, 256)[None, :]
    ax.imshow(gradient, aspect="auto", cmap=colormaps[cmap], extent=(vmin, vmax, 0, 1), vmin=vmin, vmax=vmax)
    ax.set_yticks([])
    ax.tick_params(labelsize=7)
    # Five ticks at most, and tiny or huge ranges with a shared power of ten (×1e-4 at the end), so
    # the labels of a 0–0.0002 scale do not run into each other.
    ax.xaxis.set_major_locator(MaxNLocator(5))
    ax.ticklabel_format(axis="x", style="sci", scilimits=(-3, 4))
    ax.xaxis.get_offset_text().set_fontsize(7)
    if label:
        ax.set_title(label, fontsize=7, pad=2)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def map_png(values: np.ndarray, *, signed: bool, cmap: str | None = None,
            vmin: float | None = None, vmax: float | None = None, upscale: int = 1) -> bytes:
    """A float map rendered on its own (no picture underneath)."""
    lo, hi = value_range(values, signed=signed)
    cmap = cmap or (SIGNED_CMAP if signed else MAGNITUDE_CMAP)
    coloured = colorize(values, cmap=cmap, vmin=lo if vmin is None else vmin, vmax=hi if vmax is None else vmax)
    return encode_png(upscale_nearest(coloured, upscale))
