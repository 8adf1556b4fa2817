"""Everything that decides an audit's results, in one validated, JSON-able record.

The engine (local or Ray) and the number of workers are deliberately *not* settings: they change
how fast a run goes, never what it finds, so a run started on one engine resumes on another.
"""

from __future__ import annotations

import hashlib
import math
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np

from pellucid.core.audit.measures import RegionLayout
from pellucid.core.errors import BadParameterError

__all__ = ["DEFAULT_METHOD", "TARGETS", "AuditSettings", "ConfirmSettings", "DiscoverySettings", "GallerySpec",
           "InjectionSpec", "default_method"]

TARGETS = ("label", "predicted")
# The default audit: Grad-CAM at the feature map that feeds the head, then discovery and
# confirmation (chosen from `pellucid bench shortcuts`, see BENCHMARKS.md); models that allow no
# forward hooks (TorchScript) get occlusion with the default geometry instead.
DEFAULT_METHOD = "gradcam"
FALLBACK_METHOD = "occlusion"


def default_method(*, supports_hooks: bool) -> str:
    """The method an audit uses when none is asked for."""
    return DEFAULT_METHOD if supports_hooks else FALLBACK_METHOD


def _whole(owner: str, name: str, value: Any, lo: int, hi: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
        raise BadParameterError(f"{owner} {name} must be a whole number from {lo} to {hi}; received {value!r}")


@dataclass(frozen=True)
class DiscoverySettings:
    """How each class's maps are grouped (see :mod:`pellucid.core.audit.discovery`); our own defaults."""

    grid: int = 16  # side of the downsized maps
    max_clusters: int = 6  # the eigengap picks 1 … this many clusters per class
    neighbour: int = 7  # local scale: distance to this nearest neighbour (Zelnik-Manor & Perona 2004)
    max_images: int = 1500  # per class; beyond it an even sample of the class is clustered
    min_images: int = 6  # a class with fewer maps is one group, not clustered

    def validated(self) -> DiscoverySettings:
        for name, lo, hi in (("grid", 2, 64), ("max_clusters", 1, 20), ("neighbour", 1, 50),
                             ("max_images", 10, 20000), ("min_images", 3, 1000)):
            _whole("discovery", name, getattr(self, name), lo, hi)
        return self

    def to_dict(self) -> dict:
        return {"grid": self.grid, "max_clusters": self.max_clusters, "neighbour": self.neighbour,
                "max_images": self.max_images, "min_images": self.min_images}

    @classmethod
    def from_dict(cls, data: dict) -> DiscoverySettings:
        return cls(**{k: data[k] for k in cls().to_dict() if k in data})


@dataclass(frozen=True)
class ConfirmSettings:
    """Which clusters confirmation tests and what counts as a large effect (our own defaults).

    A cluster is tested when its suspicion is at least ``min_suspicion`` and it holds at least
    ``min_size`` images; at most ``max_clusters`` of the run, most suspicious first. "Confirmed
    shortcut" needs both: taking the region away loses at least ``min_calls_lost`` of the
    cluster's calls of the class (images predicted as it), and putting the region into the other
    classes' images flips at least ``min_transplant_flips`` of them to it, net of the control.
    """

    min_suspicion: float = 0.3
    max_clusters: int = 6
    min_size: int = 3
    min_calls_lost: float = 0.5
    min_transplant_flips: float = 0.3
    region_mass: float = 0.5  # the region: the fewest pixels holding this share of the evidence
    limit: int = 200  # images per test

    def validated(self) -> ConfirmSettings:
        for name in ("min_suspicion", "min_calls_lost", "min_transplant_flips", "region_mass"):
            _fraction(f"confirmation {name}", getattr(self, name))
        for name, hi in (("max_clusters", 50), ("min_size", 10_000), ("limit", 100_000)):
            _whole("confirmation", name, getattr(self, name), 1, hi)
        if self.region_mass <= 0:
            raise BadParameterError("confirmation region_mass must be above 0")
        return self

    def to_dict(self) -> dict:
        return {"min_suspicion": self.min_suspicion, "max_clusters": self.max_clusters, "min_size": self.min_size,
                "min_calls_lost": self.min_calls_lost, "min_transplant_flips": self.min_transplant_flips,
                "region_mass": self.region_mass, "limit": self.limit}

    @classmethod
    def from_dict(cls, data: dict) -> ConfirmSettings:
        return cls(**{k: data[k] for k in cls().to_dict() if k in data})


def _fraction(name: str, value: Any, *, lo: float = 0.0, hi: float = 1.0) -> float:
    if (isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value)
            or not lo <= value <= hi):
        raise BadParameterError(f"{name} must be a number between {lo} and {hi}; received {value!r}")
    return float(value)


