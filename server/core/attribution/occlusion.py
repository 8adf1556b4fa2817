"""Occlusion sensitivity behind the registry (the computation lives in :mod:`pellucid.core.occlusion.engine`).

Zeiler & Fergus, "Visualizing and Understanding Convolutional Networks", ECCV 2014, §4.2. The
map is the drop in target probability when a patch covering the pixel is hidden (signed:
negative where hiding raises the probability). Patch 16, stride 8 and the image-mean fill are
Pellucid's own defaults; the paper fixes none.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.progress import CancelToken, ProgressFn

SCHEMA = ParamSchema((
    Param("patch", "int", 16, "side of the hidden square in pixels", min=1, max=4096),
    Param("stride", "int", 8, "step between patch positions in pixels", min=1, max=4096),
    Param("baseline", "choice", "mean", "fill of the hidden square: the image's mean colour, zero in input "
          "space, or a blurred copy", choices=("mean", "zero", "blur")),
    Param("engine", "choice", "auto", "how the positions are evaluated: 'auto' picks the fastest exact engine "
          "(incremental where it pays, else batched); 'approximate' refines a coarse grid and is not exact",
          choices=("auto", "batched", "incremental", "naive", "approximate")),
))


def _occlusion(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    from pellucid.core.occlusion.engine import occlusion_map  # lazily: keeps the registry importable on its own

    res = occlusion_map(
        model, x, target=target, patch=params["patch"], stride=params["stride"],
        baseline=params["baseline"], output=context.output_kind, method=params["engine"],
        progress=progress, cancel=cancel,
    )
    extras: dict[str, Any] = {"engine": res.engine, "positions": int(res.grid.size),
                              "base_score": float(res.base_score)}
    if getattr(res, "approximate", False):
        extras["warning"] = "approximate occlusion: only some positions were evaluated exactly"
    return MethodOutput(
        map=np.asarray(res.drop, dtype=np.float32), signed=True,
        raw=np.asarray(res.grid, dtype=np.float32), n_forwards=int(res.n_forwards), n_backwards=0,
        extras=extras,
    )


def _positions(size: int, patch: int, stride: int) -> int:
    if patch > size:
        return 0
    n = (size - patch) // stride + 1
    return n + (1 if (size - patch) % stride else 0)


def _cost(params: dict[str, Any], size: tuple[int, int]) -> float:
    h, w = size
    patch, stride = params["patch"], params["stride"]
    return float(1 + _positions(h, patch, stride) * _positions(w, patch, stride))


register(Method(
    name="occlusion",
    title="Occlusion sensitivity",
    fn=_occlusion,
    schema=SCHEMA,
    description="Hide a square at each position and record how much the class probability drops: slow but "
                "direct, at the resolution of the stride.",
    reference="Zeiler & Fergus, Visualizing and Understanding Convolutional Networks, ECCV 2014, §4.2",
    signed=True,
    uses_gradients=False,
    cost=_cost,
))

