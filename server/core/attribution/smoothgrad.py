"""SmoothGrad: the gradient averaged over noisy copies of the input.

Smilkov, Thorat, Kim, Viégas, Wattenberg, "SmoothGrad: removing noise by adding noise",
arXiv:1706.03825 (2017): M̂(x) = (1/n) Σ ∂S_c/∂x evaluated at x + N(0, σ²); a noise level
σ / (x_max − x_min) of 10–20% works well and little changes beyond n = 50. Our defaults:
n = 50, 15%, with x_max − x_min measured on the input tensor itself. The signed mean gradient
is kept in ``raw``; the map is its largest absolute value over colour channels, as for saliency.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from pellucid.core.attribution._common import batches, input_gradient
from pellucid.core.attribution.gradient import saliency_map
from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.progress import CancelToken, ProgressFn, step

SCHEMA = ParamSchema((
    Param("samples", "int", 50, "number of noisy copies averaged (Smilkov et al.: little change beyond 50)",
          min=1, max=10_000),
    Param("noise", "float", 0.15, "noise std as a fraction of the input's value range (paper: 0.10–0.20)",
          min=0.0, max=5.0),
    Param("batch_size", "int", 16, "noisy copies per forward/backward pass", min=1, max=1024),
    Param("seed", "int", 0, "seed of the noise; the same seed gives the same map", min=0, max=2**32 - 1),
))


def _smoothgrad(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    n, bs = params["samples"], params["batch_size"]
    spread = float(x.max() - x.min())
    sigma = params["noise"] * spread
    gen = torch.Generator(device="cpu").manual_seed(params["seed"])
    total = torch.zeros_like(x[0])
    step(0, n, progress=progress, cancel=cancel)
    for start, stop in batches(n, bs):
        # One draw per copy, in order, so the map does not depend on the batch size.
        noise = torch.stack([torch.randn(x.shape[1:], generator=gen, dtype=x.dtype)
                             for _ in range(start, stop)])
        xb = x + noise.to(x.device) * sigma
        grad, _ = input_gradient(model, xb, target)
        total += grad.sum(dim=0)
        step(stop, n, progress=progress, cancel=cancel)
    mean = (total / n).unsqueeze(0)
    return MethodOutput(
        map=saliency_map(mean), signed=False, raw=mean[0].cpu().numpy().astype(np.float32),
        n_forwards=n, n_backwards=n, extras={"sigma": sigma},
    )


register(Method(
    name="smoothgrad",
    title="SmoothGrad",
    fn=_smoothgrad,
    schema=SCHEMA,
    description="Gradient saliency averaged over noisy copies of the image, which removes much of the "
                "speckle of a single gradient.",
    reference="Smilkov et al., SmoothGrad: removing noise by adding noise, arXiv:1706.03825 (2017)",
    signed=False,
    stochastic=True,
    cost=lambda params, size: 3.0 * params["samples"],
))
