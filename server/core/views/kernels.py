"""Kernel views: a conv layer's weights, per-filter norms, dead and near-duplicate filters, and grids.

Rules (our own choices, documented here so a reviewer can weigh the flags):

* **dead** — a filter whose L2 norm is at most ``DEAD_FRACTION`` (1 %) of the layer's median filter
  norm. Such a filter answers any input with less than a hundredth of a typical filter's response,
  which usually means it was pruned, never trained, or collapsed under weight decay. An all-zero
  layer (median 0) flags exactly its zero filters.
* **near duplicate** — two filters whose flattened weights have cosine similarity above
  ``DUPLICATE_COSINE`` (0.95). Only filters of the same group are compared (filters of different
  groups read different input channels, so they cannot do the same job), and dead filters are left
  out (their direction is noise). Anti-parallel filters (cosine near −1) are not duplicates: after
  a ReLU they respond to opposite inputs.

The grids return uint8 pictures; PNG encoding is left to the renderer.
"""

from __future__ import annotations

import difflib
import math
import time
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn

from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.model.layers import conv_layer_names, is_conv_module
from pellucid.core.views import render

__all__ = [
    "DEAD_FRACTION",
    "DUPLICATE_COSINE",
    "KernelGrid",
    "KernelView",
    "channel_grid",
    "kernel_view",
    "rgb_grid",
]

DEAD_FRACTION = 0.01
DUPLICATE_COSINE = 0.95
_MAX_PAIRS = 200
_GAP_VALUE = 255  # separators between kernels: white, like the activation grids


@dataclass(frozen=True)
class KernelView:
    """One conv layer's filters.

    ``weights`` is (out_channels, in_channels // groups, kh, kw) float32; ``norms`` and ``dead``
    are (out_channels,). ``near_duplicates`` holds (i, j, cosine) with i < j, most similar first,
    at most ``_MAX_PAIRS`` of them; ``duplicates_total`` counts them all.
    """

    layer: str
    layer_type: str
    weights: np.ndarray
    bias: np.ndarray | None
    groups: int
    norms: np.ndarray
    median_norm: float
    dead: np.ndarray
    dead_fraction: float
    near_duplicates: tuple[tuple[int, int, float], ...]
    duplicates_total: int
    duplicate_cosine: float
    seconds: float

    @property
    def out_channels(self) -> int:
        return int(self.weights.shape[0])

    @property
    def in_channels(self) -> int:
        return int(self.weights.shape[1]) * self.groups

    @property
    def kernel_size(self) -> tuple[int, int]:
        return int(self.weights.shape[2]), int(self.weights.shape[3])

    def input_channels_of(self, filter_index: int) -> list[int]:
        """The model-level input channels filter ``filter_index`` reads (its group's slice)."""
        per_group_out = self.out_channels // self.groups
        per_group_in = int(self.weights.shape[1])
        group = filter_index // per_group_out
        return list(range(group * per_group_in, (group + 1) * per_group_in))

    def to_dict(self) -> dict[str, Any]:
        return {
            "layer": self.layer,
            "layer_type": self.layer_type,
            "weight_shape": list(self.weights.shape),
            "groups": self.groups,
            "norms": [float(v) for v in self.norms],
            "median_norm": self.median_norm,
            "dead": [int(i) for i in np.flatnonzero(self.dead)],
            "dead_rule": f"L2 norm <= {self.dead_fraction:g} x the layer's median filter norm",
            "near_duplicates": [{"a": a, "b": b, "cosine": c} for a, b, c in self.near_duplicates],
            "duplicates_total": self.duplicates_total,
            "duplicate_rule": f"cosine similarity of flattened filters > {self.duplicate_cosine:g}, same group",
            "seconds": self.seconds,
        }


@dataclass(frozen=True)
class KernelGrid:
    """A grid picture of kernels and where each one sits.

    ``image`` is (H, W, 3) uint8. Cell (row r, column c) starts at pixel
    ``(gap + r·(cell_h + gap), gap + c·(cell_w + gap))``. ``filters[r]`` / ``channels[c]`` say which
    filter and input channel a cell shows (for ``rgb_grid`` cells run row-major through
    ``filters`` and ``channels`` is empty). ``value_range`` is the shared diverging scale of a
    channel grid (None for the RGB grid, whose kernels are each scaled to their own ``scales``).
    """

    image: np.ndarray
    filters: list[int]
    channels: list[int]
    rows: int
    cols: int
    cell: tuple[int, int]
    gap: int
    zoom: int
    value_range: tuple[float, float] | None
    scales: list[float] | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "filters": self.filters,
            "channels": self.channels,
            "rows": self.rows,
            "cols": self.cols,
            "cell": list(self.cell),
            "gap": self.gap,
            "zoom": self.zoom,
            "value_range": list(self.value_range) if self.value_range is not None else None,
            "scales": self.scales,
        }


