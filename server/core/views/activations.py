"""Per-channel activation maps of one layer, with the statistics the grid sorts by."""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np
import torch
from torch import nn

from pellucid.core.errors import UnsupportedLayerError
from pellucid.core.views.predict import Prediction, predict_logits
from pellucid.core.views.probe import Probe


@dataclass
class ActivationMaps:
    """``maps`` is (C, h, w) float32 for one image; a dense layer's (K,) output becomes (K, 1, 1)."""

    layer: str
    maps: np.ndarray
    channel_mean: np.ndarray
    channel_max: np.ndarray
    output_shape: tuple[int, ...]
    seconds: float

    @property
    def channels(self) -> int:
        return int(self.maps.shape[0])

    def order(self, by: str = "index") -> np.ndarray:
        """Channel indices sorted by ``index``, ``mean`` or ``max`` (largest first)."""
        if by == "index":
            return np.arange(self.channels)
        if by == "mean":
            return np.argsort(-self.channel_mean, kind="stable")
        if by == "max":
            return np.argsort(-self.channel_max, kind="stable")
        from pellucid.core.errors import BadParameterError

        raise BadParameterError(f"sort must be index, mean or max, got {by!r}")


def _as_maps(layer: str, tensor: torch.Tensor) -> np.ndarray:
    t = tensor.detach().float()[0]
    if t.ndim == 3:
        return t.numpy().copy()
    if t.ndim == 1:
        return t.numpy().copy()[:, None, None]
    if t.ndim == 2:  # (tokens, features) or (C, L): show features as channels over a 1-row strip
        return t.numpy().copy()[:, None, :]
    raise UnsupportedLayerError(
        f"layer {layer!r} outputs a tensor of shape {tuple(tensor.shape)}, which has no channel maps to show"
    )


def _run(model: nn.Module, x: torch.Tensor, layer: str) -> tuple[ActivationMaps, torch.Tensor]:
    model.eval()
    t0 = time.perf_counter()
    with Probe(model, [layer]) as probe, torch.inference_mode():
        logits = model(x)
    seconds = time.perf_counter() - t0
    if layer not in probe.outputs:
        raise UnsupportedLayerError(f"layer {layer!r} was not run by this model's forward pass (an unused module?)")
    out = probe.outputs[layer]
    maps = _as_maps(layer, out)
    flat = maps.reshape(maps.shape[0], -1)
    acts = ActivationMaps(
        layer=layer,
        maps=maps,
        channel_mean=flat.mean(axis=1),
        channel_max=flat.max(axis=1),
        output_shape=tuple(out.shape[1:]),
        seconds=seconds,
    )
    return acts, logits


def activation_maps(model: nn.Module, x: torch.Tensor, *, layer: str) -> ActivationMaps:
    """Activation maps of ``layer`` for ``x`` (1, C, H, W)."""
    return _run(model, x, layer)[0]


def activations_with_prediction(
    model: nn.Module, x: torch.Tensor, *, layer: str, labels: list[str], output_kind: str = "softmax", k: int = 5
) -> tuple[ActivationMaps, Prediction]:
    """One forward pass giving both the layer's maps and the top-k (the image page needs both)."""
    acts, logits = _run(model, x, layer)
    return acts, predict_logits(logits, labels=labels, output_kind=output_kind, k=k, seconds=acts.seconds)
