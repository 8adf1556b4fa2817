"""The model-randomisation sanity check for attribution methods.

Adebayo, Gilmer, Muelly, Goodfellow, Hardt, Kim, "Sanity Checks for Saliency Maps", NeurIPS
2018, §3.1 (cascading randomisation): re-initialise the weights layer by layer from the top (the
logits layer) down, recompute the map after each step and compare it with the trained model's
map. A method whose map barely changes while the model is destroyed cannot be explaining what
the model learned. Similarity, as in §2.2: Spearman rank correlation of the absolute maps
(scipy) and SSIM (scikit-image) of the absolute maps scaled to [0, 1] by their maxima.

What the paper does and what we do. The paper steps one layer at a time. A deep network has a
hundred or more layers with parameters (EfficientNet-Lite0: 99), so a map per layer costs a
hundred maps. By default we step one *block* at a time: all parameterised layers of a block are
randomised together, a block being the first numbered module on a layer's path (a residual or
inverted-residual block in a ``Sequential``/``ModuleList``, e.g. ``layer1.0`` or ``_blocks.3``) or
else the layer's parent module; the cascade still runs from the logits to the input.
``granularity="layer"`` steps layer by layer as the paper does. When the steps would not fit in
``time_budget`` seconds (timed on the trained model's map), neighbouring steps are merged until
they do (never fewer than :data:`MIN_STEPS`); the result lists what each step randomised.
Progress counts maps: the trained model's, then one per step.

Randomising a layer means re-initialising it with its own default initialiser
(``reset_parameters``, seeded); a module with parameters but no initialiser gets Gaussian noise
with each tensor's own std. Everything runs on a deep copy: the caller's model is never modified.

Verdict (our threshold): the method *fails* when the map of the fully randomised model still has
Spearman correlation above 0.5 with the original, i.e. it still ranks pixels much as it did for
the trained model. Adebayo et al. (Figs. 2 and 4) show gradients and Grad-CAM falling to near
zero correlation by full randomisation while guided back-propagation stays high; 0.5 sits
between the two and matches the bar the project's issue sets for gradients. A constant
original map gives "inconclusive". Passing is necessary, not sufficient, for trusting a map.
"""

from __future__ import annotations

import copy
import math
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from scipy.stats import spearmanr
from skimage.metrics import structural_similarity
from torch import nn

from pellucid.core.attribution._common import check_input
from pellucid.core.attribution.baselines import Normalization
from pellucid.core.attribution.registry import compute_attribution, get_method
from pellucid.core.errors import BadParameterError
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.probe import execution_order

__all__ = ["DEFAULT_TIME_BUDGET", "FAIL_SPEARMAN", "GRANULARITIES", "MIN_STEPS", "SanityResult", "SanityStep",
           "block_of", "sanity_check", "similarity"]

FAIL_SPEARMAN = 0.5
GRANULARITIES = ("block", "layer")
# Seconds the whole check should take by default (timed on the first map); our own choice.
DEFAULT_TIME_BUDGET = 120.0
# The cascade keeps at least this many steps whatever the budget (top, middle, bottom of the model).
MIN_STEPS = 3


@dataclass
class SanityStep:
    """After randomising ``layers`` (and every layer above them): the map and its similarity."""

    index: int
    layers: list[str]
    spearman: float
    ssim: float | None
    map: np.ndarray  # (H, W) float32
    note: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"index": self.index, "layer": self.layers[-1], "layers": list(self.layers),
                "spearman": self.spearman, "ssim": self.ssim, "note": self.note}


@dataclass
class SanityResult:
    method: str
    target: int
    params: dict[str, Any]
    seed: int
    threshold: float
    verdict: str  # "pass" | "fail" | "inconclusive"
    reason: str
    original: np.ndarray
    steps: list[SanityStep]
    seconds: float
    extras: dict[str, Any] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return self.verdict == "pass"

    def to_dict(self) -> dict[str, Any]:
        return {"method": self.method, "target": self.target, "params": dict(self.params), "seed": self.seed,
                "threshold": self.threshold, "verdict": self.verdict, "reason": self.reason,
                "seconds": self.seconds, "steps": [s.to_dict() for s in self.steps], **self.extras}


