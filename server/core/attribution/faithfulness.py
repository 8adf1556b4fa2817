"""Deletion and insertion curves: does the map point at what the model actually uses?

Petsiuk, Das, Saenko, RISE, BMVC 2018 (arXiv:1806.07421), §4: change pixels in the order the map
ranks them and follow the target class probability. Deletion starts from the image and replaces
pixels with a canvas (zero in the model's input space, i.e. the mean colour after
normalisation, or a tensor the caller gives); a faithful map makes the probability fall fast,
so a lower area under the curve is better. Insertion starts from a blurred copy and puts the
image's pixels back; a faithful map makes the probability rise fast, so a higher area is better.

Our choices (documented, not from the paper): 1% of the pixels per step (101 points, as later
work does, e.g. Score-CAM §4), the blur sigma 8 px, pixels ordered by the map's value (the most
positive first; pass ``abs(map)`` to rank by magnitude), ties broken by a seeded random order
so a flat map is not read top-left first. The x axis is the fraction of pixels changed, in
[0, 1]; the AUC is the trapezoid rule.

Pixels change in square blocks (``block`` px, default about 1/12 of the shorter side) ranked by
the map's mean over each block. Changing single pixels scatters a speckle that no training image
had; a model can react to that speckle itself (the demo model reads grey dots as glaze blisters),
so a random map would "win" by destroying the image rather than the evidence. ``block=1`` gives
the paper's per-pixel curves.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from scipy.stats import rankdata
from torch import nn

from pellucid.core.attribution._common import (
    batches,
    check_input,
    check_output_kind,
    evaluating,
    logits_of,
    match_dtype,
    probabilities,
    resolve_target,
)
from pellucid.core.attribution.baselines import blurred
from pellucid.core.errors import BadParameterError
from pellucid.core.progress import CancelToken, ProgressFn, step

__all__ = ["Curve", "FaithfulnessResult", "faithfulness", "rank_methods"]

KINDS = ("deletion", "insertion")


@dataclass
class Curve:
    """``fractions`` (S+1,) in [0, 1] and the target probability ``scores`` (S+1,) at each."""

    kind: str
    fractions: np.ndarray
    scores: np.ndarray
    auc: float

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "auc": self.auc, "fractions": self.fractions.tolist(),
                "scores": self.scores.tolist()}


@dataclass
class FaithfulnessResult:
    target: int
    curves: dict[str, Curve]
    params: dict[str, Any]
    seconds: float
    n_forwards: int
    extras: dict[str, Any] = field(default_factory=dict)

    @property
    def deletion_auc(self) -> float | None:
        c = self.curves.get("deletion")
        return c.auc if c else None

    @property
    def insertion_auc(self) -> float | None:
        c = self.curves.get("insertion")
        return c.auc if c else None

    def to_dict(self) -> dict[str, Any]:
        return {"target": self.target, "params": dict(self.params), "seconds": self.seconds,
                "n_forwards": self.n_forwards, "deletion_auc": self.deletion_auc,
                "insertion_auc": self.insertion_auc,
                "curves": {k: c.to_dict() for k, c in self.curves.items()}}


def _check_map(saliency: Any, size: tuple[int, int]) -> np.ndarray:
    arr = np.asarray(saliency, dtype=np.float64)
    if arr.shape != size:
        raise BadParameterError(
            f"the attribution map must be (H, W) = {size}, the input's size; received shape {arr.shape}"
        )
    if not np.isfinite(arr).all():
        raise BadParameterError("the attribution map contains NaN or infinite values")
    return arr


def _block_means(sal: np.ndarray, block: int) -> np.ndarray:
    """Replace each block×block cell of the map by its mean (edge cells may be smaller)."""
    if block == 1:
        return sal
    h, w = sal.shape
    rows, cols = -(-h // block), -(-w // block)
    padded = np.full((rows * block, cols * block), np.nan)
    padded[:h, :w] = sal
    means = np.nanmean(padded.reshape(rows, block, cols, block), axis=(1, 3))
    return np.repeat(np.repeat(means, block, axis=0), block, axis=1)[:h, :w]


def pixel_order(saliency: np.ndarray, *, seed: int) -> np.ndarray:
    """Flat pixel indices, most important first; ties in random order fixed by ``seed``."""
    flat = saliency.ravel()
    perm = np.random.default_rng(seed).permutation(flat.size)
    return perm[np.argsort(-flat[perm], kind="stable")]


def faithfulness(
    model: nn.Module,
    x: torch.Tensor,
    saliency: Any,
    *,
    target: int | None = None,
    kinds: tuple[str, ...] = KINDS,
    step_fraction: float = 0.01,
    deletion_canvas: torch.Tensor | None = None,
    blur_sigma: float = 8.0,
    output_kind: str = "softmax",
    batch_size: int = 32,
    seed: int = 0,
    block: int | None = None,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> FaithfulnessResult:
    """Deletion and/or insertion curves of ``saliency`` (H, W) for ``model`` at ``x`` (1, C, H, W).

    ``target`` defaults to the top-1 class of ``x``; pass the attribution map's own target.
    ``deletion_canvas`` is a (1, C, H, W) tensor (default zeros in input space).
    ``block`` is the side of the square pixel blocks that change together (None: about
    min(H, W) / 12; 1: single pixels as in the paper).
    """
    x = match_dtype(model, check_input(x))
    h, w = x.shape[-2:]
    sal = _check_map(saliency, (h, w))
    output_kind = check_output_kind(output_kind)
    bad = [k for k in kinds if k not in KINDS]
    if bad or not kinds:
        raise BadParameterError(f"kinds must be chosen from {', '.join(KINDS)}; received {kinds!r}")
    if not (isinstance(step_fraction, (int, float)) and math.isfinite(step_fraction)
            and 0 < step_fraction <= 0.5):
        raise BadParameterError(f"step_fraction must be in (0, 0.5]; received {step_fraction!r}")
    if not (isinstance(blur_sigma, (int, float)) and math.isfinite(blur_sigma) and blur_sigma > 0):
        raise BadParameterError(f"blur_sigma must be a positive number of pixels; received {blur_sigma!r}")
    if isinstance(batch_size, bool) or not isinstance(batch_size, int) or batch_size < 1:
        raise BadParameterError(f"batch_size must be an integer >= 1; received {batch_size!r}")
    if block is None:
        block = max(1, round(min(h, w) / 12))
    if isinstance(block, bool) or not isinstance(block, int) or not 1 <= block <= min(h, w):
        raise BadParameterError(f"block must be an integer from 1 to {min(h, w)} px; received {block!r}")
    sal = _block_means(sal, block)
    if deletion_canvas is None:
        canvas = torch.zeros_like(x)
    elif isinstance(deletion_canvas, torch.Tensor) and tuple(deletion_canvas.shape) == tuple(x.shape):
        canvas = deletion_canvas.detach().to(dtype=x.dtype, device=x.device)
    else:
        got = (tuple(deletion_canvas.shape) if isinstance(deletion_canvas, torch.Tensor)
               else type(deletion_canvas).__name__)
        raise BadParameterError(f"deletion_canvas must be a tensor of the input's shape {tuple(x.shape)}; "
                                f"received {got}")

    n = h * w
    per_step = max(1, math.ceil(n * step_fraction))
    counts = np.minimum(np.arange(0, math.ceil(n / per_step) + 1) * per_step, n)
    rank = np.empty(n, dtype=np.int64)
    rank[pixel_order(sal, seed=seed)] = np.arange(n)
    rank_t = torch.from_numpy(rank.reshape(h, w)).to(x.device)

    start_t = time.perf_counter()
    curves: dict[str, Curve] = {}
    total_points = len(counts) * len(kinds)
    done = 0
    with evaluating(model), torch.inference_mode():
        index, _ = resolve_target(logits_of(model, x), target)
        for kind in kinds:
            # begin → end: pixels switch from `begin` to `end` in the map's order.
            begin, end = (x, canvas) if kind == "deletion" else (blurred(x, float(blur_sigma)), x)
            scores = np.empty(len(counts))
            for a, b in batches(len(counts), batch_size):
                c = torch.from_numpy(counts[a:b]).to(x.device).view(-1, 1, 1, 1)
                switched = rank_t.view(1, 1, h, w) < c  # (B, 1, H, W)
                imgs = torch.where(switched, end, begin)
                scores[a:b] = probabilities(logits_of(model, imgs), output_kind)[:, index].double().cpu().numpy()
                done += b - a
                step(done, total_points, progress=progress, cancel=cancel)
            fractions = counts / n
            curves[kind] = Curve(kind, fractions, scores, float(np.trapezoid(scores, fractions)))
    params = {"step_fraction": float(step_fraction), "blur_sigma": float(blur_sigma), "seed": int(seed),
              "block": int(block),
              "output_kind": output_kind, "deletion_canvas": "zero" if deletion_canvas is None else "given",
              "kinds": list(kinds)}
    return FaithfulnessResult(target=index, curves=curves, params=params,
                              seconds=time.perf_counter() - start_t, n_forwards=total_points + 1)


def rank_methods(
    results: Mapping[str, FaithfulnessResult | Mapping[str, float]]
) -> list[dict[str, Any]]:
    """Methods ordered best first by their deletion AUC (lower better) and insertion AUC (higher better).

    Each AUC gives a rank (1 = best, ties share the better rank); the combined order sorts by
    the sum of the two ranks, then by insertion AUC − deletion AUC. ``results`` maps a method
    name to its :class:`FaithfulnessResult` (or a mapping with ``deletion_auc`` and
    ``insertion_auc``), all for the same image and target.
    """
    if not results:
        return []
    rows = []
    targets = set()
    for name, r in results.items():
        if isinstance(r, FaithfulnessResult):
            d, i = r.deletion_auc, r.insertion_auc
            targets.add(r.target)
        else:
            d, i = r.get("deletion_auc"), r.get("insertion_auc")
        if d is None or i is None:
            raise BadParameterError(f"method {name!r} needs both a deletion and an insertion AUC to be ranked")
        rows.append({"method": name, "deletion_auc": float(d), "insertion_auc": float(i)})
    if len(targets) > 1:
        raise BadParameterError(
            f"the results explain different classes ({sorted(targets)}); rank maps of one image and one target"
        )
    d_rank = rankdata([r["deletion_auc"] for r in rows], method="min")
    i_rank = rankdata([-r["insertion_auc"] for r in rows], method="min")
    for r, dr, ir in zip(rows, d_rank, i_rank):
        r["deletion_rank"], r["insertion_rank"] = int(dr), int(ir)
    rows.sort(key=lambda r: (r["deletion_rank"] + r["insertion_rank"], -(r["insertion_auc"] - r["deletion_auc"])))
    for pos, r in enumerate(rows, start=1):
        r["combined_rank"] = pos
    return rows
