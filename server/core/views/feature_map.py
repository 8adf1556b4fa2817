"""The feature map that feeds a classifier's head, found from the graph autograd records.

Grad-CAM (Selvaraju et al., ICCV 2017, §3.1) and CAM (Zhou et al., CVPR 2016) are defined at the
last convolutional feature map: the (N, C, h, w) tensor that global pooling turns into the
vector the linear head reads. That tensor is usually *not* the output of the last ``nn.Conv2d``:
batch norm, the activation and, in residual networks, the skip connection's sum come after it.

How it is found. One forward pass runs with a forward hook and a forward pre-hook on every
submodule; each records which autograd node produced the tensor it saw (at that moment, so a
later in-place op cannot blur the record). The walk then starts at the logits' node and goes
backwards through the autograd graph, breadth first, to the first recorded tensor that is 4-D
with more than one spatial cell: pooling outputs (h = w = 1) and flattened vectors are passed
over. Because the walk follows the recorded computation and not module types, it works for any
``nn.Module`` whose forward can be hooked, including ``torch.export`` programs turned back into
modules with ``torch.export.unflatten`` (their submodules keep the original names), and models
that torch.fx cannot trace.

Which hook point names the tensor. A hook needs a module whose output is that tensor (or whose
input is, for a pre-hook). Among the modules that saw it, the innermost one whose output it is
wins (in a residual block that is the block itself, whose forward ends with the sum and the
activation), then a module that reads it as its first input (the pooling module:
``"avgpool:input"``). A module called several times in one pass names its last call only, so
it is used only when the tensor came from that last call. When nothing can name the tensor (a
functional activation followed by functional pooling), the walk goes on to the nearest earlier
tensor that a module produced.
"""

from __future__ import annotations

import threading
import weakref
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

from pellucid.core.errors import UnsupportedLayerError

__all__ = ["LayerPoint", "feature_map_feeding_head", "parse_layer_point"]

INPUT_SUFFIX = ":input"


@dataclass(frozen=True)
class LayerPoint:
    """A hook point: the output of module ``module`` (its last call), or its first input."""

    module: str
    where: str = "output"  # "output" | "input"

    @property
    def name(self) -> str:
        """The text form used by the ``layer`` parameter: ``"layer4.1"`` or ``"avgpool:input"``."""
        return self.module + (INPUT_SUFFIX if self.where == "input" else "")

    def __str__(self) -> str:
        return self.name


def parse_layer_point(text: str) -> LayerPoint:
    """``"NAME"`` → the output of NAME; ``"NAME:input"`` → its first input."""
    if text.endswith(INPUT_SUFFIX):
        return LayerPoint(text[: -len(INPUT_SUFFIX)], "input")
    return LayerPoint(text, "output")


@dataclass
class _Seen:
    module: str
    where: str
    shape: tuple[int, ...]
    call: int  # 1-based call number of the module in this pass


def _first_tensor(args: Any) -> torch.Tensor | None:
    if isinstance(args, torch.Tensor):
        return args
    if isinstance(args, (tuple, list)) and args and isinstance(args[0], torch.Tensor):
        return args[0]
    return None


def _record(model: nn.Module, x: torch.Tensor) -> tuple[torch.Tensor, dict[Any, list[_Seen]], dict[str, int]]:
    """One forward with gradients; autograd node → what the hooks saw of its tensor; calls per module."""
    seen: dict[Any, list[_Seen]] = {}
    calls: dict[str, int] = {}
    owner = threading.get_ident()

    def note(name: str, where: str, tensor: torch.Tensor | None, call: int) -> None:
        if tensor is not None and tensor.grad_fn is not None:
            seen.setdefault(tensor.grad_fn, []).append(_Seen(name, where, tuple(tensor.shape), call))

    def make(name: str):
        def pre(_module: nn.Module, args: Any) -> None:
            if threading.get_ident() == owner:
                calls[name] = calls.get(name, 0) + 1
                note(name, "input", _first_tensor(args), calls[name])

        def post(_module: nn.Module, _args: Any, output: Any) -> None:
            if threading.get_ident() == owner:
                note(name, "output", _first_tensor(output), calls.get(name, 1))

        return pre, post

    handles = []
    modes = [(m, m.training) for m in model.modules()]
    model.eval()  # a pass in training mode would move batch-norm statistics
    try:
        for name, module in model.named_modules():
            if name:
                pre, post = make(name)
                handles.append(module.register_forward_pre_hook(pre))
                handles.append(module.register_forward_hook(post))
        with torch.inference_mode(False), torch.enable_grad():
            out = model(x.detach().requires_grad_(True))
    finally:
        for handle in handles:
            handle.remove()
        for module, mode in modes:
            module.training = mode
    out = _first_tensor(out) if not isinstance(out, torch.Tensor) else out
    if out is None or out.grad_fn is None:
        raise UnsupportedLayerError("the model's output does not depend on its input through a recorded graph, "
                                    "so no feature map feeding its head can be found; pass 'layer'")
    return out, seen, calls


def _walk(root: Any) -> Iterator[Any]:
    """Autograd nodes breadth first from ``root`` (each once)."""
    visited = {root}
    frontier = [root]
    while frontier:
        following = []
        for node in frontier:
            yield node
            for parent, _ in node.next_functions:
                if parent is not None and parent not in visited:
                    visited.add(parent)
                    following.append(parent)
        frontier = following


def _addressable(entries: list[_Seen], calls: dict[str, int]) -> LayerPoint | None:
    """The hook point that names this tensor: innermost module output, then a module's input.

    Modules run once come first: their name means one tensor. A module run several times names
    its last call only (as an explicit ``layer`` does).
    """
    for once in (True, False):
        for where in ("output", "input"):
            for e in entries:  # hooks fire innermost first, so record order is innermost first
                last = calls.get(e.module, 0)
                if e.where == where and e.call == last and (last == 1 or not once):
                    return LayerPoint(e.module, where)
    return None


def _spatial(shape: tuple[int, ...]) -> int:
    return shape[2] * shape[3] if len(shape) == 4 else 0


def _find(model: nn.Module, x: torch.Tensor) -> LayerPoint:
    out, seen, calls = _record(model, x)
    fallback: LayerPoint | None = None
    for node in _walk(out.grad_fn):
        entries = seen.get(node)
        if not entries or len(entries[0].shape) != 4:
            continue
        point = _addressable(entries, calls)
        if point is None:
            continue
        if _spatial(entries[0].shape) > 1:
            return point
        fallback = fallback or point  # a 1×1 map: use it only if no larger map feeds the head
    if fallback is not None:
        return fallback
    raise UnsupportedLayerError("no module of this model produces a 4-D (N, C, h, w) feature map that feeds its "
                                "output, so Grad-CAM has no default layer; pass 'layer'")


_CACHE: weakref.WeakKeyDictionary[nn.Module, dict[tuple, LayerPoint]] = weakref.WeakKeyDictionary()
_LOCK = threading.Lock()


def feature_map_feeding_head(model: nn.Module, x: torch.Tensor) -> LayerPoint:
    """The hook point of the last 4-D feature map on the way to the output, for input ``x`` (1, C, H, W).

    The answer depends on the model's structure and the input's shape only, so it is kept per
    model and shape. Raises UnsupportedLayerError when no module can name such a tensor.
    """
    key = (tuple(x.shape), x.dtype)
    with _LOCK:
        known = _CACHE.get(model, {}).get(key)
    if known is not None:
        return known
    point = _find(model, x)
    with _LOCK:
        _CACHE.setdefault(model, {})[key] = point
    return point
