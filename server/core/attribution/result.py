"""The attribution map and what every method hands back to the registry."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = ["AttributionMap", "MethodOutput"]


@dataclass
class MethodOutput:
    """What a method's function returns; the registry adds target, timing and params."""

    map: np.ndarray  # (H, W) float32 at input resolution
    signed: bool
    raw: np.ndarray | None = None  # per-channel (C, H, W) values, or a low-resolution map
    n_forwards: int = 0  # images pushed through the model (a batch of 8 counts 8)
    n_backwards: int = 0  # images whose gradient was taken
    resolved: dict[str, Any] = field(default_factory=dict)  # automatic choices, e.g. the layer
    extras: dict[str, Any] = field(default_factory=dict)


@dataclass
class AttributionMap:
    """A per-pixel attribution map with everything needed to re-create it.

    ``map`` is (H, W) float32 at the model's input resolution. ``signed`` says whether negative
    values carry meaning (render with a diverging colour map centred at zero) or the map is a
    magnitude. ``raw`` is the method's richer output where it has one: per-channel (C, H, W)
    attributions for the gradient methods, the (h, w) map before upsampling for Grad-CAM.
    ``target`` is the class index explained; ``target_source`` says whether the caller asked
    for it ("given") or it was the model's top-1 class ("top-1"). ``params`` are the validated
    parameters including seeds and automatic choices. ``extras`` holds JSON-able scalars such as
    Integrated Gradients' completeness error and any ``warning`` text for the page.
    """

    map: np.ndarray
    signed: bool
    method: str
    target: int
    target_source: str
    params: dict[str, Any]
    seconds: float
    n_forwards: int
    n_backwards: int
    raw: np.ndarray | None = None
    extras: dict[str, Any] = field(default_factory=dict)

    @property
    def warning(self) -> str | None:
        return self.extras.get("warning")

    @property
    def forward_equivalents(self) -> float:
        """Cost in forward passes, counting a backward pass as two (common practice, no source)."""
        return float(self.n_forwards + 2 * self.n_backwards)

    def summary(self) -> dict[str, Any]:
        """JSON-able description without the arrays (for the API, the store and reports)."""
        m = self.map
        return {
            "method": self.method,
            "target": self.target,
            "target_source": self.target_source,
            "signed": self.signed,
            "shape": list(m.shape),
            "min": float(m.min()),
            "max": float(m.max()),
            "params": dict(self.params),
            "seconds": self.seconds,
            "n_forwards": self.n_forwards,
            "n_backwards": self.n_backwards,
            "forward_equivalents": self.forward_equivalents,
            "extras": dict(self.extras),
        }

    def __repr__(self) -> str:
        h, w = self.map.shape
        return (
            f"AttributionMap(method={self.method!r}, target={self.target}, {h}x{w}, "
            f"signed={self.signed}, seconds={self.seconds:.3f})"
        )
