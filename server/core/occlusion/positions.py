"""Where occlusion patches go and what fills them: positions along an axis, baselines, occluded copies.

Shared by every occlusion engine (batched, incremental, approximate) so none of them imports another
for these basics. Positions: the patch's top-left corner takes 0, stride, 2·stride, … up to
``size − patch``, plus one last position flush with the far border, so every pixel is covered.
Baselines: the image's own per-channel mean, zero, a constant, a blur (sigma = patch/4, our own
choice) or a caller's tensor.
"""

from __future__ import annotations

import math
import numbers
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F

from pellucid.core.errors import BadParameterError

__all__ = ["BASELINES", "BLUR_SIGMA_PER_PATCH", "default_occlusion_geometry", "make_baseline", "occlusion_positions"]

BASELINES = ("mean", "zero", "blur")

# Blur baseline: a Gaussian with sigma = patch / 4 (at least 1 px), so detail at the scale of the
# patch is removed while colour and coarse shading stay; our own choice, documented in the result.
BLUR_SIGMA_PER_PATCH = 0.25


def _as_count(value: Any, name: str, *, minimum: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Real):
        raise BadParameterError(f"{name} must be a whole number of pixels; received {value!r}.")
    if isinstance(value, float) or not isinstance(value, numbers.Integral):
        fv = float(value)
        if math.isnan(fv) or math.isinf(fv):
            raise BadParameterError(f"{name} must be a finite whole number; received {value!r}.")
        if not fv.is_integer():
            raise BadParameterError(f"{name} must be a whole number of pixels; received {value!r}.")
        value = int(fv)
    value = int(value)
    if value < minimum:
        raise BadParameterError(f"{name} must be at least {minimum}; received {value}.")
    return value


def default_occlusion_geometry(height: int, width: int, *, patch: int | None = None,
                               stride: int | None = None) -> tuple[int, int]:
    """Pellucid's one rule for the occlusion patch and stride of an (H, W) input, where not given.

    patch = an eighth of the shorter side (at least 2 px), stride = half the patch (at least 1 px):
    12/6 at 96 px, 28/14 at 224 px, 4/2 at 32 px. The grid then has about 15×15 positions whatever
    the input size, and a patch is small enough to hide a stamp or a tag without hiding the
    subject. Our own choice (Zeiler & Fergus fix no size); the CLI, the API, the pages and the
    audit all use it. A given ``patch`` or ``stride`` is kept as it is; with only a stride given, the
    patch is at least that stride, so no pixel is skipped.
    """
    if patch is None:
        patch = max(2, min(int(height), int(width)) // 8, int(stride) if stride is not None else 0)
    if stride is None:
        stride = max(1, int(patch) // 2)
    return int(patch), int(stride)


def occlusion_positions(size: int, patch: int, stride: int) -> np.ndarray:
    """Top-left coordinates along one axis: 0, stride, … plus a last one flush with the border."""
    last = size - patch
    pos = list(range(0, last + 1, stride))
    if pos[-1] != last:
        pos.append(last)
    return np.asarray(pos, dtype=np.int64)



# ---------------------------------------------------------------------------------------------
# baselines


def _gaussian_blur(x: torch.Tensor, sigma: float) -> torch.Tensor:
    """Separable Gaussian blur of (1, C, H, W) with replicated borders."""
    radius = max(1, math.ceil(3.0 * sigma))
    t = torch.arange(-radius, radius + 1, dtype=x.dtype, device=x.device)
    k = torch.exp(-0.5 * (t / sigma) ** 2)
    k = k / k.sum()
    c = x.shape[1]
    kh = k.view(1, 1, -1, 1).repeat(c, 1, 1, 1)
    kw = k.view(1, 1, 1, -1).repeat(c, 1, 1, 1)
    y = F.pad(x, (0, 0, radius, radius), mode="replicate")
    y = F.conv2d(y, kh, groups=c)
    y = F.pad(y, (radius, radius, 0, 0), mode="replicate")
    return F.conv2d(y, kw, groups=c)


def make_baseline(
    x: torch.Tensor, baseline: str | float | torch.Tensor, *, patch: int
) -> tuple[torch.Tensor, str]:
    """The (1, C, H, W) fill used inside the patch, and a short description of it.

    ``"mean"``: per-channel mean of this image; ``"zero"``: 0 in normalised space (the dataset
    mean when the spec normalises with it); a float: that constant in normalised space;
    ``"blur"``: a Gaussian-blurred copy (sigma = patch/4, at least 1 px); a tensor broadcastable to
    (1, C, H, W), e.g. a per-channel dataset mean of shape (C,) or (C, 1, 1).
    """
    _, c, h, w = x.shape
    if isinstance(baseline, torch.Tensor):
        b = baseline.detach().to(dtype=x.dtype, device=x.device)
        if b.ndim == 1 and b.shape[0] == c:
            b = b.view(1, c, 1, 1)
        elif b.ndim == 3:
            b = b.unsqueeze(0)
        try:
            b = b.expand(1, c, h, w).contiguous()
        except RuntimeError:
            raise BadParameterError(
                f"a baseline tensor must broadcast to the input's (1, {c}, {h}, {w}); received shape "
                f"{tuple(baseline.shape)}. Give (C,), (C, 1, 1) or (1, C, H, W)."
            ) from None
        if not bool(torch.isfinite(b).all()):
            raise BadParameterError("baseline tensor contains NaN or infinite values.")
        return b, f"tensor{tuple(baseline.shape)}"
    if isinstance(baseline, bool):
        raise BadParameterError(f"baseline must be one of {BASELINES}, a number or a tensor; received {baseline!r}.")
    if isinstance(baseline, numbers.Real):
        v = float(baseline)
        if not math.isfinite(v):
            raise BadParameterError(f"baseline constant must be finite; received {baseline!r}.")
        return torch.full_like(x, v), f"constant {v:g}"
    if baseline == "mean":
        return x.mean(dim=(2, 3), keepdim=True).expand_as(x).contiguous(), "mean"
    if baseline == "zero":
        return torch.zeros_like(x), "zero"
    if baseline == "blur":
        sigma = max(1.0, BLUR_SIGMA_PER_PATCH * patch)
        return _gaussian_blur(x, sigma), f"blur sigma={sigma:g}"
    raise BadParameterError(
        f"baseline must be one of {BASELINES}, a number or a tensor; received {baseline!r}."
    )



def _occluded_batch(
    x: torch.Tensor, base: torch.Tensor, tops: torch.Tensor, lefts: torch.Tensor, patch: int
) -> torch.Tensor:
    """(B, C, H, W): copies of x with base pasted in the patch at each (top, left)."""
    _, _, h, w = x.shape
    ys = torch.arange(h, device=x.device)
    xs = torch.arange(w, device=x.device)
    rows = (ys[None, :] >= tops[:, None]) & (ys[None, :] < tops[:, None] + patch)
    cols = (xs[None, :] >= lefts[:, None]) & (xs[None, :] < lefts[:, None] + patch)
    mask = (rows[:, :, None] & cols[:, None, :]).unsqueeze(1)
    # channels_last lets the CPU convolution kernels skip a layout change (faster in the bench)
    return torch.where(mask, base, x).contiguous(memory_format=torch.channels_last)


