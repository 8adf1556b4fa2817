"""Occlusion sensitivity: how much the target probability drops when a square of the input is hidden.

Method: Zeiler & Fergus, "Visualizing and Understanding Convolutional Networks", ECCV 2014, §4.2 —
slide a grey square over the image and record the probability of the class of interest at each
position. The paper fixes no patch size, stride or grey value; Pellucid's defaults (patch 16,
stride 8, baseline = the image's own per-channel mean) are our own choice.

Positions. The stride may not exceed the patch (every pixel must be occluded at least once).
Along each axis the patch's top-left corner takes the values 0, stride, 2·stride, …
up to ``size − patch``, plus one last position flush with the far border when ``(size − patch)``
is not a multiple of the stride, so every pixel is covered by at least one position.

Aggregation. ``grid[i, j]`` is the drop ``p(x) − p(x occluded at position (i, j))``. The map at
input resolution, ``drop[y, x]``, is the mean of ``grid`` over all positions whose patch covers
pixel (y, x). Positive values mean hiding that area lowers the target's probability (the model
relies on it); negative values mean hiding it raises the probability.

Engines (all exact except ``approximate``):

- ``naive``: one forward per position, as a first hand-written loop would do; kept for the
  benchmarks and as a reference.
- ``batched``: occluded copies built with tensor ops and run in batches under ``inference_mode``.
- ``incremental``: keeps every layer's output for the clean image and recomputes only the region
  each patch can reach (see :mod:`pellucid.core.occlusion.incremental`).
- ``approximate``: a coarse pass, then adaptive drill-down where the map changes or ranks high
  (see :mod:`pellucid.core.occlusion.approximate`); its result says so (``engine ==
  "approximate"``, ``evaluated`` marks the positions really run, ``details["sampled_error"]`` its
  error measured on a sample of the positions it interpolated).

``method="auto"`` checks the incremental engine against brute force on grid positions (corners and
centre), times one batch of each engine on this grid and lets the faster one evaluate the rest
(no timing when the estimated saving is :data:`NO_RACE_ABOVE` or more); every position run while
choosing is kept. The result records which engine ran and the measured times.
A heatmap is evidence about this model on this image, not proof of what it has learned.
"""

from __future__ import annotations

import math
import numbers
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import nn

from pellucid.core.errors import BadParameterError, UnsupportedLayerError
from pellucid.core.occlusion.positions import BASELINES, _as_count, _occluded_batch, make_baseline, occlusion_positions
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.predict import model_logits

__all__ = [
    "BASELINES",
    "MAX_POSITIONS",
    "METHODS",
    "OUTPUTS",
    "OcclusionResult",
    "compare_to_exact",
    "make_baseline",
    "occlusion_map",
    "occlusion_positions",
]

MAX_POSITIONS = 65_536
OUTPUTS = ("softmax", "sigmoid", "logit")
METHODS = ("auto", "batched", "incremental", "naive", "approximate")

# Default batch for the batched engine when the caller gives none: 16 images at 224×224 (more
# pixels per image, fewer images). On the 2-core bench machine larger batches stopped paying once
# a batch's activations left the cache; see BENCHMARKS.md.
_DEFAULT_BATCH_PIXELS = 16 * 224 * 224
# On grids too small to race (fewer than three incremental batches), method="auto" takes the
# incremental engine when its estimated MAC saving is at least this.
WORTHWHILE_SPEEDUP_SMALL_GRID = 1.5
# Grid positions on which method="auto" checks the incremental engine against brute force (the
# four corners and the centre: border handling and the interior); "incremental" checks three.
CHECK_POSITIONS = 5
# method="auto" takes the incremental engine without timing it when its estimated MAC saving is at
# least this: windowing overheads measured on the bench models never ate a saving that large.
NO_RACE_ABOVE = 3.0