def _conv_list_text(names: list[str]) -> str:
    if not names:
        return "this model has no 2-D convolution layers"
    shown = ", ".join(names[:12])
    more = f" and {len(names) - 12} more" if len(names) > 12 else ""
    return f"conv layers: {shown}{more}"


def _type_name(module: nn.Module) -> str:
    # TorchScript modules keep the Python class name in original_name.
    return getattr(module, "original_name", None) or type(module).__name__


def _resolve(model: nn.Module, layer: str | None) -> tuple[str, nn.Module]:
    convs = conv_layer_names(model)
    if layer is None:
        if not convs:
            raise UnsupportedLayerError(
                f"Kernel views need a 2-D convolution layer, but {type(model).__name__} has none "
                "(no module owns a 4-D weight)."
            )
        return convs[0], dict(model.named_modules())[convs[0]]  # get_submodule fails on TorchScript
    modules = dict(model.named_modules())
    if layer not in modules or not layer:
        close = difflib.get_close_matches(layer, convs, n=5, cutoff=0.5)
        hint = f" Did you mean {', '.join(close)}?" if close else ""
        raise UnsupportedLayerError(f"The model has no layer named {layer!r}.{hint} Its {_conv_list_text(convs)}.")
    module = modules[layer]
    if not is_conv_module(module):
        raise UnsupportedLayerError(
            f"Layer {layer!r} is a {_type_name(module)}, not a 2-D convolution, so it has no kernels "
            f"to show. Pick one of the {_conv_list_text(convs)}."
        )
    return layer, module


def _pairs(flat: np.ndarray, norms: np.ndarray, dead: np.ndarray, groups: int,
           threshold: float) -> tuple[list[tuple[int, int, float]], int]:
    out = flat.shape[0]
    per_group = out // groups
    found: list[tuple[int, int, float]] = []
    for g in range(groups):
        idx = np.arange(g * per_group, (g + 1) * per_group)
        idx = idx[~dead[idx] & (norms[idx] > 0)]
        if idx.size < 2:
            continue
        unit = flat[idx] / norms[idx, None]
        cos = np.clip(unit @ unit.T, -1.0, 1.0)
        a, b = np.nonzero(np.triu(cos > threshold, k=1))
        found.extend((int(idx[i]), int(idx[j]), float(cos[i, j])) for i, j in zip(a, b))
    found.sort(key=lambda t: (-t[2], t[0], t[1]))
    return found[:_MAX_PAIRS], len(found)


def kernel_view(model: nn.Module, *, layer: str | None = None) -> KernelView:
    """Weights, norms and flags of one conv layer (default: the first one defined).

    Reads weights only: no forward pass, so it also works where hooks do not (TorchScript).
    Raises UnsupportedLayerError for an unknown or non-convolution layer, naming the conv layers.
    """
    started = time.perf_counter()
    if not isinstance(model, nn.Module):
        raise BadParameterError(f"kernel_view needs a torch.nn.Module; got {type(model).__name__}.")
    name, module = _resolve(model, layer)
    with torch.inference_mode():
        weight = module.weight.detach().to(torch.float32).cpu().numpy().copy()
        bias_t = getattr(module, "bias", None)
        bias = bias_t.detach().to(torch.float32).cpu().numpy().copy() if isinstance(bias_t, torch.Tensor) else None
    groups = int(getattr(module, "groups", 1) or 1)
    if weight.shape[0] % groups:
        groups = 1  # a module that misreports its groups; treat all filters as one group
    flat = weight.reshape(weight.shape[0], -1).astype(np.float64)
    norms = np.sqrt((flat**2).sum(axis=1))
    median = float(np.median(norms))
    dead = norms <= DEAD_FRACTION * median
    pairs, total = _pairs(flat, norms, dead, groups, DUPLICATE_COSINE)
    return KernelView(
        layer=name,
        layer_type=_type_name(module),
        weights=weight,
        bias=bias,
        groups=groups,
        norms=norms.astype(np.float32),
        median_norm=median,
        dead=dead,
        dead_fraction=DEAD_FRACTION,
        near_duplicates=tuple(pairs),
        duplicates_total=total,
        duplicate_cosine=DUPLICATE_COSINE,
        seconds=time.perf_counter() - started,
    )


