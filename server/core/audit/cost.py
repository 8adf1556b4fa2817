"""What an audit will cost before it starts: forward passes per phase × one measured forward.

The figures follow the audit's phases (``core/audit/runner.py``) and count forward-pass
equivalents as the map estimates do (``core/attribution/budget.py``: a backward pass counts as
two; common practice, no source):

- **images**: each image's map, the method's registered cost (an upper bound for occlusion,
  whose faster engines skip work);
- **confirmation**: only clusters that discovery finds suspicious are tested, often none; each
  tested cluster costs at most a removal pass over its images and a transplant and a control pass
  over the other classes' images (each capped at the confirmation's ``limit``), so this phase is
  given as an upper bound and kept out of the likely total;
- **injection** and **background swap**: two forwards per tested image (before and after);
- **gallery**: one forward per image, then the synthetic pictures (``VISUALS`` channels ×
  ``steps`` optimisation steps, a forward and a backward each).

Discovery clusters stored maps without running the model, and the summary and pictures are small
next to the maps; they are not counted. Measured times vary with the machine's load; the
estimate says "about".
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["AuditCost", "PhaseCost", "audit_cost"]

# Steps of one synthetic picture of the gallery (featvis.feature_visual's default) and channels drawn.
_VISUAL_STEPS = 128
_VISUALS = 4


@dataclass(frozen=True)
class PhaseCost:
    phase: str
    unit: str
    count: int
    forwards: float
    seconds: float
    upper_bound_only: bool = False  # counted in the upper bound, not in the likely total

    def to_dict(self) -> dict:
        return {"phase": self.phase, "unit": self.unit, "count": self.count, "forwards": self.forwards,
                "seconds": self.seconds, "upper_bound_only": self.upper_bound_only}


@dataclass(frozen=True)
class AuditCost:
    images: int
    phases: tuple[PhaseCost, ...]
    seconds_per_forward: float

    @property
    def seconds(self) -> float:
        """The likely total: every phase that always runs."""
        return sum(p.seconds for p in self.phases if not p.upper_bound_only)

    @property
    def seconds_max(self) -> float:
        return sum(p.seconds for p in self.phases)

    def to_dict(self) -> dict:
        return {"images": self.images, "phases": [p.to_dict() for p in self.phases], "seconds": self.seconds,
                "seconds_max": self.seconds_max, "seconds_per_forward": self.seconds_per_forward,
                "forwards": sum(p.forwards for p in self.phases if not p.upper_bound_only)}


def audit_cost(*, images: int, forwards_per_image: float, seconds_per_forward: float,
               injection_images: int | None = None, background_swap: bool = False, gallery: bool = False,
               confirm_clusters: int = 0, confirm_limit: int = 200) -> AuditCost:
    """The cost of auditing ``images`` images whose map costs ``forwards_per_image`` forwards each.

    ``injection_images``: images the injection test pastes into (None: no test);
    ``confirm_clusters``: the most clusters confirmation may test (0: confirmation off).
    """
    def phase(name: str, unit: str, count: int, forwards: float, *, upper: bool = False) -> PhaseCost:
        return PhaseCost(name, unit, int(count), float(forwards), float(forwards) * seconds_per_forward, upper)

    phases = [phase("images", "images", images, images * forwards_per_image)]
    if confirm_clusters:
        per_cluster = 3 * min(confirm_limit, images)
        phases.append(phase("confirmation", "clusters", confirm_clusters, confirm_clusters * per_cluster, upper=True))
    if injection_images is not None:
        phases.append(phase("injection", "images", injection_images, 2 * injection_images))
    if background_swap:
        phases.append(phase("background swap", "images", images, 2 * images))
    if gallery:
        phases.append(phase("gallery", "images", images, images))
        phases.append(phase("feature visuals", "channels", _VISUALS, _VISUALS * _VISUAL_STEPS * 3))
    return AuditCost(images=images, phases=tuple(phases), seconds_per_forward=seconds_per_forward)
