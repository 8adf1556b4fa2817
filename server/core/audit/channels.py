"""Which channels fire more in a group of images than in the rest: effect sizes per channel.

For a suspicious cluster, each image's channel activations at one layer (the spatial mean of its
(C, h, w) output, i.e. what global average pooling would pass on) are compared between the
cluster's images and the rest of the class — or, when the class has fewer than three other
images, the images of the other classes. Each channel gets Cohen's d, the difference of the
means over the pooled standard deviation (Cohen, "Statistical Power Analysis for the Behavioral
Sciences", 2nd ed., 1988, §2.2); the channels with the largest d are listed. A channel that
fires far more in a suspicious cluster is a lead for the channel views, not proof of what it
detects.
"""

from __future__ import annotations

import threading
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np
import torch

from pellucid.core.errors import PellucidError, UnsupportedLayerError
from pellucid.core.model.loading import LoadedModel
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.progress import CancelToken

__all__ = ["MIN_REST", "channel_means", "cohens_d", "rank_channels", "resolve_layer"]

MIN_REST = 3
_BATCH = 32


def resolve_layer(model: LoadedModel, layer: str | None) -> str:
    """``layer`` as given (checked: it must have a 4-D output), or the feature map that feeds the head.

    The default is Grad-CAM's default layer, so the channels ranked are those of the map discovery
    looked at when the audit used Grad-CAM.
    """
    from pellucid.core.attribution.gradcam import check_gradcam_layer, default_gradcam_layer

    if layer:
        try:
            check_gradcam_layer(model.module, model.input_shape, layer)
        except UnsupportedLayerError as exc:
            raise UnsupportedLayerError(f"the channel layer {layer!r} cannot be ranked, by the rule Grad-CAM's layers "
                                        f"follow: {exc}") from None
        return layer
    p = next(model.module.parameters(), None)
    dtype = p.dtype if p is not None and p.is_floating_point() else torch.float32
    return default_gradcam_layer(model.module, torch.zeros(1, *model.input_shape, dtype=dtype))


def _hook_point(model: torch.nn.Module, layer: str) -> tuple[torch.nn.Module, str]:
    from pellucid.core.views.feature_map import parse_layer_point
    from pellucid.core.views.probe import find_layer

    point = parse_layer_point(layer)
    return find_layer(model, point.module), point.where


def channel_means(model: LoadedModel, items: Sequence[dict], *, layer: str,
                  cancel: CancelToken | None = None) -> tuple[np.ndarray, list[str]]:
    """(N, C) spatial means of ``layer`` for the readable ``items``, and their rel paths."""
    module, where = _hook_point(model.module, layer)
    owner = threading.get_ident()
    seen: list[torch.Tensor] = []

    def keep(t: Any) -> None:
        t = t[0] if isinstance(t, (tuple, list)) else t
        if threading.get_ident() == owner and isinstance(t, torch.Tensor) and t.ndim == 4:
            seen.append(t.detach().float().mean(dim=(2, 3)))

    if where == "input":
        handle = module.register_forward_pre_hook(lambda _m, args: keep(args))
    else:
        handle = module.register_forward_hook(lambda _m, _a, out: keep(out))
    rels: list[str] = []
    rows: list[np.ndarray] = []
    try:
        batch: list[torch.Tensor] = []
        names: list[str] = []

        def flush() -> None:
            if not batch:
                return
            seen.clear()
            with torch.inference_mode():
                model.module(torch.cat(batch, dim=0))
            if not seen:
                raise UnsupportedLayerError(f"layer {layer!r} produced no 4-D feature map in a forward pass")
            rows.append(seen[-1].numpy().astype(np.float64))
            rels.extend(names)
            batch.clear()
            names.clear()

        for item in items:
            if cancel is not None:
                cancel.raise_if_cancelled()
            try:
                batch.append(prepare(model.spec, read_image(Path(item["path"]))).tensor)
            except PellucidError:
                continue
            names.append(item["rel"])
            if len(batch) >= _BATCH:
                flush()
        flush()
    finally:
        handle.remove()
    return (np.concatenate(rows) if rows else np.zeros((0, 0))), rels


def cohens_d(group: np.ndarray, rest: np.ndarray) -> np.ndarray:
    """Per column, (mean(group) − mean(rest)) / pooled standard deviation; 0 where both are constant."""
    n1, n0 = len(group), len(rest)
    m1, m0 = group.mean(axis=0), rest.mean(axis=0)
    v1 = group.var(axis=0, ddof=1) if n1 > 1 else np.zeros_like(m1)
    v0 = rest.var(axis=0, ddof=1) if n0 > 1 else np.zeros_like(m0)
    pooled = np.sqrt(((n1 - 1) * v1 + (n0 - 1) * v0) / max(n1 + n0 - 2, 1))
    diff = m1 - m0
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.where(pooled > 0, diff / np.where(pooled > 0, pooled, 1.0), 0.0)
    return d


def rank_channels(group: np.ndarray, rest: np.ndarray, *, top: int = 8) -> list[dict]:
    """The ``top`` channels by Cohen's d of ``group`` (n1, C) against ``rest`` (n0, C), largest first."""
    d = cohens_d(group, rest)
    order = sorted(range(d.size), key=lambda c: (-float(d[c]), c))[:top]
    return [{"channel": int(c), "effect": float(d[c]), "mean_cluster": float(group[:, c].mean()),
             "mean_rest": float(rest[:, c].mean())} for c in order]