def similarity(a: np.ndarray, b: np.ndarray) -> tuple[float, float | None, str | None]:
    """(Spearman of |a| vs |b|, SSIM of |a|/max vs |b|/max, note) for two (H, W) maps.

    A constant map has no ranking: Spearman is reported as 1.0 when both maps are the same
    constant and 0.0 otherwise (scipy would give NaN). SSIM is None for maps under 3 px a side.
    """
    fa, fb = np.abs(a).astype(np.float64), np.abs(b).astype(np.float64)
    note = None
    const_a, const_b = np.ptp(fa) == 0, np.ptp(fb) == 0
    if const_a or const_b:
        rho = 1.0 if (const_a and const_b and np.array_equal(fa, fb)) else 0.0
        note = "a constant map has no pixel ranking; Spearman set to " + ("1" if rho == 1.0 else "0")
    else:
        rho = float(spearmanr(fa.ravel(), fb.ravel()).statistic)
    win = min(7, *fa.shape)
    if win % 2 == 0:
        win -= 1
    if win < 3:
        return rho, None, note
    na = fa / fa.max() if fa.max() > 0 else fa
    nb = fb / fb.max() if fb.max() > 0 else fb
    ssim = float(structural_similarity(na, nb, data_range=1.0, win_size=win))
    return rho, ssim, note


def _layers_in_order(model: nn.Module, x: torch.Tensor) -> list[str]:
    """Names of modules that own parameters, in the order the forward pass runs them."""
    def owns_parameters(_name: str, module: nn.Module, _out: Any) -> bool:
        return any(True for _ in module.parameters(recurse=False))

    return execution_order(model, x, keep=owns_parameters)


def block_of(name: str) -> str:
    """The block a parameterised layer belongs to: its path up to the first numbered part
    (``layer1.0.conv1`` → ``layer1.0``, ``_blocks.3._bn1`` → ``_blocks.3``, ``features.4.0`` →
    ``features.4``), else its parent module (``features.block1.conv`` → ``features.block1``), else
    itself (``fc``)."""
    parts = name.split(".")
    for i, part in enumerate(parts):
        if part.isdigit():
            return ".".join(parts[: i + 1])
    return ".".join(parts[:-1]) if len(parts) > 1 else name


def _steps(layers: list[str], granularity: str) -> list[list[str]]:
    """Layers (top first) grouped into cascade steps: one per layer, or one per run of a block."""
    if granularity == "layer":
        return [[name] for name in layers]
    groups: list[list[str]] = []
    for name in layers:
        if groups and block_of(groups[-1][-1]) == block_of(name):
            groups[-1].append(name)
        else:
            groups.append([name])
    return groups


def _merge(groups: list[list[str]], n: int) -> list[list[str]]:
    """``groups`` merged into ``n`` runs of neighbours, as even in count as possible."""
    if n >= len(groups):
        return groups
    return [[name for i in part.tolist() for name in groups[i]] for part in np.array_split(np.arange(len(groups)), n)]


def _randomise(module: nn.Module, seed: int) -> None:
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(seed)
        with torch.no_grad():
            reset = getattr(module, "reset_parameters", None)
            if callable(reset):
                reset()
            else:
                for p in module.parameters(recurse=False):
                    std = float(p.std()) if p.numel() > 1 else 0.0
                    p.normal_(0.0, std if std > 0 else 0.01)


