"""Integrated Gradients.

Sundararajan, Taly, Yan, "Axiomatic Attribution for Deep Networks", ICML 2017:
IGᵢ = (xᵢ − x′ᵢ) ∫₀¹ ∂F(x′ + α(x − x′))/∂xᵢ dα (Eq. 1), approximated by a Riemann sum over m
steps (Eq. 3, the right rule) or here by default the trapezoid rule, which has the same cost
plus one point and is usually closer. F is the pre-softmax score of the target class.
Completeness (Prop. 1): Σᵢ IGᵢ = F(x) − F(x′); we report the relative error of the sum (the paper:
20–300 steps usually get within 5%).

Steps are raised automatically: when the error exceeds 5% the step count doubles, up to
``max_steps``. Doubling a uniform grid only adds the midpoints of the current one, so every
gradient already taken is reused (the right and trapezoid sums of 2m steps are half those of m
steps plus the new midpoints / 2m). The result reports the steps used; above ``max_steps`` it warns.
"""

from __future__ import annotations

from typing import Any

import torch
from torch import nn

from pellucid.core.attribution._common import batches, input_gradient, logits_of
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
    Param("steps", "int", 32, "Riemann steps along the straight path to start with (paper: 20–300 suffice); "
          "doubled while the completeness error exceeds 5%", min=1, max=4096),
    Param("max_steps", "int", 512, "the most steps the doubling may reach; set it to 'steps' to keep the count "
          "fixed", min=1, max=8192),
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
    steps, cap, rule = params["steps"], max(params["max_steps"], params["steps"]), params["rule"]
    diff = x - ref
    scores: dict[float, float] = {}

    def gradient_sum(alphas: torch.Tensor, done: int, planned: int) -> torch.Tensor:
        """Σ over the path points ``alphas`` of ∂F/∂x (float64, (C, H, W)); records F at 0 and 1."""
        out = torch.zeros_like(x[0], dtype=torch.float64)
        for start, stop in batches(len(alphas), params["batch_size"]):
            step(done + start, planned, progress=progress, cancel=cancel)
            a = alphas[start:stop].to(dtype=x.dtype, device=x.device).view(-1, 1, 1, 1)
            grad, score = input_gradient(model, ref + a * diff, target)
            out += grad.to(torch.float64).sum(dim=0)
            for alpha, value in zip(alphas[start:stop].tolist(), score.tolist()):
                if alpha in (0.0, 1.0):
                    scores[alpha] = float(value)
        return out

    # the first grid: the right rule's points k/m (k = 1…m), the trapezoid's k/m (k = 0…m)
    alphas, weights = path_weights(steps, rule)
    planned = len(alphas)
    integral = torch.zeros_like(x[0], dtype=torch.float64)
    for start, stop in batches(len(alphas), params["batch_size"]):
        step(start, planned, progress=progress, cancel=cancel)
        a = alphas[start:stop].to(dtype=x.dtype, device=x.device).view(-1, 1, 1, 1)
        grad, score = input_gradient(model, ref + a * diff, target)
        integral += (grad.to(torch.float64) * weights[start:stop].view(-1, 1, 1, 1)).sum(dim=0)
        for alpha, value in zip(alphas[start:stop].tolist(), score.tolist()):
            if alpha in (0.0, 1.0):
                scores[alpha] = float(value)
    n_points = planned
    extra_forwards = 0
    if 0.0 not in scores:
        with torch.inference_mode():
            scores[0.0] = float(logits_of(model, ref)[0, target])
        extra_forwards = 1
    f_x, f_ref = scores[1.0], scores[0.0]
    delta = f_x - f_ref
    degenerate = abs(delta) < 1e-6 * max(1.0, abs(f_x))

    def error_of(total: torch.Tensor) -> float:
        return abs(float((diff[0].to(torch.float64) * total).sum()) - delta) / abs(delta)

    history = []
    while not degenerate:
        err = error_of(integral)
        history.append({"steps": steps, "completeness_error": err})
        if err <= COMPLETENESS_WARN or steps * 2 > cap:
            break
        # midpoints of the current grid: (2k − 1)/2m, k = 1…m; both rules then weigh them 1/2m
        mids = (2 * torch.arange(1, steps + 1, dtype=torch.float64) - 1) / (2 * steps)
        integral = integral / 2 + gradient_sum(mids, n_points, n_points + len(mids)) / (2 * steps)
        n_points += len(mids)
        steps *= 2
    step(n_points, n_points, progress=progress, cancel=cancel)

    attr = (diff[0].to(torch.float64) * integral).to(torch.float32)
    attr_sum = float(attr.to(torch.float64).sum())
    extras: dict[str, Any] = {
        "score_input": f_x, "score_baseline": f_ref, "attribution_sum": attr_sum, "steps_used": steps,
        "steps_history": history,
    }
    if degenerate:
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
                f"completeness error {err:.1%} exceeds 5% at {steps} steps (the most allowed, 'max_steps'): the "
                f"attributions do not add up to F(x) − F(baseline) = {delta:.4g}; raise 'max_steps' or try "
                "another baseline"
            )
    return MethodOutput(
        map=attr.sum(dim=0).cpu().numpy(), signed=True, raw=attr.cpu().numpy(),
        n_forwards=n_points + extra_forwards, n_backwards=n_points, extras=extras,
    )


def _cost(params: dict[str, Any], size: tuple[int, int]) -> float:
    """Forward-pass equivalents at the start; doubling can raise it up to ``max_steps`` points."""
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
