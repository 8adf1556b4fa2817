"""Occlusion sensitivity behind the registry (the computation lives in :mod:`pellucid.core.occlusion.engine`).

Zeiler & Fergus, "Visualizing and Understanding Convolutional Networks", ECCV 2014, §4.2. The
map is the drop in the target's score when a patch covering the pixel is hidden (signed:
negative where hiding raises it). The score is the class probability (the spec's softmax or
sigmoid) or, with ``output = "logit"``, the raw score before it. The paper fixes no patch size,
stride or fill; Pellucid's defaults are the image-mean fill and, unless given, the patch and stride
of :func:`~pellucid.core.occlusion.positions.default_occlusion_geometry` (an eighth of the input's
shorter side, stride half of it), reported with every map.

Saturation. Near p = 1 (or 0) a probability hardly moves even when the raw score moves a lot
(dp = p(1 − p)·dz for a softmax or sigmoid), so the probability map is nearly flat whatever
the evidence. A map is reported as saturated when p ≥ 0.99 or p ≤ 0.01 and no patch moves p by
more than 0.01 (Pellucid's own thresholds); the result then carries a warning that suggests
``output = "logit"``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.errors import BadParameterError
from pellucid.core.occlusion.positions import default_occlusion_geometry
from pellucid.core.progress import CancelToken, ProgressFn

__all__ = ["SATURATED_CHANGE", "SATURATED_P", "check_geometry", "saturation_warning"]

SATURATED_P = 0.99  # a probability this close to 1 (or to 0) barely moves
SATURATED_CHANGE = 0.01  # ...and no patch moved it by more than this

SCHEMA = ParamSchema((
    Param("patch", "int", None, "side of the hidden square in pixels; default: an eighth of the input's shorter "
          "side", min=1, max=4096),
    Param("stride", "int", None, "step between patch positions in pixels; default: half the patch", min=1,
          max=4096),
    Param("baseline", "choice", "mean", "fill of the hidden square: the image's mean colour, zero in input "
          "space, or a blurred copy", choices=("mean", "zero", "blur")),
    Param("output", "choice", "probability", "the score whose drop is mapped: the class probability, or the raw "
          "score before softmax/sigmoid ('logit'), which still moves when the probability is saturated near 1",
          choices=("probability", "logit")),
    Param("engine", "choice", "auto", "how the positions are evaluated: 'auto' picks the fastest exact engine "
          "(incremental where it pays, else batched); 'approximate' refines a coarse grid and is not exact",
          choices=("auto", "batched", "incremental", "naive", "approximate")),
))


def check_geometry(input_shape: tuple[int, int, int], params: dict[str, Any]) -> None:
    """Patch and stride must fit a (C, H, W) input, and the stride must not skip pixels."""
    _, h, w = input_shape
    params = dict(params)
    # The given values first, so a sentence names what the user typed (a stride alone also raises
    # the default patch to it, which would otherwise be blamed).
    stated = [name for name in ("stride", "patch") if params.get(name) is not None]
    params["patch"], params["stride"] = default_occlusion_geometry(h, w, patch=params.get("patch"),
                                                                   stride=params.get("stride"))
    for name in (*stated, "patch", "stride"):
        value = params.get(name)
        if isinstance(value, int) and value > min(h, w):
            raise BadParameterError(
                f"occlusion {name} {value} px is larger than the model's {h}×{w} input; use at most {min(h, w)} px"
            )
    patch, stride = params.get("patch"), params.get("stride")
    if isinstance(patch, int) and isinstance(stride, int) and stride > patch:
        raise BadParameterError(
            f"occlusion stride {stride} px is larger than the patch ({patch} px): some pixels would never be hidden; "
            f"use a stride of at most {patch} px"
        )


def saturation_warning(base_score: float, grid: np.ndarray, *, output: str) -> str | None:
    """The warning for a probability map that is flat because the probability is saturated, else None."""
    if output == "logit" or not np.isfinite(grid).all():
        return None
    largest = float(np.abs(grid).max()) if grid.size else 0.0
    if (base_score >= SATURATED_P or base_score <= 1.0 - SATURATED_P) and largest <= SATURATED_CHANGE:
        return (
            f"the class probability is saturated at {base_score:.4f}: no hidden patch moves it by more than "
            f"{largest:.4f}, so this map is nearly flat whatever the evidence; use output = \"logit\" to map "
            "changes of the raw score instead"
        )
    return None


def _occlusion(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    from pellucid.core.occlusion.engine import occlusion_map  # lazily: keeps the registry importable on its own

    output = "logit" if params["output"] == "logit" else context.output_kind
    patch, stride = default_occlusion_geometry(*x.shape[-2:], patch=params["patch"], stride=params["stride"])
    res = occlusion_map(
        model, x, target=target, patch=patch, stride=stride,
        baseline=params["baseline"], output=output, method=params["engine"],
        progress=progress, cancel=cancel,
    )
    extras: dict[str, Any] = {"engine": res.engine, "positions": int(res.grid.size),
                              "base_score": float(res.base_score), "score": output}
    warnings = []
    if getattr(res, "approximate", False):
        warnings.append("approximate occlusion: only some positions were evaluated exactly")
    saturated = saturation_warning(float(res.base_score), np.asarray(res.grid), output=output)
    if saturated:
        extras["saturated"] = True
        warnings.append(saturated)
    if warnings:
        extras["warning"] = "; ".join(warnings)
    return MethodOutput(
        map=np.asarray(res.drop, dtype=np.float32), signed=True,
        raw=np.asarray(res.grid, dtype=np.float32), n_forwards=int(res.n_forwards), n_backwards=0,
        extras=extras, resolved={"patch": patch, "stride": stride},
    )


def _positions(size: int, patch: int, stride: int) -> int:
    if patch > size:
        return 0
    n = (size - patch) // stride + 1
    return n + (1 if (size - patch) % stride else 0)


def _cost(params: dict[str, Any], size: tuple[int, int]) -> float:
    h, w = size
    patch, stride = default_occlusion_geometry(h, w, patch=params["patch"], stride=params["stride"])
    return float(1 + _positions(h, patch, stride) * _positions(w, patch, stride))


def _check(model: nn.Module, input_shape: tuple[int, int, int], params: dict[str, Any]) -> None:
    check_geometry(input_shape, params)


register(Method(
    name="occlusion",
    title="Occlusion sensitivity",
    fn=_occlusion,
    schema=SCHEMA,
    description="Hide a square at each position and record how much the class probability (or raw score) "
                "drops: slow but direct, at the resolution of the stride.",
    reference="Zeiler & Fergus, Visualizing and Understanding Convolutional Networks, ECCV 2014, §4.2",
    signed=True,
    uses_gradients=False,
    cost=_cost,
    check=_check,
))
