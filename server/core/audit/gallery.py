"""The channel response gallery: where in real data each channel of a layer fires hardest.

The folder is streamed once. For every channel a bounded top-N list of (activation, image,
position) is kept — memory is channels × N whatever the folder's size; no activation tensor
outlives its image. Ties are broken towards the earlier image, then the earlier position
(row-major), so the result is exactly what sorting every activation of the folder would give.
Each top unit's receptive-field patch (size, jump and start from the layer map; Araujo, Norris &
Sim, Distill 2019) is then cut from the picture the model saw, padded with grey where the field
reaches past the border. Per channel the gallery also holds the mean activation for every class
(which channels are class-selective) and, for a first-layer channel, its kernel.

In the spirit of Bau et al.'s Network Dissection (CVPR 2017), which looks at where units fire
over a whole dataset; the per-class selectivity index here is common practice, no source:
(best class mean − mean of the other classes) / (best + others), 0 for no preference.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from PIL import Image

from pellucid.core.errors import UnsupportedLayerError
from pellucid.core.model.layers import layer_map
from pellucid.core.model.loading import LoadedModel
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.kernels import kernel_view
from pellucid.core.views.probe import Probe

__all__ = ["ChannelGallery", "channel_gallery", "selectivity", "top_units"]

PATCH_MAX = 48
_GREY = 128


@dataclass
class ChannelGallery:
    """Top units of every channel of ``layer``.

    ``values``, ``items``, ``ys``, ``xs`` are (C, N): activation, item index (-1 when the folder had
    fewer than N units), and the unit's row and column in the layer's (h, w) output. ``patches`` is
    (C, N, p, p, 3) uint8. ``class_means`` is (C, K) over ``classes``; ``kernels`` is the
    (C, C_in, kh, kw) weight of the first conv layer when ``layer`` sits on it, else None.
    """

    layer: str
    output_shape: tuple[int, int, int]
    top: int
    values: np.ndarray
    items: np.ndarray
    ys: np.ndarray
    xs: np.ndarray
    patches: np.ndarray
    rf_size: tuple[int, int] | None
    rf_jump: tuple[int, int] | None
    rf_start: tuple[float, float] | None
    classes: list[str]
    class_means: np.ndarray
    selectivity: np.ndarray
    kernels: np.ndarray | None
    kernel_layer: str | None
    images: int
    seconds: float

    @property
    def channels(self) -> int:
        return int(self.values.shape[0])

    def to_dict(self, rels: list[str] | None = None) -> dict:
        """JSON-able view; ``rels`` maps item index → relative path for naming the images."""
        entries = []
        for c in range(self.channels):
            row = []
            for n in range(self.top):
                i = int(self.items[c, n])
                if i < 0:
                    continue
                row.append({"value": float(self.values[c, n]), "item": i, "y": int(self.ys[c, n]),
                            "x": int(self.xs[c, n]), "rel": rels[i] if rels is not None else None})
            entries.append(row)
        order = np.argsort(-self.selectivity, kind="stable")
        return {
            "layer": self.layer, "output_shape": list(self.output_shape), "top": self.top,
            "rf_size": list(self.rf_size) if self.rf_size else None,
            "rf_jump": list(self.rf_jump) if self.rf_jump else None,
            "rf_start": list(self.rf_start) if self.rf_start else None,
            "classes": list(self.classes), "class_means": self.class_means.tolist(),
            "selectivity": [float(v) for v in self.selectivity],
            "preferred_class": [self.classes[int(k)] if self.classes else None
                                for k in np.argmax(self.class_means, axis=1)] if self.classes else [],
            "most_selective": [int(c) for c in order[:16]],
            "kernel_layer": self.kernel_layer, "images": self.images, "seconds": self.seconds,
            "entries": entries,
        }


def top_units(current: tuple[np.ndarray, np.ndarray, np.ndarray], acts: np.ndarray, item: int,
              top: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Merge one image's (C, h·w) activations into the running (values, items, positions) top lists."""
    values, items, pos = current
    n = min(top, acts.shape[1])
    # Stable sort on the negated values: equal values keep position order.
    order = np.argsort(-acts, axis=1, kind="stable")[:, :n]
    new_v = np.take_along_axis(acts, order, axis=1)
    cand_v = np.concatenate([values, new_v], axis=1)
    cand_i = np.concatenate([items, np.full_like(order, item)], axis=1)
    cand_p = np.concatenate([pos, order], axis=1)
    # Earlier entries come first, so a stable sort keeps earlier images ahead on ties.
    keep = np.argsort(-cand_v, axis=1, kind="stable")[:, :top]
    return (np.take_along_axis(cand_v, keep, axis=1), np.take_along_axis(cand_i, keep, axis=1),
            np.take_along_axis(cand_p, keep, axis=1))