@dataclass
class OcclusionResult:
    """An occlusion sensitivity map and everything that produced it.

    ``drop``: (H, W) float32 at input resolution, mean of ``grid`` over covering positions.
    ``grid``: (rows, cols) float32, the drop at each position (interpolated where
    ``evaluated`` is False, which only happens for ``engine == "approximate"``).
    ``tops`` / ``lefts``: (rows,) / (cols,) int, the patch's top-left corner per position.
    ``top_class``: (rows, cols) int, the most probable class under each occlusion (−1 where not
    evaluated).
    """

    drop: np.ndarray
    grid: np.ndarray
    tops: np.ndarray
    lefts: np.ndarray
    top_class: np.ndarray
    evaluated: np.ndarray
    base_score: float
    target: int
    patch: int
    stride: int
    baseline: str
    output: str
    engine: str
    method: str
    batch_size: int
    seconds: float
    n_forwards: int
    input_shape: tuple[int, ...]
    approximate: bool = False
    details: dict[str, Any] = field(default_factory=dict)

    @property
    def n_positions(self) -> int:
        return int(self.grid.size)

    def parameters(self) -> dict[str, Any]:
        """The settings that produced this map, for result JSON and reports."""
        return {
            "method": self.method,
            "engine": self.engine,
            "approximate": self.approximate,
            "target": self.target,
            "patch": self.patch,
            "stride": self.stride,
            "baseline": self.baseline,
            "output": self.output,
            "batch_size": self.batch_size,
            "n_positions": self.n_positions,
            "n_forwards": self.n_forwards,
            "seconds": self.seconds,
            "base_score": self.base_score,
            **self.details,
        }

    def __repr__(self) -> str:
        return (
            f"OcclusionResult(engine={self.engine!r}, target={self.target}, patch={self.patch}, "
            f"stride={self.stride}, grid={self.grid.shape}, base_score={self.base_score:.4f}, "
            f"seconds={self.seconds:.3f})"
        )


# ---------------------------------------------------------------------------------------------
# validation


def _check_input(x: Any) -> torch.Tensor:
    if not isinstance(x, torch.Tensor):
        raise BadParameterError(f"x must be a torch.Tensor of shape (1, C, H, W); received {type(x).__name__}.")
    if x.ndim != 4 or x.shape[0] != 1:
        raise BadParameterError(
            f"x must have shape (1, C, H, W) (one preprocessed image); received shape {tuple(x.shape)}."
        )
    if not x.is_floating_point():
        raise BadParameterError(f"x must be a floating-point tensor; received dtype {x.dtype}.")
    if not bool(torch.isfinite(x).all()):
        raise BadParameterError("x contains NaN or infinite values; check the preprocessing.")
    return x


# ---------------------------------------------------------------------------------------------
# scoring and occluded batches


def _scores(logits: torch.Tensor, target: int, output: str) -> torch.Tensor:
    """Target score per row of (B, K) logits."""
    if output == "softmax":
        return torch.softmax(logits.double(), dim=1)[:, target]
    if output == "sigmoid":
        return torch.sigmoid(logits[:, target].double())
    return logits[:, target].double()


Evaluator = Callable[[torch.Tensor, torch.Tensor], torch.Tensor]


