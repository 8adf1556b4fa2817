"""What the checks of a finished map will cost before they run, in the same terms as
``core/attribution/budget.py``: forward-pass equivalents × the measured seconds of one forward.

- **Faithfulness** (deletion and insertion curves): one forward per curve point, two curves of
  ``1 / step_fraction + 1`` points each (``core/attribution/faithfulness.py``'s own layout).
- **Weight randomisation** (cascading, ``core/attribution/sanity.py``): one map of the method per
  step plus the trained model's map; a step per block of parameterised layers, merged so the
  whole check fits its time budget (never fewer than its minimum of steps).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from torch import nn

from pellucid.core.attribution.sanity import DEFAULT_TIME_BUDGET, MIN_STEPS, block_of

__all__ = ["FAITHFULNESS_STEP", "CheckEstimate", "faithfulness_estimate", "sanity_estimate"]

FAITHFULNESS_STEP = 0.01  # the faithfulness curves' default step (share of the pixels per point)


@dataclass(frozen=True)
class CheckEstimate:
    kind: str
    units: str
    count: int  # curve points, or maps
    forwards: float
    seconds: float | None

    def to_dict(self) -> dict:
        return {"kind": self.kind, "units": self.units, "count": self.count, "forwards": self.forwards,
                "seconds": self.seconds}


def faithfulness_estimate(input_size: tuple[int, int], *, seconds_per_forward: float | None) -> CheckEstimate:
    h, w = input_size
    n = h * w
    per_step = max(1, math.ceil(n * FAITHFULNESS_STEP))
    points = 2 * (math.ceil(n / per_step) + 1)
    forwards = float(points + 1)
    return CheckEstimate("faithfulness", "curve points", points, forwards,
                         forwards * seconds_per_forward if seconds_per_forward is not None else None)


def _blocks(module: nn.Module) -> int:
    """Cascade steps at block granularity: runs of parameterised layers sharing a block."""
    runs: list[str] = []
    for name, m in module.named_modules():
        if name and any(True for _ in m.parameters(recurse=False)):
            block = block_of(name)
            if not runs or runs[-1] != block:
                runs.append(block)
    return max(1, len(runs))


def sanity_estimate(module: nn.Module, *, map_forwards: float, map_seconds: float | None,
                    time_budget: float = DEFAULT_TIME_BUDGET) -> CheckEstimate:
    """``map_forwards`` and ``map_seconds``: one map of the method (``budget.estimate_job``)."""
    steps = _blocks(module)
    if map_seconds:
        affordable = max(MIN_STEPS, int(max(0.0, time_budget - map_seconds) // max(map_seconds, 1e-9)))
        steps = min(steps, affordable)
    maps = steps + 1
    return CheckEstimate("sanity", "maps", maps, maps * map_forwards,
                         maps * map_seconds if map_seconds is not None else None)
