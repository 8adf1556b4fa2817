"""Grad-CAM at any conv-like layer.

Selvaraju et al., "Grad-CAM: Visual Explanations from Deep Networks via Gradient-based
Localization", ICCV 2017, §3: αₖ = (1/Z) Σᵢⱼ ∂y_c/∂Aᵏᵢⱼ with y_c the score before softmax;
map = ReLU(Σₖ αₖ Aᵏ), upsampled bilinearly to the input size. A layer is "conv-like" when its
output in this forward pass is a 4-D (N, C, h, w) tensor (a convolution, a norm, an activation or
a block of them); the default is the last ``nn.Conv2d`` to run.
"""

from __future__ import annotations

import threading
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from pellucid.core.attribution._common import grad_enabled, logits_of
from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.errors import UnsupportedLayerError
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.probe import execution_order

__all__ = ["conv_like_layers"]

SCHEMA = ParamSchema((
    Param("layer", "str", None, "qualified name of a conv-like layer (4-D output); default: the last Conv2d"),
))


def conv_like_layers(model: nn.Module, x: torch.Tensor) -> list[str]:
    """Names of the modules whose output for ``x`` (1, C, H, W) is 4-D, in execution order."""
    return execution_order(model, x, keep=lambda _name, _module, out: isinstance(out, torch.Tensor) and out.ndim == 4)


def _layer_error(model: nn.Module, x: torch.Tensor, message: str) -> UnsupportedLayerError:
    names = conv_like_layers(model, x)
    shown = names if len(names) <= 20 else ["…", *names[-20:]]
    listing = ", ".join(shown) if names else "none (the model has no layer with a 4-D output)"
    return UnsupportedLayerError(f"{message}; Grad-CAM needs a conv-like layer; valid layers: {listing}")


def _gradcam(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    wanted: str | None = params["layer"] or None
    modules = dict(model.named_modules())
    if wanted is not None and (wanted not in modules or wanted == ""):
        raise _layer_error(model, x, f"the model has no layer named {wanted!r}")
    if wanted is None:
        chosen = {n: m for n, m in modules.items() if isinstance(m, nn.Conv2d)}
        if not chosen:
            raise _layer_error(model, x, "the model has no nn.Conv2d to use as the default layer; pass 'layer'")
    else:
        chosen = {wanted: modules[wanted]}

    captured: dict[str, Any] = {}
    owner = threading.get_ident()  # only this call's forward pass is captured, not other threads'

    def make(name: str):
        def hook(module: nn.Module, inputs: Any, output: Any) -> Any:
            if threading.get_ident() != owner:
                return None
            captured["name"], captured["out"] = name, output
            # Hand a copy downstream so an in-place op after this layer cannot change A.
            return output.clone() if isinstance(output, torch.Tensor) else output
        return hook

    step(0, 1, progress=progress, cancel=cancel)
    handles = [m.register_forward_hook(make(n)) for n, m in chosen.items()]
    try:
        with grad_enabled():
            # The input requires grad so A is in the graph even when the weights are frozen.
            score = logits_of(model, x.detach().requires_grad_(True))[0, target]
            if "out" not in captured:
                raise _layer_error(model, x, f"layer {wanted!r} did not run in the forward pass")
            act = captured["out"]
            if not isinstance(act, torch.Tensor) or act.ndim != 4:
                shape = tuple(act.shape) if isinstance(act, torch.Tensor) else type(act).__name__
                raise _layer_error(model, x, f"layer {captured['name']!r} outputs {shape}, not (N, C, h, w)")
            (grad,) = torch.autograd.grad(score, act, allow_unused=True)
            if grad is None:
                raise _layer_error(model, x, f"the class score does not depend on layer {captured['name']!r}")
    finally:
        for h in handles:
            h.remove()
    step(1, 1, progress=progress, cancel=cancel)
    act = act.detach()
    alpha = grad.mean(dim=(2, 3), keepdim=True)  # (1, C, 1, 1): (1/Z) Σᵢⱼ ∂y/∂Aᵢⱼ
    low = torch.relu((alpha * act).sum(dim=1, keepdim=True))  # (1, 1, h, w)
    up = F.interpolate(low, size=tuple(x.shape[-2:]), mode="bilinear", align_corners=False)
    extras: dict[str, Any] = {"layer_shape": list(act.shape[1:])}
    if float(low.max()) <= 0.0:
        extras["warning"] = (
            f"Grad-CAM is zero everywhere at layer {captured['name']!r}: no positive evidence for this "
            "class at this layer; try an earlier layer or another method"
        )
    return MethodOutput(
        map=up[0, 0].cpu().numpy().astype(np.float32), signed=False,
        raw=low[0, 0].cpu().numpy().astype(np.float32), n_forwards=1, n_backwards=1,
        resolved={"layer": captured["name"]}, extras=extras,
    )


register(Method(
    name="gradcam",
    title="Grad-CAM",
    fn=_gradcam,
    schema=SCHEMA,
    description="Channels of a conv layer weighted by the average gradient of the class score, summed, "
                "clipped at zero and upsampled: coarse regions that raise the score, at that layer's resolution.",
    reference="Selvaraju et al., Grad-CAM, ICCV 2017, §3",
    signed=False,
    needs_conv_layer=True,
    cost=lambda params, size: 3.0,
))
