"""RISE: randomised input sampling.

Petsiuk, Das, Saenko, "RISE: Randomized Input Sampling for Explanation of Black-box Models",
BMVC 2018 (arXiv:1806.07421): saliency = (1/(p·N)) Σᵢ f(I ⊙ Mᵢ) Mᵢ, where f is the target
class probability and each mask Mᵢ is a binary s×s grid (cells kept with probability p),
upsampled bilinearly to (s+1)·⌈H/s⌉ × (s+1)·⌈W/s⌉ and cropped to H×W at a random shift of less
than one cell. Masked pixels are 0 in the model's input space (the mean colour after
normalisation). Defaults: s = 7 and p = 0.5 as in the paper; N = 2000 masks, half the 4000 the
paper used for ImageNet models (from memory), which suits the small demo model. All masks
come from one seeded generator in a fixed order, so the map does not depend on the batch size.
"""

from __future__ import annotations

import math
from typing import Any

import torch
import torch.nn.functional as F
from torch import nn

from pellucid.core.attribution._common import batches, logits_of, probabilities
from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.progress import CancelToken, ProgressFn, step

SCHEMA = ParamSchema((
    Param("masks", "int", 2000, "number of random masks N (paper: 4000 for ImageNet models)", min=1, max=100_000),
    Param("grid", "int", 7, "mask grid size s (cells per side)", min=1, max=64),
    Param("keep", "float", 0.5, "probability p that a grid cell is kept", min=0.01, max=0.99),
    Param("batch_size", "int", 64, "masked images per forward pass", min=1, max=4096),
    Param("seed", "int", 0, "seed of the masks; the same seed gives the same map", min=0, max=2**32 - 1),
))


def rise_masks(
    n: int, grid: int, keep: float, size: tuple[int, int], generator: torch.Generator,
    *, cells: torch.Tensor | None = None, shifts: torch.Tensor | None = None,
) -> torch.Tensor:
    """(n, 1, H, W) float masks in [0, 1]; ``cells`` (n, s, s) and ``shifts`` (n, 2) may be given."""
    h, w = size
    ch, cw = math.ceil(h / grid), math.ceil(w / grid)
    if cells is None:
        cells = (torch.rand((n, grid, grid), generator=generator) < keep).to(torch.float32)
    if shifts is None:
        shifts = torch.stack([torch.randint(0, ch, (n,), generator=generator),
                              torch.randint(0, cw, (n,), generator=generator)], dim=1)
    big = F.interpolate(cells.unsqueeze(1), size=((grid + 1) * ch, (grid + 1) * cw),
                        mode="bilinear", align_corners=False)
    out = torch.empty((cells.shape[0], 1, h, w), dtype=torch.float32)
    for i in range(cells.shape[0]):
        dy, dx = int(shifts[i, 0]), int(shifts[i, 1])
        out[i] = big[i, :, dy:dy + h, dx:dx + w]
    return out


def _rise(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    n, s, p = params["masks"], params["grid"], params["keep"]
    h, w = x.shape[-2:]
    gen = torch.Generator(device="cpu").manual_seed(params["seed"])
    # Grids and shifts for every mask first (small), then masks are built batch by batch.
    cells = (torch.rand((n, s, s), generator=gen) < p).to(torch.float32)
    ch, cw = math.ceil(h / s), math.ceil(w / s)
    shifts = torch.stack([torch.randint(0, ch, (n,), generator=gen),
                          torch.randint(0, cw, (n,), generator=gen)], dim=1)
    total = torch.zeros((h, w), dtype=torch.float64)
    step(0, n, progress=progress, cancel=cancel)
    for start, stop in batches(n, params["batch_size"]):
        masks = rise_masks(stop - start, s, p, (h, w), gen,
                           cells=cells[start:stop], shifts=shifts[start:stop]).to(x.device, x.dtype)
        with torch.inference_mode():
            prob = probabilities(logits_of(model, x * masks), context.output_kind)[:, target]
        total += (prob.to(torch.float64).view(-1, 1, 1) * masks[:, 0].to(torch.float64)).sum(dim=0).cpu()
        step(stop, n, progress=progress, cancel=cancel)
    sal = total / (p * n)
    return MethodOutput(map=sal.to(torch.float32).numpy(), signed=False, n_forwards=n, n_backwards=0)


register(Method(
    name="rise",
    title="RISE",
    fn=_rise,
    schema=SCHEMA,
    description="The class probability averaged over many randomly masked copies, weighted by each mask: "
                "needs no gradients, only forward passes; noisy when the mask count is low.",
    reference="Petsiuk, Das, Saenko, RISE, BMVC 2018 (arXiv:1806.07421)",
    signed=False,
    stochastic=True,
    uses_gradients=False,
    cost=lambda params, size: float(params["masks"]),
))
