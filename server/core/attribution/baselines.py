"""Reference inputs ("baselines") for Integrated Gradients and the faithfulness canvases.

The model sees normalised tensors, so "black" is not zero: a black pixel becomes
(0 − mean) / std per channel. The caller passes the spec's mean and std as a
:class:`Normalization`; without it only the "zero" (the mean colour after normalisation),
"blur" and caller-given baselines are available.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import torch
from scipy import ndimage

from pellucid.core.errors import BadParameterError

__all__ = ["BASELINE_KINDS", "Normalization", "blurred", "make_baseline"]

BASELINE_KINDS = ("black", "zero", "blur", "constant", "custom")


@dataclass(frozen=True)
class Normalization:
    """Per-channel mean and std the model's preprocessing applies to pixels scaled to [0, 1]."""

    mean: tuple[float, ...]
    std: tuple[float, ...]

    def __post_init__(self) -> None:
        if len(self.mean) != len(self.std) or not self.mean:
            raise BadParameterError(
                f"mean and std need one value per channel; received {len(self.mean)} and {len(self.std)}"
            )
        if any(not math.isfinite(s) or s <= 0 for s in self.std) or any(
            not math.isfinite(m) for m in self.mean
        ):
            raise BadParameterError(f"std must be positive and finite; received mean={self.mean}, std={self.std}")

    @classmethod
    def of(cls, mean: Sequence[float], std: Sequence[float]) -> Normalization:
        return cls(tuple(float(m) for m in mean), tuple(float(s) for s in std))

    def pixel(self, value: float, like: torch.Tensor) -> torch.Tensor:
        """A tensor shaped like ``like`` (1, C, H, W) holding pixel intensity ``value`` everywhere."""
        c = like.shape[1]
        if c != len(self.mean):
            raise BadParameterError(
                f"the normalisation has {len(self.mean)} channels but the input has {c}"
            )
        mean = torch.tensor(self.mean, dtype=like.dtype, device=like.device).view(1, c, 1, 1)
        std = torch.tensor(self.std, dtype=like.dtype, device=like.device).view(1, c, 1, 1)
        return ((value - mean) / std).expand_as(like).clone()


def blurred(x: torch.Tensor, sigma: float) -> torch.Tensor:
    """(N, C, H, W) → the same, Gaussian-blurred over H and W with ``sigma`` pixels."""
    arr = x.detach().cpu().numpy().astype(np.float64)
    out = ndimage.gaussian_filter(arr, sigma=(0, 0, sigma, sigma), mode="nearest")
    return torch.from_numpy(out).to(dtype=x.dtype, device=x.device)


def make_baseline(
    x: torch.Tensor,
    kind: str,
    *,
    normalization: Normalization | None = None,
    value: float = 0.0,
    sigma: float = 8.0,
    given: torch.Tensor | None = None,
) -> torch.Tensor:
    """The (1, C, H, W) reference input of ``kind`` for ``x``.

    - ``black``: pixel intensity 0 pushed through the normalisation (needs ``normalization``);
    - ``constant``: pixel intensity ``value`` in [0, 1] (0.5 = mid grey; needs ``normalization``);
    - ``zero``: all zeros in the model's input space (the mean colour of normalised inputs);
    - ``blur``: ``x`` blurred with a Gaussian of ``sigma`` pixels;
    - ``custom``: the tensor ``given`` by the caller, same shape as ``x``.
    """
    if kind in ("black", "constant"):
        if normalization is None:
            raise BadParameterError(
                f"baseline {kind!r} needs the model's mean and std to know what a "
                f"{'black' if kind == 'black' else 'constant'} pixel looks like after preprocessing; "
                "pass normalization=Normalization.of(mean, std) from the model spec, "
                "or choose baseline 'zero' or 'blur'"
            )
        return normalization.pixel(0.0 if kind == "black" else value, x)
    if kind == "zero":
        return torch.zeros_like(x)
    if kind == "blur":
        return blurred(x, sigma)
    if kind == "custom":
        if given is None:
            raise BadParameterError(
                "baseline 'custom' needs a baseline tensor from the caller (baseline_input=...); "
                "choose 'black', 'zero', 'blur' or 'constant' otherwise"
            )
        if not isinstance(given, torch.Tensor) or tuple(given.shape) != tuple(x.shape):
            got = tuple(given.shape) if isinstance(given, torch.Tensor) else type(given).__name__
            raise BadParameterError(
                f"the baseline tensor must have the input's shape {tuple(x.shape)}; received {got}"
            )
        if not bool(torch.isfinite(given).all()):
            raise BadParameterError("the baseline tensor contains NaN or infinite values")
        return given.detach().to(dtype=x.dtype, device=x.device).clone()
    raise BadParameterError(f"baseline must be one of {', '.join(BASELINE_KINDS)}; received {kind!r}")
