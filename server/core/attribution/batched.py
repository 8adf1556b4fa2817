"""Maps for a batch of images from one forward and one backward pass, for folder audits.

The methods whose map is a function of a single gradient — Grad-CAM (Selvaraju et al., ICCV 2017,
§3), gradient saliency (Simonyan, Vedaldi, Zisserman, arXiv:1312.6034, §3) and gradient × input —
need one forward and one backward per image. For B images of one model the same work runs as one
batched forward and one backward of Σ_b S_b[target_b]: in eval mode each image's score depends
only on its own input, so the gradient of the sum is each image's own gradient, and the maps equal
the single-image ones up to floating-point rounding. The forward also gives the prediction, so the
target (the true label or the prediction) is chosen from the same logits: an audit then costs one
forward and one backward per image instead of the single-image path's three forwards, a backward
and (for Grad-CAM's default layer) a walk of the autograd graph.

The formulas are those of :mod:`~pellucid.core.attribution.gradcam` and
:mod:`~pellucid.core.attribution.gradient`; the single-image path stays the reference (the tests
compare both with maps computed by hand).
"""

from __future__ import annotations

import threading
import weakref
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from pellucid.core.attribution import _common
from pellucid.core.attribution.registry import get_method
from pellucid.core.errors import UnsupportedLayerError
from pellucid.core.views.feature_map import LayerPoint, feature_map_feeding_head, parse_layer_point
from pellucid.core.views.predict import check_finite
from pellucid.core.views.probe import hookable

__all__ = ["BATCHED_METHODS", "BatchMaps", "batched_maps"]

BATCHED_METHODS = ("gradcam", "saliency", "gradient_x_input")

# Grad-CAM's default layer per model and input shape: a property of the architecture, found once.
_DEFAULT_LAYER: weakref.WeakKeyDictionary[nn.Module, dict[tuple[int, ...], LayerPoint]] = weakref.WeakKeyDictionary()
_LOCK = threading.Lock()


@dataclass
class BatchMaps:
    """``logits`` (B, K) detached; ``targets`` the class explained per image; ``maps`` (H, W) float32
    each; ``params`` validated plus automatic choices (Grad-CAM's layer); one warning or None per map."""

    logits: torch.Tensor
    targets: list[int]
    maps: list[np.ndarray]
    signed: bool
    params: dict[str, Any]
    warnings: list[str | None]


def _default_point(model: nn.Module, x: torch.Tensor) -> LayerPoint:
    key = tuple(x.shape[1:])
    with _LOCK:
        known = _DEFAULT_LAYER.get(model, {}).get(key)
    if known is not None:
        return known
    with torch.inference_mode(False):
        point = feature_map_feeding_head(model, x[:1].detach().clone())
    with _LOCK:
        _DEFAULT_LAYER.setdefault(model, {})[key] = point
    return point


def batched_maps(
    method: str,
    model: nn.Module,
    xb: torch.Tensor,
    *,
    choose_targets: Callable[[torch.Tensor], Sequence[int]],
    params: Mapping[str, Any] | None = None,
) -> BatchMaps:
    """Maps of ``method`` (one of :data:`BATCHED_METHODS`) for the (B, C, H, W) batch ``xb``.

    ``choose_targets(logits)`` gets the batch's (B, K) logits and returns the class to explain per
    image. Raises ModelOutputError for non-finite logits and UnsupportedLayerError for a Grad-CAM
    layer that cannot serve; the caller may then fall back to one image at a time.
    """
    if method not in BATCHED_METHODS:
        raise ValueError(f"{method!r} has no batched form; batched methods: {', '.join(BATCHED_METHODS)}")
    spec = get_method(method)
    checked = dict(spec.schema.validate(params, method=spec.name))
    xb = _common.match_dtype(model, xb)
    captured: dict[str, Any] = {}
    handle = None
    with _common.evaluating(model):
        if method == "gradcam":
            if not hookable(model):
                raise UnsupportedLayerError("Grad-CAM needs forward hooks, which this TorchScript model does not allow")
            point = parse_layer_point(checked["layer"]) if checked.get("layer") else _default_point(model, xb)
            modules = dict(model.named_modules())
            if point.module not in modules:
                raise UnsupportedLayerError(f"the model has no layer named {point.module!r}")
            handle = _common.capture_layer(modules[point.module], point.where, captured)
            checked["layer"] = point.name
        try:
            with _common.grad_enabled():
                xg = xb.detach().requires_grad_(True)
                logits = _common.logits_of(model, xg)
                check_finite(logits.detach())
                targets = [int(t) for t in choose_targets(logits.detach())]
                score = logits[torch.arange(len(targets)), torch.as_tensor(targets)].sum()
                if method == "gradcam":
                    act = captured.get("out")
                    if not isinstance(act, torch.Tensor) or act.ndim != 4:
                        raise UnsupportedLayerError(f"layer {checked['layer']!r} gives no (N, C, h, w) map")
                    (grad,) = torch.autograd.grad(score, act, allow_unused=True)
                    if grad is None:
                        raise UnsupportedLayerError(f"the class score does not depend on layer {checked['layer']!r}")
                else:
                    (grad,) = torch.autograd.grad(score, xg)
        finally:
            if handle is not None:
                handle.remove()
    logits = logits.detach()
    grad = grad.detach()
    h, w = xb.shape[-2:]
    warnings: list[str | None] = [None] * len(targets)
    if method == "gradcam":
        act = act.detach()
        alpha = grad.mean(dim=(2, 3), keepdim=True)  # (B, C, 1, 1): (1/Z) Σᵢⱼ ∂y/∂Aᵢⱼ
        low = torch.relu((alpha * act).sum(dim=1, keepdim=True))  # (B, 1, h, w)
        up = F.interpolate(low, size=(h, w), mode="bilinear", align_corners=False)[:, 0]
        for b in range(len(targets)):
            if float(low[b].max()) <= 0.0:
                warnings[b] = (f"Grad-CAM is zero everywhere at layer {checked['layer']!r}: no positive evidence for "
                               "this class at this layer; try an earlier layer or another method")
            elif act.shape[2] * act.shape[3] == 1:
                warnings[b] = (f"layer {checked['layer']!r} has a 1×1 map, so Grad-CAM cannot show where the "
                               "evidence is; pick an earlier layer with a larger map")
        maps, signed = up, False
    elif method == "saliency":
        maps, signed = grad.abs().amax(dim=1), False
    else:
        maps, signed = (grad * xb.detach()).sum(dim=1), True
    out = [m.cpu().numpy().astype(np.float32) for m in maps]
    return BatchMaps(logits=logits, targets=targets, maps=out, signed=signed, params=checked, warnings=warnings)


