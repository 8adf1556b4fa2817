"""The probe: forward hooks on chosen layers that are always removed.

A probe records the outputs of named modules during the forward passes run inside its ``with``
block and removes every hook on exit, whatever happens inside. Hooks only record calls made from
the thread that opened the probe, so two requests sharing one model do not see each other's
tensors. Hooks return nothing, so the model's outputs are unchanged.
"""

from __future__ import annotations

import difflib
import threading
from collections.abc import Callable, Iterable
from typing import Any

import torch
from torch import nn

from pellucid.core.errors import UnsupportedLayerError


def hookable(module: nn.Module) -> bool:
    return not isinstance(module, torch.jit.ScriptModule)


def find_layer(model: nn.Module, name: str) -> nn.Module:
    """Return the submodule called ``name``; raise UnsupportedLayerError naming close matches."""
    if not hookable(model):
        raise UnsupportedLayerError(
            "layer views are unavailable for TorchScript: needs forward hooks, which torch does not support on "
            "loaded ScriptModules. Export the model with torch.export (kind = \"export\") "
            "to see its layers; top-k, occlusion and input-gradient methods still work."
        )
    modules = dict(model.named_modules())
    if name and name in modules:
        return modules[name]
    names = [n for n in modules if n]
    close = difflib.get_close_matches(name, names, n=4, cutoff=0.5)
    hint = f"; did you mean {', '.join(close)}?" if close else f"; layers include {', '.join(names[:6])}, …"
    raise UnsupportedLayerError(f"the model has no layer named {name!r}{hint}")


def _first_tensor(out: Any) -> torch.Tensor | None:
    if isinstance(out, torch.Tensor):
        return out
    if isinstance(out, (tuple, list)):
        for item in out:
            t = _first_tensor(item)
            if t is not None:
                return t
    if isinstance(out, dict):
        for item in out.values():
            t = _first_tensor(item)
            if t is not None:
                return t
    return None


class Probe:
    """Record the outputs of ``layers`` while the ``with`` block runs.

    ``probe.outputs[name]`` holds the last output tensor of each layer (detached unless
    ``keep_graph=True``, which Grad-CAM-style methods need). Example::

        with Probe(model, ["features.2"]) as probe:
            logits = model(x)
        fmap = probe.outputs["features.2"]      # (N, C, h, w)
    """

    def __init__(self, model: nn.Module, layers: Iterable[str], *, keep_graph: bool = False) -> None:
        self.model = model
        self.layers = list(dict.fromkeys(layers))
        self.keep_graph = keep_graph
        self.outputs: dict[str, torch.Tensor] = {}
        self._handles: list[torch.utils.hooks.RemovableHandle] = []
        self._thread = threading.get_ident()
        self._modules = {name: find_layer(model, name) for name in self.layers}

    def _make_hook(self, name: str):
        def hook(_module: nn.Module, _inputs: Any, output: Any) -> None:
            if threading.get_ident() != self._thread:
                return
            tensor = _first_tensor(output)
            if tensor is not None:
                self.outputs[name] = tensor if self.keep_graph else tensor.detach()

        return hook

    def __enter__(self) -> Probe:
        self._thread = threading.get_ident()
        try:
            for name, module in self._modules.items():
                self._handles.append(module.register_forward_hook(self._make_hook(name)))
        except BaseException:
            self.close()
            raise
        return self

    def close(self) -> None:
        for handle in self._handles:
            handle.remove()
        self._handles.clear()

    def __exit__(self, *exc_info: Any) -> None:
        self.close()


def count_hooks(model: nn.Module) -> int:
    """Number of forward (pre-)hooks attached anywhere in ``model`` (for hygiene checks)."""
    total = 0
    for module in model.modules():
        total += len(getattr(module, "_forward_hooks", {})) + len(getattr(module, "_forward_pre_hooks", {}))
        total += len(getattr(module, "_backward_hooks", {}))
    return total


def execution_order(
    model: nn.Module, x: torch.Tensor, *, keep: Callable[[str, nn.Module, Any], bool] | None = None
) -> list[str]:
    """Names of submodules in the order one forward pass on ``x`` runs them (each once).

    ``keep(name, module, output)`` filters them (default: all). Hooks record only this thread's
    pass and are removed whatever happens.
    """
    order: list[str] = []
    owner = threading.get_ident()

    def make(name: str):
        def hook(module: nn.Module, _inputs: Any, output: Any) -> None:
            if threading.get_ident() == owner and name not in order and (keep is None or keep(name, module, output)):
                order.append(name)

        return hook

    handles = []
    try:
        for name, module in model.named_modules():
            if name:
                handles.append(module.register_forward_hook(make(name)))
        with torch.inference_mode():
            model(x)
    finally:
        for handle in handles:
            handle.remove()
    return order