def selectivity(class_means: np.ndarray) -> np.ndarray:
    """(C, K) class means → (C,) index in [0, 1] for non-negative means (see the module docstring)."""
    if class_means.shape[1] < 2:
        return np.zeros(class_means.shape[0], dtype=np.float64)
    best = class_means.max(axis=1)
    rest = (class_means.sum(axis=1) - best) / (class_means.shape[1] - 1)
    denom = np.abs(best) + np.abs(rest)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(denom > 0, (best - rest) / denom, 0.0)
    return out


def _crop(display: np.ndarray, cy: float, cx: float, size: tuple[int, int]) -> np.ndarray:
    h, w = display.shape[:2]
    sh, sw = size
    y0 = round(cy - (sh - 1) / 2.0)
    x0 = round(cx - (sw - 1) / 2.0)
    out = np.full((sh, sw, 3), _GREY, dtype=np.uint8)
    ys0, xs0 = max(0, y0), max(0, x0)
    ys1, xs1 = min(h, y0 + sh), min(w, x0 + sw)
    if ys1 > ys0 and xs1 > xs0:
        out[ys0 - y0:ys1 - y0, xs0 - x0:xs1 - x0] = display[ys0:ys1, xs0:xs1]
    return out


def _fit(patch: np.ndarray, side: int) -> np.ndarray:
    ph, pw = patch.shape[:2]
    if ph == side and pw == side:
        return patch
    img = Image.fromarray(patch)
    scale = min(side / ph, side / pw)
    img = img.resize((max(1, round(pw * scale)), max(1, round(ph * scale))), Image.Resampling.BILINEAR)
    canvas = np.full((side, side, 3), _GREY, dtype=np.uint8)
    arr = np.asarray(img)
    oy, ox = (side - arr.shape[0]) // 2, (side - arr.shape[1]) // 2
    canvas[oy:oy + arr.shape[0], ox:ox + arr.shape[1]] = arr
    return canvas


def _first_layer_kernels(model: LoadedModel, layer: str, lmap, channels: int) -> tuple[np.ndarray | None,
                                                                                         str | None]:
    convs = [r for r in lmap.conv_layers() if r.call_index is not None]
    if not convs:
        return None, None
    first = convs[0]
    row = lmap.by_name(layer)
    nxt = convs[1].call_index if len(convs) > 1 else None
    on_first = row.name == first.name or (
        row.call_index is not None and first.call_index is not None and row.call_index >= first.call_index
        and (nxt is None or row.call_index < nxt) and not row.is_conv)
    if not on_first:
        return None, None
    view = kernel_view(model.module, layer=first.name)
    if view.out_channels != channels:
        return None, None
    return view.weights, first.name


