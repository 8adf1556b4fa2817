"""Integrated Gradients.

Sundararajan, Taly, Yan, "Axiomatic Attribution for Deep Networks", ICML 2017:
IGᵢ = (xᵢ − x′ᵢ) ∫₀¹ ∂F(x′ + α(x − x′))/∂xᵢ dα (Eq. 1), approximated by a Riemann sum over m
steps (Eq. 3, the right rule) or here by default the trapezoid rule, which has the same cost
plus one point and is usually closer. F is the pre-softmax score of the target class.
Completeness (Prop. 1): Σᵢ IGᵢ = F(x) − F(x′); we report the relative error of the sum and warn
above 5% (the paper: 20–300 steps usually get within 5%).
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

from pellucid.core.attribution._common import batches, input_gradient
from pellucid.core.attribution.baselines import BASELINE_KINDS, make_baseline
from pellucid.core.attribution.params import Param, ParamSchema
from pellucid.core.attribution.registry import Context, Method, register
from pellucid.core.attribution.result import MethodOutput
from pellucid.core.progress import CancelToken, ProgressFn, step

COMPLETENESS_WARN = 0.05  # Sundararajan et al. 2017, §"Computing Integrated Gradients"

SCHEMA = ParamSchema((
    Param("baseline", "choice", "black", "reference input: black image (paper's choice for images), zero in "
          "input space, blurred copy, constant grey level, or a tensor the caller supplies",
          choices=BASELINE_KINDS),
    Param("steps", "int", 64, "Riemann steps along the straight path (paper: 20–300 suffice)", min=1, max=4096),
    Param("rule", "choice", "trapezoid", "Riemann rule: 'right' (the paper's Eq. 3) or 'trapezoid'",
          choices=("right", "trapezoid")),
    Param("baseline_value", "float", 0.5, "pixel intensity in [0, 1] for the 'constant' baseline",
          min=0.0, max=1.0),
    Param("blur_sigma", "float", 8.0, "Gaussian sigma in pixels for the 'blur' baseline", min=0.1, max=1000.0),
    Param("batch_size", "int", 16, "path points per forward/backward pass", min=1, max=1024),
))


def path_weights(steps: int, rule: str) -> tuple[torch.Tensor, torch.Tensor]:
    """(alphas, weights) of the quadrature on [0, 1]; Σ weights = 1."""
    if rule == "right":
        alphas = torch.arange(1, steps + 1, dtype=torch.float64) / steps
        weights = torch.full((steps,), 1.0 / steps, dtype=torch.float64)
    else:
        alphas = torch.arange(0, steps + 1, dtype=torch.float64) / steps
        weights = torch.full((steps + 1,), 1.0 / steps, dtype=torch.float64)
        weights[0] = weights[-1] = 0.5 / steps
    return alphas, weights


def _integrated_gradients(
    model: nn.Module, x: torch.Tensor, *, target: int, params: dict[str, Any], context: Context,
    progress: ProgressFn | None, cancel: CancelToken | None,
) -> MethodOutput:
    kind = params["baseline"]
    ref = make_baseline(
        x, kind, normalization=context.normalization, value=params["baseline_value"],
        sigma=params["blur_sigma"], given=context.baseline_input,
    )
    alphas, weights = path_weights(params["steps"], params["rule"])
    n = len(alphas)
    diff = x - ref
    total = torch.zeros_like(x[0], dtype=torch.float64)
    f_x = f_ref = None
    step(0, n, progress=progress, cancel=cancel)
    for start, stop in batches(n, params["batch_size"]):
        a = alphas[start:stop].to(dtype=x.dtype, device=x.device).view(-1, 1, 1, 1)
        grad, score = input_gradient(model, ref + a * diff, target)
        wts = weights[start:stop].to(device=x.device).view(-1, 1, 1, 1)
        total += (grad.to(torch.float64) * wts).sum(dim=0)
        if start == 0 and params["rule"] == "trapezoid":
            f_ref = float(score[0])
        if stop == n:
            f_x = float(score[-1])  # α = 1 is the last point under both rules
        step(stop, n, progress=progress, cancel=cancel)
    extra_forwards = 0
    if f_ref is None:
        with torch.inference_mode():
            f_ref = float(model(ref)[0, target])
        extra_forwards = 1
    attr = (diff[0].to(torch.float64) * total).to(torch.float32)
    delta = f_x - f_ref
    attr_sum = float(attr.to(torch.float64).sum())
    extras: dict[str, Any] = {
        "score_input": f_x, "score_baseline": f_ref, "attribution_sum": attr_sum,
    }
    if abs(delta) < 1e-6 * max(1.0, abs(f_x)):
        extras["completeness_error"] = None
        extras["warning"] = (
            "the baseline scores the same as the image (F(x) − F(baseline) ≈ 0), so the completeness "
            "error cannot be computed and the attributions say little; try another baseline"
        )
    else:
        err = abs(attr_sum - delta) / abs(delta)
        extras["completeness_error"] = err
        if err > COMPLETENESS_WARN:
            extras["warning"] = (
                f"completeness error {err:.1%} exceeds 5%: the attributions do not add up to "
                f"F(x) − F(baseline) = {delta:.4g}; increase 'steps' (now {params['steps']})"
            )
    return MethodOutput(
        map=attr.sum(dim=0).cpu().numpy(), signed=True, raw=attr.cpu().numpy(),
        n_forwards=n + extra_forwards, n_backwards=n, extras=extras,
    )


def _cost(params: dict[str, Any], size: tuple[int, int]) -> float:
    points = params["steps"] + (1 if params["rule"] == "trapezoid" else 0)
    return 3.0 * points + (1.0 if params["rule"] == "right" else 0.0)


register(Method(
    name="integrated_gradients",
    title="Integrated Gradients",
    fn=_integrated_gradients,
    schema=SCHEMA,
    description="Gradients averaged along the straight path from a baseline image to this one, times the "
                "difference; signed, and the attributions add up to the score difference (completeness).",
    reference="Sundararajan, Taly, Yan, Axiomatic Attribution for Deep Networks, ICML 2017",
    signed=True,
    cost=_cost,
))
