"""Grad-CAM at the feature map that feeds the classifier head, or at any conv-like layer.

Selvaraju et al., "Grad-CAM: Visual Explanations from Deep Networks via Gradient-based
Localization", ICCV 2017, §3: αₖ = (1/Z) Σᵢⱼ ∂y_c/∂Aᵏᵢⱼ with y_c the score before softmax;
map = ReLU(Σₖ αₖ Aᵏ), upsampled bilinearly to the input size.

Default layer: the last 4-D feature map on the way to the logits — after the activation and any
residual sum, the input of global pooling where there is one — found by walking the graph autograd
records for one forward pass (:mod:`pellucid.core.views.feature_map`), so it also holds for
``torch.export`` models. There, for a global-average-pooling → linear head, Grad-CAM equals
ReLU(CAM)/Z (§3.1; CAM: Zhou et al., CVPR 2016). The last ``nn.Conv2d`` is *not* that map: batch
norm, the activation and the skip connection come after it.

Any other layer can be asked for by name: a module whose output in this forward pass is a 4-D
(N, C, h, w) tensor (a convolution, a norm, an activation or a block of them), or
``"NAME:input"`` for the first input of module NAME. A module called several times in one pass
means its last call. The resolved layer is reported with every map.
"""

from __future__ import annotations

import threading
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn

from pellucid.core.attribution._common import capture_layer, grad_enabled, logits_of
from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.errors import UnsupportedLayerError
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.feature_map import feature_map_feeding_head, parse_layer_point
from pellucid.core.views.probe import execution_order, hookable

__all__ = ["check_gradcam_layer", "conv_like_layers", "default_gradcam_layer"]

SCHEMA = ParamSchema((
    Param("layer", "str", None, "a layer with a 4-D (N, C, h, w) output, or NAME:input; default: the last "
          "feature map that feeds the classifier head"),
))


def conv_like_layers(model: nn.Module, x: torch.Tensor) -> list[str]:
    """Names of the modules whose output for ``x`` (1, C, H, W) is 4-D, in execution order."""
    return execution_order(model, x, keep=lambda _name, _module, out: isinstance(out, torch.Tensor) and out.ndim == 4)


def _listing(model: nn.Module, x: torch.Tensor) -> str:
    try:
        names = conv_like_layers(model, x)
    except Exception:  # noqa: BLE001 - the listing is a courtesy; the sentence before it stands alone
        return "unknown (the model's forward fails on this input)"
    shown = names if len(names) <= 20 else ["…", *names[-20:]]
    return ", ".join(shown) if names else "none (the model has no layer with a 4-D output)"


def _layer_error(model: nn.Module, x: torch.Tensor, message: str) -> UnsupportedLayerError:
    return UnsupportedLayerError(f"{message}; Grad-CAM needs a conv-like layer; valid layers: {_listing(model, x)}")


def _hooks_refused() -> UnsupportedLayerError:
    return UnsupportedLayerError(
        "this model is a TorchScript archive, which does not allow forward hooks, so Grad-CAM cannot read its "
        "layers; export it with torch.export (kind = \"export\") or use occlusion or an input-gradient method"
    )


def default_gradcam_layer(model: nn.Module, x: torch.Tensor) -> str:
    """The name of the layer Grad-CAM uses when none is given (see the module docstring)."""
    if not hookable(model):
        raise _hooks_refused()
    with torch.inference_mode(False):
        return feature_map_feeding_head(model, x.detach().clone()).name


def check_gradcam_layer(model: nn.Module, input_shape: tuple[int, int, int], layer: str | None) -> str | None:
    """Refuse, before any work starts, a named layer that Grad-CAM cannot use; return its name.

    ``input_shape`` is the model's (C, H, W); one forward pass on zeros finds the layer's output
    shape. No layer (the default) needs no check here: the map finds it and reports it. When the
    model's own forward fails on zeros the layer cannot be checked up front, and the job reports
    the model's failure instead.
    """
    p = next(model.parameters(), None)
    dtype = p.dtype if p is not None and p.is_floating_point() else torch.float32
    x = torch.zeros(1, *input_shape, dtype=dtype)
    if not hookable(model):
        raise _hooks_refused()
    if not layer:
        return None
    point = parse_layer_point(layer)
    modules = dict(model.named_modules())
    if not point.module or point.module not in modules:
        raise _layer_error(model, x, f"the model has no layer named {point.module!r}")
    shapes: dict[str, tuple] = {}
    owner = threading.get_ident()

    def pre(_m: nn.Module, args: Any) -> None:
        if threading.get_ident() == owner and args and isinstance(args[0], torch.Tensor):
            shapes["input"] = tuple(args[0].shape)

    def post(_m: nn.Module, _args: Any, out: Any) -> None:
        if threading.get_ident() == owner:
            shapes["output"] = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__

    handles = [modules[point.module].register_forward_pre_hook(pre), modules[point.module].register_forward_hook(post)]
    modes = [(m, m.training) for m in model.modules()]
    model.eval()
    failed = False
    try:
        with torch.inference_mode():
            model(x)
    except Exception:  # noqa: BLE001 - the model's own failure: left for the job to report in its words
        failed = True
    finally:
        for h in handles:
            h.remove()
        for m, mode in modes:
            m.training = mode
    got = shapes.get(point.where)
    if got is None and failed:
        return point.name
    if got is None:
        raise _layer_error(model, x, f"layer {point.module!r} does not run in the forward pass")
    if not isinstance(got, tuple) or len(got) != 4:
        raise _layer_error(model, x, f"layer {point.name!r} gives {got}, not a 4-D (N, C, h, w) map")
    return point.name


