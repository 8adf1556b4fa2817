"""Matplotlib figures for the evidence that is a curve, not a map: faithfulness and sanity checks.

Figures are drawn on an Agg canvas (no display, no pyplot state) and returned as PNG bytes, so the
CLI, the dashboard and the reports share one picture of each result.
"""

from __future__ import annotations

import io
from collections.abc import Mapping

import matplotlib

matplotlib.use("Agg")

from matplotlib.figure import Figure  # noqa: E402

# Distinct, colour-blind-safe line colours (Okabe & Ito, "Color Universal Design", 2008).
LINE_COLOURS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9", "#000000", "#F0E442")


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight")
    return buf.getvalue()


def faithfulness_png(results: Mapping[str, object], *, label: str = "") -> bytes:
    """Deletion and insertion curves of several methods on one image, side by side."""
    fig = Figure(figsize=(8.0, 3.2))
    axes = fig.subplots(1, 2, sharey=True)
    for ax, kind, better in zip(axes, ("deletion", "insertion"), ("lower", "higher")):
        for i, (name, res) in enumerate(results.items()):
            curve = res.curves.get(kind)  # type: ignore[attr-defined]
            if curve is None:
                continue
            ax.plot(curve.fractions, curve.scores, color=LINE_COLOURS[i % len(LINE_COLOURS)],
                    label=f"{name} (AUC {curve.auc:.3f})", linewidth=1.6)
        ax.set_title(f"{kind}: {better} area is better", fontsize=9)
        ax.set_xlabel("fraction of pixels " + ("removed" if kind == "deletion" else "restored"), fontsize=8)
        ax.set_xlim(0, 1)
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=7)
        ax.legend(fontsize=7, loc="best")
    axes[0].set_ylabel(f"p({label})" if label else "target probability", fontsize=8)
    return _png(fig)


def sanity_png(result: object) -> bytes:
    """Similarity of the map to the original after each cascading-randomisation step."""
    steps = result.steps  # type: ignore[attr-defined]
    fig = Figure(figsize=(7.0, 3.0))
    ax = fig.subplots()
    xs = list(range(1, len(steps) + 1))
    ax.plot(xs, [s.spearman for s in steps], marker="o", color=LINE_COLOURS[0], label="Spearman (|map|)")
    if all(s.ssim is not None for s in steps):
        ax.plot(xs, [s.ssim for s in steps], marker="s", color=LINE_COLOURS[1], label="SSIM")
    ax.axhline(result.threshold, color="#555555", linestyle="--", linewidth=1,  # type: ignore[attr-defined]
               label=f"fail above {result.threshold:g} at the end")  # type: ignore[attr-defined]
    ax.set_xticks(xs)
    ax.set_xticklabels([s.layers[-1] for s in steps], rotation=45, ha="right", fontsize=7)
    ax.set_ylim(-0.2, 1.05)
    ax.set_ylabel("similarity to the trained map", fontsize=8)
    ax.set_title(f"{result.method}: cascading randomisation, top layer first — {result.verdict}",  # type: ignore
                 fontsize=9)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7)
    return _png(fig)