def channel_gallery(model: LoadedModel, items: list[dict], *, layer: str, top: int = 8,
                    progress: ProgressFn | None = None, cancel: CancelToken | None = None) -> ChannelGallery:
    """Stream ``items`` (``DatasetItem.to_dict()`` records with a ``path``) once through ``layer``."""
    if not model.supports_hooks:
        raise UnsupportedLayerError("this model does not allow forward hooks, so no channel gallery can be built")
    start = time.perf_counter()
    lmap = layer_map(model.module, input_shape=model.input_shape)
    row = lmap.by_name(layer)
    classes = [c for c in model.labels if any(i["label"] == c for i in items)]
    values = items_idx = pos = None
    sums = counts = None
    shape: tuple[int, int, int] | None = None
    total = 2 * len(items)
    model.module.eval()
    for n, item in enumerate(items):
        step(n, total, progress=progress, cancel=cancel)
        try:
            prepared = prepare(model.spec, read_image(Path(item["path"])))
        except Exception:  # noqa: BLE001, S112 - unreadable files were listed at intake; skip them here too
            continue
        with Probe(model.module, [layer]) as probe, torch.inference_mode():
            model.module(prepared.tensor)
        act = probe.outputs.get(layer)
        if act is None or act.ndim != 4:
            got = tuple(act.shape) if act is not None else "nothing"
            raise UnsupportedLayerError(f"layer {layer!r} gave {got}; the gallery needs a (N, C, h, w) feature map")
        a = act[0].float().numpy()
        c, h, w = a.shape
        flat = a.reshape(c, h * w).astype(np.float64)
        if values is None:
            shape = (c, h, w)
            values = np.full((c, 0), -np.inf)
            items_idx = np.zeros((c, 0), dtype=np.int64)
            pos = np.zeros((c, 0), dtype=np.int64)
            sums = np.zeros((c, len(classes)))
            counts = np.zeros(len(classes))
        values, items_idx, pos = top_units((values, items_idx, pos), flat, int(item["index"]), top)
        if item["label"] in classes:
            k = classes.index(item["label"])
            sums[:, k] += flat.mean(axis=1)
            counts[k] += 1
    if values is None or shape is None:
        raise UnsupportedLayerError("no image could be read for the channel gallery")
    c, h, w = shape
    if values.shape[1] < top:  # fewer units than asked for: pad with empty slots
        pad = top - values.shape[1]
        values = np.concatenate([values, np.full((c, pad), -np.inf)], axis=1)
        items_idx = np.concatenate([items_idx, np.full((c, pad), -1)], axis=1)
        pos = np.concatenate([pos, np.zeros((c, pad), dtype=np.int64)], axis=1)
    ys, xs = pos // w, pos % w

    rf_size = row.rf_size if row.rf_size and not row.rf_global else None
    rf_jump = row.rf_jump if rf_size else None
    rf_start = row.rf_start if rf_size else None
    H, W = model.input_shape[1:]
    crop = (min(rf_size[0], 2 * H), min(rf_size[1], 2 * W)) if rf_size else (H, W)
    side = min(PATCH_MAX, max(crop))
    patches = np.full((c, top, side, side, 3), _GREY, dtype=np.uint8)
    by_item: dict[int, list[tuple[int, int]]] = {}
    for ch in range(c):
        for n in range(top):
            if items_idx[ch, n] >= 0:
                by_item.setdefault(int(items_idx[ch, n]), []).append((ch, n))
    paths = {int(i["index"]): i["path"] for i in items}
    for m, (i, slots) in enumerate(sorted(by_item.items())):
        step(len(items) + m * len(items) // max(1, len(by_item)), total, progress=progress, cancel=cancel)
        display = prepare(model.spec, read_image(Path(paths[i]))).display
        for ch, n in slots:
            if rf_size and rf_jump and rf_start is not None:
                cy = rf_start[0] + ys[ch, n] * rf_jump[0]
                cx = rf_start[1] + xs[ch, n] * rf_jump[1]
                patches[ch, n] = _fit(_crop(display, cy, cx, crop), side)
            else:
                patches[ch, n] = _fit(display, side)
    step(total, total, progress=progress, cancel=cancel)
    means = sums / np.maximum(counts, 1)[None, :]
    kernels, kernel_layer = _first_layer_kernels(model, layer, lmap, c)
    return ChannelGallery(
        layer=layer, output_shape=(c, h, w), top=top, values=values.astype(np.float32), items=items_idx,
        ys=ys, xs=xs, patches=patches, rf_size=rf_size, rf_jump=rf_jump, rf_start=rf_start, classes=classes,
        class_means=means.astype(np.float32), selectivity=selectivity(means).astype(np.float32), kernels=kernels,
        kernel_layer=kernel_layer, images=int(counts.sum()) if counts is not None else 0,
        seconds=time.perf_counter() - start,
    )
