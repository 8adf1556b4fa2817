"""Top-k predictions: probabilities, logits, margin and entropy for one input."""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np
import torch
from torch import nn

from pellucid.core.errors import BadParameterError, ModelOutputError


@dataclass(frozen=True)
class ClassScore:
    index: int
    label: str
    probability: float
    logit: float


@dataclass
class Prediction:
    """The model's call on one input. ``probabilities`` and ``logits`` are (K,) arrays."""

    top: list[ClassScore]
    probabilities: np.ndarray
    logits: np.ndarray
    output_kind: str
    margin: float  # top-1 probability minus the runner-up's
    entropy_bits: float  # of the softmax distribution; for sigmoid, the sum of per-class binary entropies
    seconds: float
    params: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {
            "top": [vars(c) for c in self.top],
            "output_kind": self.output_kind,
            "margin": self.margin,
            "entropy_bits": self.entropy_bits,
            "seconds": self.seconds,
            "params": self.params,
        }


def scores_from_logits(logits: torch.Tensor, output_kind: str) -> torch.Tensor:
    """(N, K) logits → probabilities the way the spec's output kind says."""
    if output_kind == "softmax":
        return torch.softmax(logits, dim=-1)
    if output_kind == "sigmoid":
        return torch.sigmoid(logits)
    if output_kind == "logit":
        return logits
    raise BadParameterError(f"output kind must be softmax or sigmoid, got {output_kind!r}")


def model_logits(model: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """The model's (N, K) scores for (N, C, H, W) inputs, checked for shape."""
    out = model(x)
    if not isinstance(out, torch.Tensor) or out.ndim != 2 or out.shape[0] != x.shape[0]:
        got = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out).__name__
        raise ModelOutputError(
            f"the model must return logits of shape (N, K) for N={x.shape[0]} inputs; received {got}"
        )
    return out


def check_finite(logits: torch.Tensor) -> None:
    if not torch.isfinite(logits).all():
        raise ModelOutputError(
            "the model returned NaN or infinite scores for this input; check its weights and the "
            "preprocessing in the spec (mean/std)"
        )


def predict_logits(logits: torch.Tensor, *, labels: list[str], output_kind: str, k: int = 5,
                   seconds: float = 0.0) -> Prediction:
    """Build a :class:`Prediction` from (1, K) logits already computed."""
    check_finite(logits)
    if not isinstance(k, int) or isinstance(k, bool) or k < 1:
        raise BadParameterError(f"k must be a positive whole number, got {k!r}")
    probs = scores_from_logits(logits.detach().float(), output_kind)[0]
    raw = logits.detach().float()[0]
    k = min(k, probs.numel())
    values, indices = torch.topk(probs, k)
    top = [
        ClassScore(index=int(i), label=labels[int(i)], probability=float(v), logit=float(raw[int(i)]))
        for v, i in zip(values, indices)
    ]
    margin = float(values[0] - values[1]) if k > 1 else float(values[0])
    p = probs.double().clamp(1e-12, 1.0)
    if output_kind == "softmax":
        entropy = float(-(p * p.log2()).sum())
    else:
        q = (1 - p).clamp(1e-12, 1.0)
        entropy = float(-(p * p.log2() + q * q.log2()).sum())
    return Prediction(
        top=top,
        probabilities=probs.numpy().copy(),
        logits=raw.numpy().copy(),
        output_kind=output_kind,
        margin=margin,
        entropy_bits=entropy if math.isfinite(entropy) else float("nan"),
        seconds=seconds,
        params={"k": k},
    )


def predict(model: nn.Module, x: torch.Tensor, *, labels: list[str], output_kind: str = "softmax",
            k: int = 5) -> Prediction:
    """Run ``model`` on ``x`` (1, C, H, W) and return its top-``k`` classes."""
    model.eval()
    t0 = time.perf_counter()
    with torch.inference_mode():
        logits = model(x)
    return predict_logits(logits, labels=labels, output_kind=output_kind, k=k, seconds=time.perf_counter() - t0)