def sanity_check(
    method: str,
    model: nn.Module,
    x: torch.Tensor,
    *,
    target: int | None = None,
    params: Mapping[str, Any] | None = None,
    seed: int = 0,
    granularity: str = "block",
    time_budget: float | None = DEFAULT_TIME_BUDGET,
    max_steps: int | None = None,
    output_kind: str = "softmax",
    normalization: Normalization | None = None,
    baseline_input: torch.Tensor | None = None,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> SanityResult:
    """Cascading randomisation of a copy of ``model`` (logits (N, K) for (N, C, H, W) inputs).

    ``x`` is (1, C, H, W); ``target`` defaults to the trained model's top-1 class and stays
    fixed for every step; ``params`` go to the method (validated once; automatic choices such
    as Grad-CAM's layer are frozen after the first map). ``seed`` drives the re-initialisation.
    ``granularity``: ``"block"`` (default) or ``"layer"`` steps; ``time_budget`` (seconds, None for
    no limit) and ``max_steps`` merge neighbouring steps (see the module docstring).
    ``progress(done, total)`` counts maps.
    """
    get_method(method)
    x = check_input(x)
    if isinstance(seed, bool) or not isinstance(seed, int) or not 0 <= seed < 2**32:
        raise BadParameterError(f"seed must be an integer from 0 to 2**32 - 1; received {seed!r}")
    if max_steps is not None and (isinstance(max_steps, bool) or not isinstance(max_steps, int) or max_steps < 1):
        raise BadParameterError(f"max_steps must be an integer >= 1 or None; received {max_steps!r}")
    if granularity not in GRANULARITIES:
        raise BadParameterError(f"granularity must be one of {GRANULARITIES}; received {granularity!r}")
    if time_budget is not None and (isinstance(time_budget, bool) or not isinstance(time_budget, (int, float))
                                    or not math.isfinite(time_budget) or time_budget <= 0):
        raise BadParameterError(f"time_budget must be a positive number of seconds or None; received {time_budget!r}")
    t0 = time.perf_counter()
    work = copy.deepcopy(model)
    work.eval()
    layers = list(reversed(_layers_in_order(work, x)))
    if not layers:
        raise BadParameterError("the model has no layers with parameters to randomise")
    groups = _steps(layers, granularity)
    planned = len(groups)
    if max_steps is not None:
        groups = _merge(groups, max_steps)
    kw: dict[str, Any] = {"output_kind": output_kind, "normalization": normalization,
                          "baseline_input": baseline_input, "cancel": cancel}

    step(0, len(groups) + 1, progress=progress, cancel=cancel)
    t_map = time.perf_counter()
    first = compute_attribution(method, work, x, target=target, params=params, **kw)
    t_map = time.perf_counter() - t_map
    if time_budget is not None:
        # each later map costs about what the first did; keep the whole check within the budget
        affordable = max(MIN_STEPS, int((time_budget - (time.perf_counter() - t0)) // max(t_map, 1e-9)))
        groups = _merge(groups, affordable)
    total = len(groups) + 1
    step(1, total, progress=progress, cancel=cancel)
    fixed = dict(first.params)
    original = first.map
    modules = dict(work.named_modules())
    steps: list[SanityStep] = []
    done_layers: list[str] = []
    for k, group in enumerate(groups, start=1):
        for name in group:
            _randomise(modules[name], seed + len(done_layers))
            done_layers.append(name)
        amap = compute_attribution(method, work, x, target=first.target, params=fixed, **kw)
        rho, ssim, note = similarity(original, amap.map)
        steps.append(SanityStep(k, list(group), rho, ssim, amap.map, note))
        step(k + 1, total, progress=progress, cancel=cancel)

    final = steps[-1].spearman
    if np.ptp(original) == 0:
        verdict, reason = "inconclusive", "the trained model's map is constant, so there is nothing to compare"
    elif final > FAIL_SPEARMAN:
        verdict = "fail"
        reason = (f"with every layer randomised the map still has Spearman {final:.2f} > {FAIL_SPEARMAN} with "
                  "the trained model's map: it barely depends on the learned weights")
    else:
        verdict = "pass"
        reason = (f"with every layer randomised the map's Spearman correlation with the trained model's map falls "
                  f"to {final:.2f} (threshold {FAIL_SPEARMAN}): it depends on the learned weights")
    if not math.isfinite(final):  # pragma: no cover - similarity never returns NaN
        verdict, reason = "inconclusive", "the similarity could not be computed"
    return SanityResult(
        method=first.method, target=first.target, params=fixed, seed=seed, threshold=FAIL_SPEARMAN,
        verdict=verdict, reason=reason, original=original, steps=steps, seconds=time.perf_counter() - t0,
        extras={"layers_randomised": len(layers), "granularity": granularity, "planned_steps": planned,
                "n_steps": len(steps), "first_map_seconds": t_map, "time_budget": time_budget,
                "merged": len(steps) < planned},
    )