def _gradcam(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    wanted: str | None = params["layer"] or None
    if not hookable(model):
        raise _hooks_refused()
    modules = dict(model.named_modules())
    if wanted is None:
        point = feature_map_feeding_head(model, x)
    else:
        point = parse_layer_point(wanted)
        if not point.module or point.module not in modules:
            raise _layer_error(model, x, f"the model has no layer named {point.module!r}")
    module = modules[point.module]

    captured: dict[str, Any] = {}
    step(0, 1, progress=progress, cancel=cancel)
    handle = capture_layer(module, point.where, captured)
    try:
        with grad_enabled():
            # The input requires grad so A is in the graph even when the weights are frozen.
            score = logits_of(model, x.detach().requires_grad_(True))[0, target]
            if "out" not in captured:
                raise _layer_error(model, x, f"layer {point.name!r} did not run in the forward pass")
            act = captured["out"]
            if not isinstance(act, torch.Tensor) or act.ndim != 4:
                shape = tuple(act.shape) if isinstance(act, torch.Tensor) else type(act).__name__
                raise _layer_error(model, x, f"layer {point.name!r} gives {shape}, not (N, C, h, w)")
            (grad,) = torch.autograd.grad(score, act, allow_unused=True)
            if grad is None:
                raise _layer_error(model, x, f"the class score does not depend on layer {point.name!r}")
    finally:
        handle.remove()
    step(1, 1, progress=progress, cancel=cancel)
    act = act.detach()
    alpha = grad.mean(dim=(2, 3), keepdim=True)  # (1, C, 1, 1): (1/Z) Σᵢⱼ ∂y/∂Aᵢⱼ
    low = torch.relu((alpha * act).sum(dim=1, keepdim=True))  # (1, 1, h, w)
    up = F.interpolate(low, size=tuple(x.shape[-2:]), mode="bilinear", align_corners=False)
    extras: dict[str, Any] = {"layer_shape": list(act.shape[1:]),
                              "layer_choice": "given" if wanted else "the feature map feeding the head"}
    if float(low.max()) <= 0.0:
        extras["warning"] = (
            f"Grad-CAM is zero everywhere at layer {point.name!r}: no positive evidence for this "
            "class at this layer; try an earlier layer or another method"
        )
    elif act.shape[2] * act.shape[3] == 1:
        extras["warning"] = (
            f"layer {point.name!r} has a 1×1 map, so Grad-CAM cannot show where the evidence is; "
            "pick an earlier layer with a larger map"
        )
    return MethodOutput(
        map=up[0, 0].cpu().numpy().astype(np.float32), signed=False,
        raw=low[0, 0].cpu().numpy().astype(np.float32), n_forwards=1, n_backwards=1,
        resolved={"layer": point.name}, extras=extras,
    )


def _check(model: nn.Module, input_shape: tuple[int, int, int], params: dict[str, Any]) -> None:
    check_gradcam_layer(model, input_shape, params["layer"])


register(Method(
    name="gradcam",
    title="Grad-CAM",
    fn=_gradcam,
    schema=SCHEMA,
    description="Channels of a conv layer weighted by the average gradient of the class score, summed, "
                "clipped at zero and upsampled: coarse regions that raise the score, at that layer's resolution. "
                "By default the last feature map that feeds the classifier head.",
    reference="Selvaraju et al., Grad-CAM, ICCV 2017, §3",
    signed=False,
    needs_conv_layer=True,
    needs_hooks=True,
    cost=lambda params, size: 3.0,
    check=_check,
))
