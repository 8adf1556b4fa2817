"""One registry for attribution methods: name → function, parameter schema, description.

The CLI, the JSON API and the image page list methods with :func:`list_methods` and run any of
them with :func:`compute_attribution`; adding a method is one module that calls :func:`register`.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, Protocol

import numpy as np
import torch
from torch import nn

from pellucid.core.attribution import _common
from pellucid.core.attribution.baselines import Normalization
from pellucid.core.attribution.params import ParamSchema
from pellucid.core.attribution.result import AttributionMap, MethodOutput
from pellucid.core.errors import BadParameterError, ModelOutputError
from pellucid.core.progress import CancelToken, ProgressFn
from pellucid.core.views.predict import check_finite

__all__ = [
    "Context",
    "Method",
    "UnknownMethodError",
    "check_request",
    "compute_attribution",
    "get_method",
    "list_methods",
    "method_names",
    "register",
]


class UnknownMethodError(BadParameterError, ValueError):
    """An attribution method name that is not registered (a 4xx for the web, a ValueError too)."""


@dataclass(frozen=True)
class Context:
    """What a method needs besides its parameters: how the model's output and input read."""

    output_kind: str = "softmax"  # "softmax" | "sigmoid": how logits become probabilities
    normalization: Normalization | None = None  # the spec's mean/std, for "black" baselines
    baseline_input: torch.Tensor | None = None  # a caller-given reference input (1, C, H, W)


class MethodFn(Protocol):
    def __call__(
        self,
        model: nn.Module,
        x: torch.Tensor,
        *,
        target: int,
        params: dict[str, Any],
        context: Context,
        progress: ProgressFn | None,
        cancel: CancelToken | None,
    ) -> MethodOutput: ...


@dataclass(frozen=True)
class Method:
    """A registered method.

    ``cost(params, (H, W))`` estimates the work in forward-pass equivalents (a backward pass
    counts as two forwards; common practice, no source) so the UI can warn before a long job.
    """

    name: str
    title: str
    fn: MethodFn
    schema: ParamSchema
    description: str
    reference: str
    signed: bool
    cost: Callable[[dict[str, Any], tuple[int, int]], float]
    stochastic: bool = False
    needs_conv_layer: bool = False
    uses_gradients: bool = True
    # check(model, (C, H, W), validated params) raises a PellucidError for a request that cannot
    # work on this model, so the web answers 4xx and the CLI exits 2 before any job starts.
    check: Callable[[nn.Module, tuple[int, int, int], dict[str, Any]], None] | None = None
    needs_hooks: bool = False  # forward hooks on a layer: unavailable on TorchScript modules

    def describe(self) -> dict[str, Any]:
        cost_224 = float(self.cost(self.schema.validate({}), (224, 224)))
        return {
            "name": self.name,
            "title": self.title,
            "description": self.description,
            "reference": self.reference,
            "signed": self.signed,
            "stochastic": self.stochastic,
            "needs_conv_layer": self.needs_conv_layer,
            "uses_gradients": self.uses_gradients,
            "needs_hooks": self.needs_hooks,
            "params": self.schema.describe(),
            "cost_at_defaults_224": cost_224,
        }


_REGISTRY: dict[str, Method] = {}


def register(method: Method) -> Method:
    """Add ``method``; a name registered twice is a programming error (ValueError)."""
    if method.name in _REGISTRY:
        raise ValueError(
            f"attribution method {method.name!r} is already registered; "
            f"registered methods: {', '.join(sorted(_REGISTRY))}"
        )
    if method.stochastic:
        assert "seed" in method.schema.names, f"stochastic method {method.name} needs a seed parameter"
    _REGISTRY[method.name] = method
    return method


def method_names() -> list[str]:
    return list(_REGISTRY)