def _row_batches(rows: int, cols: int, batch_size: int, skip: set[int]) -> list[np.ndarray]:
    """Flat position indices in batches of whole rows (``batch_size // cols`` rows each, at least one,
    or pieces of one row when a row alone exceeds the batch), leaving out ``skip``. Whole rows keep
    the incremental engine's row windows tight; the batched engine does not care."""
    out: list[np.ndarray] = []
    per = max(1, batch_size // cols)
    for r0 in range(0, rows, per):
        idx = np.arange(r0 * cols, min(rows, r0 + per) * cols)
        if skip:
            idx = idx[~np.isin(idx, list(skip))]
        for start in range(0, len(idx), max(batch_size, 1)):
            if len(idx[start : start + batch_size]):
                out.append(idx[start : start + batch_size])
    return out


def _run_positions(
    evaluate: Evaluator,
    ty: torch.Tensor,
    tx: torch.Tensor,
    batches: list[np.ndarray],
    known: dict[int, torch.Tensor],
    *,
    total: int,
    progress: ProgressFn | None,
    cancel: CancelToken | None,
) -> torch.Tensor:
    """(N, K) logits for every flat position: ``known`` rows as given, the rest evaluated in ``batches``,
    reporting progress between them."""
    rows: dict[int, torch.Tensor] = dict(known)
    done = len(known)
    for idx in batches:
        step(done, total, progress=progress, cancel=cancel)
        sel = torch.as_tensor(idx)
        logits = evaluate(ty[sel], tx[sel])
        for i, row in zip(idx.tolist(), logits):
            rows[i] = row
        done += len(idx)
    step(total, total, progress=progress, cancel=cancel)
    return torch.stack([rows[i] for i in range(total)]) if total else torch.empty(0)


def _aggregate(grid: np.ndarray, tops: np.ndarray, lefts: np.ndarray, patch: int, h: int, w: int) -> np.ndarray:
    """Mean of grid over every position whose patch covers each pixel: (H, W) float32."""
    ys = np.arange(h)
    xs = np.arange(w)
    rcover = ((ys[None, :] >= tops[:, None]) & (ys[None, :] < tops[:, None] + patch)).astype(np.float64)
    ccover = ((xs[None, :] >= lefts[:, None]) & (xs[None, :] < lefts[:, None] + patch)).astype(np.float64)
    total = rcover.T @ grid.astype(np.float64) @ ccover
    count = np.outer(rcover.sum(0), ccover.sum(0))
    return (total / count).astype(np.float32)


def _default_batch(x: torch.Tensor, n_positions: int) -> int:
    _, _, h, w = x.shape
    return int(max(1, min(n_positions, _DEFAULT_BATCH_PIXELS // (h * w))))


# ---------------------------------------------------------------------------------------------
# public entry point


def occlusion_map(
    model: nn.Module,
    x: torch.Tensor,
    *,
    target: int | None = None,
    patch: int = 16,
    stride: int = 8,
    baseline: str | float | torch.Tensor = "mean",
    output: str = "softmax",
    batch_size: int | None = None,
    method: str = "auto",
    refine_tolerance: float = 0.3,
    drill_down: float = 0.15,
    check_sample: int = 12,
    field_threshold: float = 1.0,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> OcclusionResult:
    """Occlusion sensitivity of ``model`` at ``x`` for class ``target``.

    ``model``: returns logits (N, K) for input (N, C, H, W). ``x``: (1, C, H, W), already
    preprocessed. ``target``: class index, default the top-1 class of the unoccluded input.
    ``patch`` / ``stride``: square patch side and step in pixels. ``baseline``: see
    :func:`make_baseline`. ``output``: ``"softmax"`` or ``"sigmoid"`` probabilities, or
    ``"logit"`` (the raw score). ``method``: one of :data:`METHODS`. ``refine_tolerance``: for
    ``method="approximate"`` only, a share of the coarse map's range (max − min drop): a cell
    whose corner drops differ by more than that is evaluated at full resolution; 0 refines
    every cell whose corners differ at all. ``drill_down`` (approximate only): the share of the
    grid, ranked by the coarse map's drop, whose cells are also evaluated at full resolution.
    ``check_sample`` (approximate only): how many of the positions it would otherwise
    interpolate are evaluated exactly to measure its error (``details["sampled_error"]``).
    ``field_threshold`` (approximate only, incremental engine only): below 1, each layer's changed
    region is cut to that share of the map's side (projective-field thresholding, Nakandala et al.,
    SIGMOD 2019), so positions are cheaper but no longer exact; 1 keeps them exact.

    Returns an :class:`OcclusionResult`; ``drop`` is (H, W) float32.
    """
    x = _check_input(x)
    _, _, h, w = x.shape
    patch = _as_count(patch, "patch")
    stride = _as_count(stride, "stride")
    if patch > min(h, w):
        raise BadParameterError(
            f"patch must fit inside the {h}×{w} image (at most {min(h, w)} px); received {patch}."
        )
    if stride > patch:
        raise BadParameterError(
            f"stride must not exceed the patch ({patch} px), or some pixels are never occluded; received {stride}."
        )
    if output not in OUTPUTS:
        raise BadParameterError(f"output must be one of {OUTPUTS}; received {output!r}.")
    if method not in METHODS:
        raise BadParameterError(f"method must be one of {METHODS}; received {method!r}.")
    tops = occlusion_positions(h, patch, stride)
    lefts = occlusion_positions(w, patch, stride)
    n_pos = len(tops) * len(lefts)
    if n_pos > MAX_POSITIONS:
        raise BadParameterError(
            f"patch {patch} with stride {stride} on a {h}×{w} image gives {n_pos:,} positions, more than the "
            f"limit of {MAX_POSITIONS:,}; use a larger stride."
        )
    if batch_size is not None:
        batch_size = _as_count(batch_size, "batch_size")
    if isinstance(refine_tolerance, bool) or not isinstance(refine_tolerance, numbers.Real) or not (
        math.isfinite(float(refine_tolerance)) and float(refine_tolerance) >= 0
    ):
        raise BadParameterError(f"refine_tolerance must be a finite number ≥ 0; received {refine_tolerance!r}.")
    if isinstance(drill_down, bool) or not isinstance(drill_down, numbers.Real) or not 0.0 <= float(drill_down) <= 1.0:
        raise BadParameterError(f"drill_down must be a share between 0 and 1; received {drill_down!r}.")
    if isinstance(check_sample, bool) or not isinstance(check_sample, numbers.Integral) or int(check_sample) < 0:
        raise BadParameterError(f"check_sample must be a whole number ≥ 0; received {check_sample!r}.")
    if isinstance(field_threshold, bool) or not isinstance(field_threshold, numbers.Real) or not (
        0.0 < float(field_threshold) <= 1.0
    ):
        raise BadParameterError(f"field_threshold must be a share in (0, 1]; received {field_threshold!r}.")
    if float(field_threshold) < 1.0 and method != "approximate":
        raise BadParameterError("field_threshold below 1 makes occlusion approximate; use it with "
                                "method='approximate'.")
    base, base_desc = make_baseline(x, baseline, patch=patch)

    model.eval()
    t0 = time.perf_counter()
    with torch.inference_mode():
        logits0 = model_logits(model, x)
        k = logits0.shape[1]
        if target is None:
            target = int(logits0[0].argmax())
        else:
            if isinstance(target, bool) or not isinstance(target, numbers.Integral):
                raise BadParameterError(f"target must be a class index (int); received {target!r}.")
            target = int(target)
            if not 0 <= target < k:
                raise BadParameterError(
                    f"target must be a class index in 0…{k - 1} (the model has {k} classes); received {target}."
                )
        base_score = float(_scores(logits0, target, output)[0])

        ty = torch.as_tensor(tops).repeat_interleave(len(lefts))
        tx = torch.as_tensor(lefts).repeat(len(tops))
        choice = _choose_engine(model, x, base, patch, "auto" if method == "approximate" else method, batch_size,
                                (len(tops), len(lefts)), ty, tx, cancel=cancel)
        engine, bs, details = choice.name, choice.batch_size, dict(choice.details)
        if method == "approximate":
            from pellucid.core.occlusion.approximate import approximate_grid

            evaluate = choice.evaluate
            if float(field_threshold) < 1.0 and choice.incremental is not None and choice.name == "incremental":
                inc, tau = choice.incremental, float(field_threshold)

                def evaluate(ty_: torch.Tensor, tx_: torch.Tensor) -> torch.Tensor:
                    return inc.logits(ty_, tx_, field_threshold=tau)

            approx = approximate_grid(
                evaluate, tops, lefts, known=choice.known,
                score=lambda lg: _scores(lg, target, output), base_score=base_score, batch_size=bs,
                tolerance=float(refine_tolerance), drill_down=float(drill_down), check_sample=int(check_sample),
                progress=progress, cancel=cancel,
            )
            grid = approx.grid.astype(np.float32)
            top_class = approx.top_class
            evaluated = approx.evaluated
            details = {**details, "exact_engine": engine, "refine_tolerance": float(refine_tolerance),
                       "drill_down": float(drill_down), "evaluated_fraction": float(evaluated.mean()),
                       "field_threshold": float(field_threshold) if evaluate is not choice.evaluate else 1.0,
                       "sampled_error": approx.sampled_error}
            engine = "approximate"
            n_forwards = approx.n_evaluated + 1
        else:
            batches = _row_batches(len(tops), len(lefts), bs, set(choice.known))
            logits = _run_positions(choice.evaluate, ty, tx, batches, choice.known, total=n_pos,
                                    progress=progress, cancel=cancel)
            scores = _scores(logits, target, output)
            grid = (base_score - scores).view(len(tops), len(lefts)).numpy().astype(np.float32)
            top_class = logits.argmax(dim=1).view(len(tops), len(lefts)).numpy()
            evaluated = np.ones(grid.shape, dtype=bool)
            n_forwards = n_pos + 1
    drop = _aggregate(grid, tops, lefts, patch, h, w)
    seconds = time.perf_counter() - t0
    return OcclusionResult(
        drop=drop,
        grid=grid,
        tops=tops,
        lefts=lefts,
        top_class=top_class.astype(np.int64),
        evaluated=evaluated,
        base_score=base_score,
        target=target,
        patch=patch,
        stride=stride,
        baseline=base_desc,
        output=output,
        engine=engine,
        method=method,
        batch_size=bs,
        seconds=seconds,
        n_forwards=n_forwards,
        input_shape=tuple(x.shape),
        approximate=engine == "approximate",
        details=details,
    )


@dataclass
class _Choice:
    """The engine that will evaluate the grid, and the positions already evaluated while choosing it."""

    name: str
    evaluate: Evaluator
    batch_size: int
    details: dict[str, Any]
    known: dict[int, torch.Tensor] = field(default_factory=dict)
    incremental: Any = None


def _check_positions(rows: int, cols: int, k: int) -> np.ndarray:
    """``k`` flat grid indices spread over the grid: the four corners, the centre, then evenly spaced."""
    n = rows * cols
    picks = [0, cols - 1, (rows - 1) * cols, n - 1, (rows // 2) * cols + cols // 2]
    picks += np.linspace(0, n - 1, num=max(k, 2)).round().astype(int).tolist()
    out: list[int] = []
    for i in picks:
        if i not in out:
            out.append(int(i))
    return np.asarray(out[: max(1, min(k, n))], dtype=np.int64)


def _choose_engine(
    model: nn.Module,
    x: torch.Tensor,
    base: torch.Tensor,
    patch: int,
    method: str,
    batch_size: int | None,
    grid_shape: tuple[int, int],
    ty: torch.Tensor,
    tx: torch.Tensor,
    cancel: CancelToken | None = None,
) -> _Choice:
    """Pick the engine for ``method``.

    ``auto`` races them: the incremental engine is first checked against brute force on grid
    positions spread over the grid (corners included), then one warm batch of each engine is timed
    on positions of this grid and the faster per position evaluates the rest. Every position
    evaluated while choosing is exact and kept, so choosing costs little beyond the setup.
    ``cancel`` is checked between the stages (on a large model each takes seconds).
    """
    rows, cols = grid_shape
    n = rows * cols
    batched_bs = batch_size or _default_batch(x, n)

    def batched(ty_: torch.Tensor, tx_: torch.Tensor) -> torch.Tensor:
        return model_logits(model, _occluded_batch(x, base, ty_, tx_, patch))

    if method == "naive":

        def naive(ty_: torch.Tensor, tx_: torch.Tensor) -> torch.Tensor:
            outs = []
            for top, left in zip(ty_.tolist(), tx_.tolist()):
                xo = x.clone()
                xo[:, :, top : top + patch, left : left + patch] = base[:, :, top : top + patch, left : left + patch]
                outs.append(model_logits(model, xo))
            return torch.cat(outs)

        return _Choice("naive", naive, batch_size or 1, {})
    if method == "batched":
        return _Choice("batched", batched, batched_bs, {})

    from pellucid.core.occlusion.incremental import (
        RACE_BELOW,
        SELF_CHECK_TOLERANCE,
        IncrementalOcclusion,
        NotIncremental,
    )

    def refuse(reason: str) -> _Choice:
        if method == "incremental":
            raise UnsupportedLayerError(f"incremental occlusion cannot run on this model: {reason} "
                                        "Use method='batched'.")
        return _Choice("batched", batched, batched_bs, {"incremental_skipped": reason})

    try:
        engine = IncrementalOcclusion(model, x, base, patch=patch, self_check=False)
    except NotIncremental as exc:
        return refuse(str(exc))
    if cancel is not None:
        cancel.raise_if_cancelled()
    details: dict[str, Any] = {"estimated_speedup": engine.estimated_speedup, "ideal_speedup": engine.ideal_speedup}
    if method == "auto" and engine.estimated_speedup < RACE_BELOW:
        return _Choice("batched", batched, batched_bs, {
            **details, "incremental_skipped": f"estimated speedup {engine.estimated_speedup:.2f}× is too small"})
    inc_bs = batch_size or engine.default_batch(rows, cols)

    # self-check on grid positions: brute force is the reference, its logits are kept
    check = _check_positions(rows, cols, CHECK_POSITIONS if method == "auto" else 3)
    sel = torch.as_tensor(check)
    ref = batched(ty[sel], tx[sel])
    if cancel is not None:
        cancel.raise_if_cancelled()
    try:
        got = engine.logits(ty[sel], tx[sel])
    except Exception as exc:  # noqa: BLE001 — any failure refuses the engine, never the map
        return refuse(f"the engine failed on this model ({type(exc).__name__}: {exc}).")
    if got.shape != ref.shape:
        return refuse(f"the engine gave shape {tuple(got.shape)}, brute force {tuple(ref.shape)}.")
    diff = float((torch.softmax(got.double(), 1) - torch.softmax(ref.double(), 1)).abs().max())
    if not diff <= SELF_CHECK_TOLERANCE:
        return refuse(f"self-check against brute force failed (max probability difference {diff:.2e}).")
    known = {int(i): row for i, row in zip(check.tolist(), ref)}
    details["self_check_positions"] = len(check)
    choice = _Choice("incremental", engine.logits, inc_bs, details, known, engine)
    if method != "auto" or engine.estimated_speedup >= NO_RACE_ABOVE:
        return choice

    # the race: one batch of whole middle rows for incremental, one warm batched batch
    pending = _row_batches(rows, cols, inc_bs, set(known))
    if n - len(known) < 2 * (inc_bs + batched_bs):  # a small grid: the estimate decides
        if engine.estimated_speedup >= WORTHWHILE_SPEEDUP_SMALL_GRID:
            return choice
        return _Choice("batched", batched, batched_bs, {
            **details, "incremental_skipped": f"estimated speedup {engine.estimated_speedup:.2f}× is too small"},
            known)
    inc_idx = pending[len(pending) // 2]
    rest = np.concatenate([b for b in pending if b is not inc_idx])
    bat_idx = rest[len(rest) // 2 : len(rest) // 2 + batched_bs]
    sel = torch.as_tensor(bat_idx)
    if cancel is not None:
        cancel.raise_if_cancelled()
    t0 = time.perf_counter()
    out = batched(ty[sel], tx[sel])
    t_bat = (time.perf_counter() - t0) / len(bat_idx)
    known.update({int(i): row for i, row in zip(bat_idx.tolist(), out)})
    sel = torch.as_tensor(inc_idx)
    if cancel is not None:
        cancel.raise_if_cancelled()
    t0 = time.perf_counter()
    out = engine.logits(ty[sel], tx[sel])
    t_inc = (time.perf_counter() - t0) / len(inc_idx)
    known.update({int(i): row for i, row in zip(inc_idx.tolist(), out)})
    details["race_ms_per_position"] = {"incremental": 1000 * t_inc, "batched": 1000 * t_bat}
    if t_inc <= t_bat:
        return choice
    details["incremental_skipped"] = (f"measured {1000 * t_inc:.1f} ms per position against {1000 * t_bat:.1f} ms "
                                      "for batched")
    return _Choice("batched", batched, batched_bs, details, known)


def compare_to_exact(result: OcclusionResult, model: nn.Module, x: torch.Tensor, *, baseline: Any = "mean",
                     exact: OcclusionResult | None = None) -> dict[str, float]:
    """Error of an approximate map against the exact one with the same settings.

    Returns max and mean absolute difference on the position grid and on the (H, W) map, plus
    the share of positions actually evaluated. ``baseline`` must be the value originally passed
    (the result keeps only its description); pass ``exact`` to reuse an exact map.
    """
    if exact is None:
        exact = occlusion_map(
            model, x, target=result.target, patch=result.patch, stride=result.stride, baseline=baseline,
            output=result.output, method="auto",
        )
    if exact.grid.shape != result.grid.shape:
        raise BadParameterError(
            f"the exact map's grid {exact.grid.shape} does not match the result's {result.grid.shape}; "
            "compare maps made with the same patch, stride and input size."
        )
    gd = np.abs(exact.grid.astype(np.float64) - result.grid)
    md = np.abs(exact.drop.astype(np.float64) - result.drop)
    return {
        "grid_max_abs": float(gd.max()),
        "grid_mean_abs": float(gd.mean()),
        "map_max_abs": float(md.max()),
        "map_mean_abs": float(md.mean()),
        "evaluated_fraction": float(result.evaluated.mean()),
        "exact_engine": exact.engine,
    }
