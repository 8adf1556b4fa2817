"""How to read a map and a job: the unit of a map's values, what a job's progress counts, and a
warning when a map is too flat to say anything.

Units follow each method's definition (the module docstrings of ``core/attribution/`` cite the
papers): the *class score* is the model's pre-softmax (or pre-sigmoid) output for the target class,
the *probability* the score after softmax (or sigmoid).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from pellucid.core.audit.phases import phase_unit

__all__ = ["FLAT_RELATIVE_RANGE", "PROGRESS_UNITS", "flat_map_warning", "map_unit", "progress_unit", "unit_short"]

# What one step of each job's progress counts (the units the core's ``step`` calls are made in).
PROGRESS_UNITS: dict[str, str] = {
    "occlusion": "patch positions",
    "rise": "masks",
    "smoothgrad": "noisy copies",
    "integrated_gradients": "path points",
    "gradcam": "passes",
    "saliency": "passes",
    "gradient_x_input": "passes",
    "faithfulness": "curve points",
    "sanity": "maps",
}
# A map whose values span less than this share of its largest magnitude is called flat (our choice:
# one per cent is below what a colour scale shows as different colours).
FLAT_RELATIVE_RANGE = 0.01
# Methods whose values are probabilities or score drops (0–1 or a few score units): below this size a
# value is float rounding, not evidence (our choice: float32 keeps about 7 significant digits).
ROUNDING_FLOOR = {"occlusion": 1e-6, "rise": 1e-6}


def progress_unit(kind: str, *, phase: str | None = None) -> str:
    """What the progress of a job of ``kind`` counts (an audit's depends on its phase)."""
    if kind == "audit":
        return (phase_unit(phase) or "steps") if phase else "images"
    return PROGRESS_UNITS.get(kind, "steps")


def map_unit(method: str, params: dict[str, Any], target_label: str) -> str:
    """The unit of a map's values, for its colour bar and read-out: what one number on the map means."""
    cls = f"'{target_label}'"
    if method == "occlusion":
        if params.get("output") == "logit":
            return f"drop in the class score of {cls} (pre-softmax units) when this area is hidden"
        return f"drop in the probability of {cls} (0–1) when this area is hidden"
    if method in ("saliency", "smoothgrad"):
        return f"|change of the class score of {cls} per unit of normalised input|"
    if method == "gradient_x_input":
        return f"contribution to the class score of {cls} (pre-softmax units)"
    if method == "integrated_gradients":
        return f"contribution to the class score of {cls} (pre-softmax units; sums to F(x) − F(baseline))"
    if method == "rise":
        return f"expected probability of {cls} (0–1) when this pixel is visible"
    if method == "gradcam":
        return f"gradient-weighted activation for {cls} (the layer's own units, ≥ 0)"
    return f"{method} attribution for {cls}"


def unit_short(method: str, params: dict[str, Any]) -> str:
    """The unit alone, short enough for a colour bar's title (the read-out and facts use :func:`map_unit`)."""
    if method == "occlusion":
        return "class score drop (pre-softmax units)" if params.get("output") == "logit" \
            else "probability drop (0–1)"
    if method in ("saliency", "smoothgrad"):
        return "|score gradient| per unit of normalised input"
    if method in ("gradient_x_input", "integrated_gradients"):
        return "contribution to the class score (pre-softmax units)"
    if method == "rise":
        return "expected probability when visible (0–1)"
    if method == "gradcam":
        return "weighted activation (the layer's units)"
    return f"{method} attribution"


def flat_map_warning(values: np.ndarray, *, method_title: str, method: str | None = None) -> str | None:
    """A sentence when the map's values hardly differ (so its colours carry no information), else None.

    ``method`` (a registry name) lets values under its rounding floor count as zero."""
    v = np.asarray(values, dtype=np.float64)
    finite = v[np.isfinite(v)]
    if finite.size == 0:
        return None
    lo, hi = float(finite.min()), float(finite.max())
    scale = max(abs(lo), abs(hi))
    spread = hi - lo
    if scale <= ROUNDING_FLOOR.get(method or "", 0.0):
        return (f"the {method_title} map is zero everywhere (to rounding): it shows no evidence for this class; "
                "try another method or class")
    if spread <= FLAT_RELATIVE_RANGE * scale:
        return (f"the {method_title} map is nearly flat: its values span only {spread:.3g} (from {lo:.4g} to "
                f"{hi:.4g}, under {FLAT_RELATIVE_RANGE:.0%} of their size), so its colours say almost nothing about "
                "where the evidence is; try more samples, another setting or another method")
    return None
