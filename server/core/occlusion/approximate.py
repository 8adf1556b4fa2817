"""Approximate occlusion by coarse-to-fine adaptive stride.

The position grid is first evaluated every ``step`` positions (a power of two, at most 4, so at
least about four positions per axis remain). Each cell between four evaluated corners is split
in two along each axis that still has unevaluated positions — but only when the drops at its
corners differ by more than ``tolerance``; flat cells are filled by bilinear interpolation from
their corners. The loop stops when no cell needs splitting. Areas where the map changes are thus
evaluated at the full stride and smooth areas are not: a narrow peak that falls entirely inside
a flat coarse cell can be missed, which is why the result is labelled approximate and
:func:`pellucid.core.occlusion.engine.compare_to_exact` reports its error.

The coarse-to-fine drill-down follows the approximate-inference idea of Nakandala, Kumar &
Papakonstantinou, SIGMOD 2019; the grid schedule and the splitting rule are our own.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import torch

from pellucid.core.progress import CancelToken, ProgressFn, step

__all__ = ["COARSE_STEP", "adaptive_grid"]

COARSE_STEP = 4


def _axis(n: int, stride: int) -> list[int]:
    idx = list(range(0, n, stride))
    if idx[-1] != n - 1:
        idx.append(n - 1)
    return idx


def adaptive_grid(
    evaluate: Callable[[torch.Tensor, torch.Tensor], torch.Tensor],
    tops: torch.Tensor,
    lefts: torch.Tensor,
    *,
    score: Callable[[torch.Tensor], torch.Tensor],
    base_score: float,
    batch_size: int,
    tolerance: float,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """Drops on the (rows, cols) position grid, evaluating only where needed.

    ``evaluate(tops, lefts)`` → (B, K) logits; ``score(logits)`` → (B,) target scores;
    ``tolerance``: share of the coarse map's range below which a cell counts as flat.
    Returns (grid (rows, cols) float64, top class (rows, cols) int, evaluated (rows, cols) bool,
    number of occluded forwards).
    """
    nr, nc = len(tops), len(lefts)
    total = nr * nc
    grid = np.full((nr, nc), np.nan)
    top_class = np.full((nr, nc), -1, dtype=np.int64)
    known = np.zeros((nr, nc), dtype=bool)
    coarse = 1
    while coarse * 2 <= COARSE_STEP and (min(nr, nc) - 1) // (coarse * 2) >= 3:
        coarse *= 2
    n_eval = 0

    def run(points: list[tuple[int, int]]) -> None:
        nonlocal n_eval
        pts = sorted({p for p in points if not known[p]})
        for start in range(0, len(pts), batch_size):
            step(n_eval, total, progress=progress, cancel=cancel)
            chunk = pts[start : start + batch_size]
            ii = torch.tensor([p[0] for p in chunk])
            jj = torch.tensor([p[1] for p in chunk])
            logits = evaluate(tops[ii], lefts[jj])
            s = score(logits).numpy()
            cls = logits.argmax(dim=1).numpy()
            for (i, j), v, c in zip(chunk, s, cls):
                grid[i, j] = base_score - float(v)
                top_class[i, j] = int(c)
                known[i, j] = True
            n_eval += len(chunk)

    rows, cols = _axis(nr, coarse), _axis(nc, coarse)
    run([(i, j) for i in rows for j in cols])
    coarse_vals = grid[np.ix_(rows, cols)]
    threshold = tolerance * float(coarse_vals.max() - coarse_vals.min())
    cells = [(rows[a], rows[a + 1], cols[b], cols[b + 1]) for a in range(len(rows) - 1) for b in range(len(cols) - 1)]
    if len(rows) == 1 or len(cols) == 1:  # a single row or column of positions: evaluate all
        run([(i, j) for i in range(nr) for j in range(nc)])
        cells = []
    flat: list[tuple[int, int, int, int]] = []
    while cells:
        split: list[tuple[int, int, int, int]] = []
        new_points: list[tuple[int, int]] = []
        for r0, r1, c0, c1 in cells:
            corners = grid[[r0, r0, r1, r1], [c0, c1, c0, c1]]
            if r1 - r0 <= 1 and c1 - c0 <= 1:
                continue  # every position of the cell is a corner
            spread = float(corners.max() - corners.min())
            if spread <= threshold:
                flat.append((r0, r1, c0, c1))
                continue
            rs = [r0, (r0 + r1) // 2, r1] if r1 - r0 > 1 else [r0, r1]
            cs = [c0, (c0 + c1) // 2, c1] if c1 - c0 > 1 else [c0, c1]
            new_points += [(i, j) for i in rs for j in cs]
            split += [(rs[a], rs[a + 1], cs[b], cs[b + 1]) for a in range(len(rs) - 1) for b in range(len(cs) - 1)]
        run(new_points)
        cells = split
    for r0, r1, c0, c1 in flat:
        ti = (np.arange(r0, r1 + 1) - r0) / max(1, r1 - r0)
        tj = (np.arange(c0, c1 + 1) - c0) / max(1, c1 - c0)
        v00, v01, v10, v11 = grid[r0, c0], grid[r0, c1], grid[r1, c0], grid[r1, c1]
        interp = (np.outer(1 - ti, 1 - tj) * v00 + np.outer(1 - ti, tj) * v01 + np.outer(ti, 1 - tj) * v10
                  + np.outer(ti, tj) * v11)
        block = known[r0 : r1 + 1, c0 : c1 + 1]
        grid[r0 : r1 + 1, c0 : c1 + 1] = np.where(block, grid[r0 : r1 + 1, c0 : c1 + 1], interp)
    step(total, total, progress=progress, cancel=cancel)
    return grid, top_class, known, n_eval
