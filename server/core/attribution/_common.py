"""Helpers shared by the attribution methods: model state, scores, input checks."""

from __future__ import annotations

import contextlib
import threading
from collections.abc import Iterator
from typing import Any

import torch
from torch import nn

from pellucid.core.errors import BadParameterError
from pellucid.core.views.predict import model_logits

OUTPUT_KINDS = ("softmax", "sigmoid")


@contextlib.contextmanager
def evaluating(model: nn.Module) -> Iterator[nn.Module]:
    """Put every submodule in eval mode for the block and restore each one's flag afterwards.

    Parameters' ``requires_grad`` is never touched: the methods take gradients with
    ``torch.autograd.grad(..., inputs=x)``, which leaves ``.grad`` of the weights alone and is
    safe when other threads use the same model.
    """
    flags = [(m, m.training) for m in model.modules()]
    model.eval()
    try:
        yield model
    finally:
        for m, flag in flags:
            m.training = flag


@contextlib.contextmanager
def grad_enabled() -> Iterator[None]:
    """Gradients on, even when the caller sits inside ``torch.no_grad`` or inference mode."""
    with torch.inference_mode(False), torch.enable_grad():
        yield


def check_input(x: object) -> torch.Tensor:
    """The (1, C, H, W) float input, detached; a clear error for anything else."""
    if not isinstance(x, torch.Tensor):
        raise BadParameterError(
            f"the input must be a torch.Tensor of shape (1, C, H, W); received {type(x).__name__}"
        )
    if x.ndim != 4 or x.shape[0] != 1:
        raise BadParameterError(
            f"the input must have shape (1, C, H, W) (one prepared image); received {tuple(x.shape)}"
        )
    if not x.is_floating_point():
        raise BadParameterError(f"the input must be a float tensor; received dtype {x.dtype}")
    if not bool(torch.isfinite(x).all()):
        raise BadParameterError("the input contains NaN or infinite values; check the preprocessing")
    # Leave inference mode's tensors behind: autograd cannot use them.
    with torch.inference_mode(False):
        return x.detach().clone()


def match_dtype(model: nn.Module, x: torch.Tensor) -> torch.Tensor:
    """``x`` cast to the dtype of the model's weights (a float64 image on a float32 model)."""
    p = next(model.parameters(), None)
    if p is not None and p.is_floating_point() and x.dtype != p.dtype:
        with torch.inference_mode(False):
            return x.to(p.dtype)
    return x


def check_output_kind(output_kind: str) -> str:
    if output_kind not in OUTPUT_KINDS:
        raise BadParameterError(
            f"output_kind must be one of {', '.join(OUTPUT_KINDS)}; received {output_kind!r}"
        )
    return output_kind


logits_of = model_logits  # one shape check for every method and the occlusion engines


def probabilities(logits: torch.Tensor, output_kind: str) -> torch.Tensor:
    """Class probabilities from (N, K) logits: softmax across classes or per-class sigmoid."""
    if output_kind == "sigmoid":
        return torch.sigmoid(logits)
    return torch.softmax(logits, dim=1)


def resolve_target(logits: torch.Tensor, target: int | None) -> tuple[int, str]:
    """(class index, "given" | "top-1") for a (1, K) logit row."""
    k = int(logits.shape[1])
    if target is None:
        return int(logits[0].argmax()), "top-1"
    if isinstance(target, bool) or not isinstance(target, int):
        try:
            as_int = int(target)  # numpy integers, "3"
        except (TypeError, ValueError):
            raise BadParameterError(
                f"target must be a class index from 0 to {k - 1}; received {target!r}"
            ) from None
        if isinstance(target, float) and as_int != target:
            raise BadParameterError(f"target must be a class index from 0 to {k - 1}; received {target!r}")
        target = as_int
    if not 0 <= target < k:
        raise BadParameterError(
            f"target class index {target} is out of range: the model has {k} classes (0 to {k - 1})"
        )
    return target, "given"


def input_gradient(
    model: nn.Module, xb: torch.Tensor, target: int
) -> tuple[torch.Tensor, torch.Tensor]:
    """(∂S_target/∂x, S_target) for a batch (B, C, H, W); S is the pre-softmax score.

    Each sample's score depends only on its own input in eval mode, so the gradient of the
    summed scores is the per-sample gradient.
    """
    with grad_enabled():
        xb = xb.detach().requires_grad_(True)
        score = logits_of(model, xb)[:, target]
        (grad,) = torch.autograd.grad(score.sum(), xb)
    return grad.detach(), score.detach()


def batches(n: int, size: int) -> Iterator[tuple[int, int]]:
    """(start, stop) index pairs covering range(n) in chunks of ``size``."""
    for start in range(0, n, size):
        yield start, min(n, start + size)


def capture_layer(module: nn.Module, where: str, captured: dict[str, Any]) -> Any:
    """A hook recording the layer's tensor for this thread's forward only (other threads may run the
    same model); a copy goes downstream so an in-place op after this point cannot change it."""
    owner = threading.get_ident()

    def post(_m: nn.Module, _inputs: Any, output: Any) -> Any:
        if threading.get_ident() != owner:
            return None
        captured["out"] = output
        return output.clone() if isinstance(output, torch.Tensor) else output

    def pre(_m: nn.Module, args: Any) -> Any:
        if threading.get_ident() != owner or not args or not isinstance(args[0], torch.Tensor):
            return None
        captured["out"] = args[0]
        return (args[0].clone(), *args[1:])

    return module.register_forward_pre_hook(pre) if where == "input" else module.register_forward_hook(post)
