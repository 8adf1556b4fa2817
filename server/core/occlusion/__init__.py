"""Occlusion sensitivity (Zeiler & Fergus, ECCV 2014): patch positions and baselines
(``positions``), the public entry point and batched engine (``engine``), the incremental exact
engine over a torch.fx graph (``incremental``) and the adaptive approximate one (``approximate``)."""

from pellucid.core.occlusion.engine import (
    METHODS,
    OUTPUTS,
    OcclusionResult,
    compare_to_exact,
    occlusion_map,
)
from pellucid.core.occlusion.positions import BASELINES, make_baseline, occlusion_positions

__all__ = [
    "BASELINES",
    "METHODS",
    "OUTPUTS",
    "OcclusionResult",
    "compare_to_exact",
    "make_baseline",
    "occlusion_map",
    "occlusion_positions",
]
