"""Vanilla gradient saliency and gradient × input.

Saliency: Simonyan, Vedaldi, Zisserman, "Deep Inside Convolutional Networks", arXiv:1312.6034
(2013), §3: w = ∂S_c/∂x of the unnormalised class score, map = max over colour channels of |w|.
Gradient × input: the per-channel product x ⊙ ∂S_c/∂x, summed over channels for the map.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from pellucid.core.attribution._common import input_gradient
from pellucid.core.attribution.params import ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.progress import CancelToken, ProgressFn, step


def saliency_map(grad: torch.Tensor) -> np.ndarray:
    """(1, C, H, W) gradient → (H, W) max over channels of its absolute value."""
    return grad[0].abs().amax(dim=0).cpu().numpy().astype(np.float32)


def _saliency(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    step(0, 1, progress=progress, cancel=cancel)
    grad, _ = input_gradient(model, x, target)
    step(1, 1, progress=progress, cancel=cancel)
    return MethodOutput(
        map=saliency_map(grad), signed=False, raw=grad[0].cpu().numpy().astype(np.float32),
        n_forwards=1, n_backwards=1,
    )


def _grad_x_input(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    step(0, 1, progress=progress, cancel=cancel)
    grad, _ = input_gradient(model, x, target)
    step(1, 1, progress=progress, cancel=cancel)
    per_channel = (grad * x)[0]
    return MethodOutput(
        map=per_channel.sum(dim=0).cpu().numpy().astype(np.float32), signed=True,
        raw=per_channel.cpu().numpy().astype(np.float32), n_forwards=1, n_backwards=1,
    )


register(Method(
    name="saliency",
    title="Gradient saliency",
    fn=_saliency,
    schema=ParamSchema(()),
    description="Largest absolute gradient of the class score over the colour channels of each pixel: "
                "which pixels the score is most sensitive to, not which ones it relies on.",
    reference="Simonyan, Vedaldi, Zisserman, arXiv:1312.6034 (2013), §3",
    signed=False,
    cost=lambda params, size: 3.0,
))

register(Method(
    name="gradient_x_input",
    title="Gradient × input",
    fn=_grad_x_input,
    schema=ParamSchema(()),
    description="Gradient of the class score times the input, summed over channels; signed "
                "(positive pushes the score up). Exact contributions for a linear model.",
    reference="as compared in Adebayo et al., Sanity Checks for Saliency Maps, NeurIPS 2018, §5.3",
    signed=True,
    cost=lambda params, size: 3.0,
))