def _auto_zoom(cell: tuple[int, int], zoom: int | None, target: int = 24) -> int:
    if zoom is None:
        return max(1, target // max(cell))
    if not isinstance(zoom, int) or isinstance(zoom, bool) or not 1 <= zoom <= 64:
        raise BadParameterError(f"zoom must be an integer from 1 to 64 (pixels per weight); got {zoom!r}.")
    return zoom


def _canvas(rows: int, cols: int, cell: tuple[int, int], gap: int) -> np.ndarray:
    h = rows * (cell[0] + gap) + gap
    w = cols * (cell[1] + gap) + gap
    return np.full((h, w, 3), _GAP_VALUE, dtype=np.uint8)


def _place(canvas: np.ndarray, tile: np.ndarray, r: int, c: int, cell: tuple[int, int], gap: int) -> None:
    y0, x0 = gap + r * (cell[0] + gap), gap + c * (cell[1] + gap)
    canvas[y0 : y0 + cell[0], x0 : x0 + cell[1]] = tile


def _check_gap(gap: Any) -> int:
    if not isinstance(gap, int) or isinstance(gap, bool) or not 0 <= gap <= 16:
        raise BadParameterError(f"gap must be an integer from 0 to 16 pixels; got {gap!r}.")
    return gap


def rgb_grid(view: KernelView, *, cols: int | None = None, zoom: int | None = 1, gap: int = 1) -> KernelGrid:
    """First-layer style picture: each filter of a 3-input-channel layer as one RGB tile.

    Each kernel is scaled symmetrically around zero on its own: value v becomes
    128 + 127·v / max|kernel|, so zero is mid-grey (128) and the kernel's extremes reach 1 and 255.
    ``zoom`` enlarges each weight to zoom×zoom pixels (None: about 24 px per tile).
    Returns a (H, W, 3) uint8 grid, filters row-major.
    """
    gap = _check_gap(gap)
    per_group_in = int(view.weights.shape[1])
    if view.groups != 1 or per_group_in != 3:
        raise UnsupportedLayerError(
            f"The RGB kernel grid needs a layer whose filters each read 3 input channels; {view.layer!r} "
            f"has filters over {per_group_in} channel(s) in {view.groups} group(s). Use the per-channel grid."
        )
    n = view.out_channels
    if cols is not None and (not isinstance(cols, int) or isinstance(cols, bool) or cols < 1):
        raise BadParameterError(f"cols must be a positive integer; got {cols!r}.")
    cols = cols or max(1, math.ceil(math.sqrt(n)))
    rows = math.ceil(n / cols)
    z = _auto_zoom(view.kernel_size, zoom)
    cell = (view.kernel_size[0] * z, view.kernel_size[1] * z)
    canvas = _canvas(rows, cols, cell, gap)
    scales: list[float] = []
    for f in range(n):
        kernel = view.weights[f].astype(np.float64)  # (3, kh, kw)
        bound = float(np.abs(kernel).max())
        scales.append(bound)
        unit = kernel / bound if bound > 0 else np.zeros_like(kernel)
        tile = np.rint(128.0 + 127.0 * unit).astype(np.uint8).transpose(1, 2, 0)
        if z > 1:
            tile = np.repeat(np.repeat(tile, z, axis=0), z, axis=1)
        r, c = divmod(f, cols)
        _place(canvas, tile, r, c, cell, gap)
    return KernelGrid(canvas, list(range(n)), [], rows, cols, cell, gap, z, None, scales)


def channel_grid(view: KernelView, *, filter_index: int | None = None, max_filters: int = 16,
                 max_channels: int = 32, zoom: int | None = 1, gap: int = 1,
                 cmap: str = render.SIGNED_CMAP) -> KernelGrid:
    """Each filter per input channel: one row per filter, one column per input channel it reads.

    ``filter_index`` shows that filter alone; otherwise the first ``max_filters`` filters. At most
    ``max_channels`` channels (the first ones of the filter's group) are shown. One diverging
    colour scale, symmetric around zero, is shared by every cell; its ``value_range`` comes back
    for the colour bar. Returns a (H, W, 3) uint8 grid.
    """
    gap = _check_gap(gap)
    for label, value in (("max_filters", max_filters), ("max_channels", max_channels)):
        if not isinstance(value, int) or isinstance(value, bool) or not 1 <= value <= 1024:
            raise BadParameterError(f"{label} must be an integer from 1 to 1024; got {value!r}.")
    if filter_index is not None:
        if not isinstance(filter_index, int) or isinstance(filter_index, bool) \
                or not 0 <= filter_index < view.out_channels:
            raise BadParameterError(
                f"filter_index must be an integer from 0 to {view.out_channels - 1} for layer "
                f"{view.layer!r}; got {filter_index!r}."
            )
        filters = [filter_index]
    else:
        filters = list(range(min(max_filters, view.out_channels)))
    channels = list(range(min(max_channels, int(view.weights.shape[1]))))
    chosen = view.weights[np.ix_(filters, channels)].astype(np.float32)  # (F, C, kh, kw)
    vmin, vmax = render.value_range(chosen, signed=True)
    z = _auto_zoom(view.kernel_size, zoom)
    cell = (view.kernel_size[0] * z, view.kernel_size[1] * z)
    canvas = _canvas(len(filters), len(channels), cell, gap)
    for r in range(len(filters)):
        for c in range(len(channels)):
            tile = render.colorize(chosen[r, c], cmap=cmap, vmin=vmin, vmax=vmax)
            if z > 1:
                tile = np.repeat(np.repeat(tile, z, axis=0), z, axis=1)
            _place(canvas, tile, r, c, cell, gap)
    return KernelGrid(canvas, filters, channels, len(filters), len(channels), cell, gap, z, (vmin, vmax), None)
