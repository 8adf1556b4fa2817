"""Attribution maps behind one registry, their faithfulness scores and the sanity check.

    compute_attribution(name, model, x, target=…, params={…}) -> AttributionMap
    list_methods()                                             -> JSON-able method descriptions
    faithfulness(model, x, amap.map, target=…)                 -> deletion / insertion curves + AUC
    rank_methods({name: FaithfulnessResult})                   -> methods ordered by those scores
    sanity_check(name, model, x, …)                            -> cascading randomisation verdict

Every map is evidence about this model on this image, not proof of what it has learned; the
reviewer's own domain rules decide what ships.
"""

from __future__ import annotations

# Importing a method module registers it (in this order, which is the order methods are listed).
from pellucid.core.attribution import gradcam, gradient, integrated_gradients, occlusion, rise, smoothgrad  # noqa: F401
from pellucid.core.attribution.baselines import Normalization
from pellucid.core.attribution.faithfulness import Curve, FaithfulnessResult, faithfulness, rank_methods
from pellucid.core.attribution.gradcam import conv_like_layers
from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import (
    Context,
    Method,
    UnknownMethodError,
    check_request,
    compute_attribution,
    get_method,
    list_methods,
    method_names,
    register,
)
from pellucid.core.attribution.result import AttributionMap
from pellucid.core.attribution.sanity import SanityResult, SanityStep, sanity_check

__all__ = [
    "AttributionMap",
    "Context",
    "Curve",
    "FaithfulnessResult",
    "Method",
    "Normalization",
    "Param",
    "ParamSchema",
    "SanityResult",
    "SanityStep",
    "UnknownMethodError",
    "check_request",
    "compute_attribution",
    "conv_like_layers",
    "faithfulness",
    "get_method",
    "list_methods",
    "method_names",
    "rank_methods",
    "register",
    "sanity_check",
]