@dataclass(frozen=True)
class AuditSettings:
    """How each image is explained and measured.

    ``target``: which class each map explains — the image's true ``label`` (default: "is the evidence
    for the right answer on the object?", the pointing game's convention) or the ``predicted`` class.
    ``flag_concentration``: a corner or the border band is flagged when its share of the evidence is
    at least this many times its share of the area (4× by default, Pellucid's own choice).
    ``flag_outside``: an image with an object is flagged when more than this share of its evidence
    lies outside the object (one half by default).
    """

    method: str = DEFAULT_METHOD
    params: dict = field(default_factory=dict)
    target: str = "label"
    regions: RegionLayout = field(default_factory=RegionLayout)
    tolerance: float | None = None  # pointing tolerance in px; None: 15/224 of the input's shorter side
    flag_concentration: float = 4.0
    flag_outside: float = 0.5
    shard_size: int = 8
    threads: int = 1
    discovery: DiscoverySettings | None = field(default_factory=DiscoverySettings)
    confirmation: ConfirmSettings | None = field(default_factory=ConfirmSettings)
    channel_layer: str | None = None  # layer whose channels are ranked per cluster; None: Grad-CAM's default

    def validated(self) -> AuditSettings:
        from pellucid.core.attribution import get_method  # here, so reading stored settings needs no torch

        method = get_method(self.method)  # UnknownMethodError lists the known names
        params = method.schema.validate(dict(self.params or {}), method=method.name)
        if self.target not in TARGETS:
            raise BadParameterError(f"target must be one of {', '.join(TARGETS)}; received {self.target!r}")
        if self.tolerance is not None and (isinstance(self.tolerance, bool) or not isinstance(
                self.tolerance, (int, float)) or not (math.isfinite(self.tolerance) and self.tolerance >= 0)):
            raise BadParameterError(f"pointing tolerance must be a non-negative number of pixels; received "
                                    f"{self.tolerance!r}")
        if isinstance(self.flag_concentration, bool) or not isinstance(self.flag_concentration, (int, float)) or not (
                math.isfinite(self.flag_concentration) and self.flag_concentration >= 1):
            raise BadParameterError(f"flag_concentration must be a number >= 1; received {self.flag_concentration!r}")
        _fraction("flag_outside", self.flag_outside)
        for name, value, hi in (("shard_size", self.shard_size, 4096), ("threads", self.threads, 256)):
            if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= hi:
                raise BadParameterError(f"{name} must be a whole number from 1 to {hi}; received {value!r}")
        if self.discovery is not None:
            self.discovery.validated()
        if self.confirmation is not None:
            if self.discovery is None:
                raise BadParameterError("confirmation tests the clusters that discovery finds; turn discovery on, "
                                        "or confirmation off")
            self.confirmation.validated()
        if self.channel_layer is not None and (not isinstance(self.channel_layer, str) or not self.channel_layer):
            raise BadParameterError(f"the channel layer must be a layer name; received {self.channel_layer!r}")
        return replace(self, params=dict(params),
                       tolerance=None if self.tolerance is None else float(self.tolerance),
                       flag_concentration=float(self.flag_concentration), flag_outside=float(self.flag_outside))

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "params": dict(self.params),
            "target": self.target,
            "regions": self.regions.to_dict(),
            "tolerance": self.tolerance,
            "flag_concentration": self.flag_concentration,
            "flag_outside": self.flag_outside,
            "shard_size": self.shard_size,
            "threads": self.threads,
            "discovery": self.discovery.to_dict() if self.discovery is not None else None,
            "confirmation": self.confirmation.to_dict() if self.confirmation is not None else None,
            "channel_layer": self.channel_layer,
        }

    @classmethod
    def from_dict(cls, data: dict) -> AuditSettings:
        return cls(
            method=data["method"], params=dict(data.get("params") or {}), target=data.get("target", "label"),
            regions=RegionLayout(**data.get("regions", {})), tolerance=data.get("tolerance"),
            flag_concentration=data.get("flag_concentration", 4.0), flag_outside=data.get("flag_outside", 0.5),
            shard_size=data.get("shard_size", 8), threads=data.get("threads", 1),
            # Runs stored before discovery existed carry neither key: they ran without it.
            discovery=DiscoverySettings.from_dict(data["discovery"]) if data.get("discovery") else None,
            confirmation=ConfirmSettings.from_dict(data["confirmation"]) if data.get("confirmation") else None,
            channel_layer=data.get("channel_layer"),
        )