def get_method(name: str) -> Method:
    try:
        return _REGISTRY[name]
    except (KeyError, TypeError):
        raise UnknownMethodError(
            f"unknown attribution method {name!r}; known methods: {', '.join(_REGISTRY)}"
        ) from None


def check_request(name: str, model: nn.Module, input_shape: tuple[int, int, int],
                  params: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Validate ``params`` for method ``name`` against this model before any work starts.

    ``input_shape`` is the model's (C, H, W). Returns the validated parameters; raises
    BadParameterError, UnsupportedLayerError or UnknownMethodError with one sentence.
    """
    method = get_method(name)
    _check_hooks(method, model)
    checked = method.schema.validate(params, method=method.name)
    if method.check is not None:
        method.check(model, tuple(input_shape), dict(checked))
    return dict(checked)


def _check_hooks(method: Method, model: nn.Module) -> None:
    from pellucid.core.model.loading import hooks_supported

    if method.needs_hooks and not hooks_supported(model):
        raise BadParameterError(f"{method.title} is unavailable for TorchScript: needs forward hooks "
                                "(export the model with torch.export and use kind = \"export\" to see layers)")


def list_methods() -> list[dict[str, Any]]:
    """JSON-able descriptions of every method, in registration order."""
    return [m.describe() for m in _REGISTRY.values()]


def compute_attribution(
    method: str,
    model: nn.Module,
    x: torch.Tensor,
    *,
    target: int | None = None,
    params: Mapping[str, Any] | None = None,
    output_kind: str = "softmax",
    normalization: Normalization | None = None,
    baseline_input: torch.Tensor | None = None,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> AttributionMap:
    """Run the registered ``method`` on one prepared image.

    ``model`` maps (N, C, H, W) float tensors to (N, K) logits; ``x`` is (1, C, H, W).
    ``target`` is the class index to explain (default: the model's top-1 class).
    ``params`` are validated against the method's schema (strings are accepted, so CLI
    ``k=v`` pairs can be passed as they are). ``output_kind`` says how the logits become
    probabilities for the methods that score probabilities (RISE, occlusion).
    ``normalization`` is the spec's mean/std, needed for "black" or "constant" baselines.
    The model's eval/train flags are restored afterwards; its weights are not modified.
    """
    spec = get_method(method)
    _check_hooks(spec, model)
    x = _common.match_dtype(model, _common.check_input(x))
    output_kind = _common.check_output_kind(output_kind)
    checked = spec.schema.validate(params, method=spec.name)
    context = Context(output_kind=output_kind, normalization=normalization, baseline_input=baseline_input)
    start = time.perf_counter()
    with _common.evaluating(model):
        with torch.inference_mode():
            logits = _common.logits_of(model, x)
        check_finite(logits)  # the CLI's refusal, for every caller: no silent all-zero map
        index, source = _common.resolve_target(logits, target)
        # Tensors the method creates must be usable by autograd even if the caller is inside
        # torch.inference_mode().
        with torch.inference_mode(False):
            out = spec.fn(model, x, target=index, params=dict(checked), context=context,
                          progress=progress, cancel=cancel)
    seconds = time.perf_counter() - start
    amap = out.map
    h, w = x.shape[-2:]
    assert amap.shape == (h, w), f"{spec.name} returned a {amap.shape} map for a {(h, w)} input"
    if not np.isfinite(amap).all():
        raise ModelOutputError(
            f"the {spec.title} map holds NaN or infinite values: the model returned NaN or infinite scores for "
            "some of the inputs the method feeds it; check its weights and the preprocessing in the spec (mean/std)"
        )
    checked.update(out.resolved)
    return AttributionMap(
        map=amap.astype("float32", copy=False),
        signed=out.signed,
        method=spec.name,
        target=index,
        target_source=source,
        params=checked,
        seconds=seconds,
        n_forwards=out.n_forwards + 1,  # + the forward that resolved the target
        n_backwards=out.n_backwards,
        raw=out.raw,
        extras=out.extras,
    )