@dataclass(frozen=True)
class InjectionSpec:
    """A suspect patch to paste onto images of the other classes.

    ``patch`` is (h, w, 3) uint8; ``at`` is its top-left corner (x, y) in the model's input pixels
    (the picture after the spec's resize and crop). ``source`` says where the patch came from.
    ``limit`` caps the number of images tested (None: all images of the other classes).
    ``mask`` (h, w) bool, optional: only these pixels of the patch are pasted (a ring, a blob),
    the others keep the receiving image's own pixels. ``at = "random"`` pastes each image's patch
    at its own place, drawn (whole patch inside the input) from ``seed`` and the image's index.
    """

    patch: np.ndarray
    suspect_class: str
    at: tuple[int, int] | str
    source: str = "given"
    limit: int | None = None
    mask: np.ndarray | None = None
    seed: int = 0

    @property
    def random(self) -> bool:
        return isinstance(self.at, str) and self.at == "random"

    def __post_init__(self) -> None:
        p = self.patch
        if (not isinstance(p, np.ndarray) or p.dtype != np.uint8 or p.ndim != 3 or p.shape[2] != 3
                or min(p.shape[:2]) < 1):
            got = f"{p.dtype} {p.shape}" if isinstance(p, np.ndarray) else type(p).__name__
            raise BadParameterError(f"the suspect patch must be an RGB picture (h, w, 3) uint8; received {got}")
        if not self.random and (isinstance(self.at, str) or len(self.at) != 2 or any(
                isinstance(v, bool) or not isinstance(v, (int, np.integer)) for v in self.at)):
            raise BadParameterError(f"the injection location must be two whole numbers (x, y) or \"random\"; "
                                    f"received {self.at!r}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise BadParameterError(f"the injection seed must be a whole number >= 0; received {self.seed!r}")
        if self.limit is not None and (not isinstance(self.limit, int) or self.limit < 1):
            raise BadParameterError("the injection image limit must be a positive whole number; "
                                    f"received {self.limit!r}")
        m = self.mask
        if m is not None and (not isinstance(m, np.ndarray) or m.shape != p.shape[:2] or not m.any()):
            raise BadParameterError(f"the patch mask must be a non-empty (h, w) = {p.shape[:2]} array of booleans; "
                                    f"received {getattr(m, 'shape', type(m).__name__)}")

    @property
    def patch_sha256(self) -> str:
        extra = b"" if self.mask is None else np.packbits(self.mask.astype(bool)).tobytes()
        return hashlib.sha256(np.ascontiguousarray(self.patch).tobytes() + repr(self.patch.shape).encode()
                              + extra).hexdigest()

    def to_dict(self) -> dict:
        h, w = self.patch.shape[:2]
        out = {"patch_sha256": self.patch_sha256, "patch_size": [int(w), int(h)],
               "suspect_class": self.suspect_class,
               "at": "random" if self.random else [int(self.at[0]), int(self.at[1])],
               "source": self.source, "limit": self.limit,
               "masked": self.mask is not None, "mask_pixels": None if self.mask is None else int(self.mask.sum())}
        if self.random:
            out["seed"] = self.seed
        return out


@dataclass(frozen=True)
class GallerySpec:
    """Which layer's channel response gallery to build, and how many top patches per channel."""

    layer: str
    top: int = 8
    visual_steps: int = 96

    def __post_init__(self) -> None:
        if not isinstance(self.layer, str) or not self.layer:
            raise BadParameterError(f"the gallery needs a layer name; received {self.layer!r}")
        if isinstance(self.top, bool) or not isinstance(self.top, int) or not 1 <= self.top <= 64:
            raise BadParameterError(f"gallery top must be a whole number from 1 to 64; received {self.top!r}")
        if isinstance(self.visual_steps, bool) or not isinstance(self.visual_steps, int) or not (
                1 <= self.visual_steps <= 2048):
            raise BadParameterError(f"feature visualisation steps must be a whole number from 1 to 2048; "
                                    f"received {self.visual_steps!r}")

    def to_dict(self) -> dict:
        return {"layer": self.layer, "top": self.top, "visual_steps": self.visual_steps}
