"""torch.fx tracing that does not disturb other threads.

``torch.fx.symbolic_trace`` replaces ``nn.Module.__call__`` and ``__getattr__`` (and some
functions) for the whole process while it traces. In a server, a forward pass that another
thread runs at that moment goes through the tracer and fails. Here every patch the tracer makes
is wrapped so that only the tracing thread sees it; other threads keep the originals. This uses
``torch.fx._symbolic_trace._Patcher``, a private name: when it is missing, tracing still works,
serialised by a lock, without the isolation.
"""

from __future__ import annotations

import builtins
import functools
import threading
from collections.abc import Callable
from typing import Any

from torch import fx, nn

try:
    from torch.fx import _symbolic_trace as _st

    _BASE = _st._Patcher
except (ImportError, AttributeError):  # pragma: no cover - depends on the torch build
    _st = None
    _BASE = None

_LOCK = threading.Lock()


def _only_in(owner: int, new_fn: Callable[..., Any], orig_fn: Callable[..., Any]) -> Callable[..., Any]:
    @functools.wraps(new_fn)
    def guarded(*args: Any, **kwargs: Any) -> Any:
        if threading.get_ident() == owner:
            return new_fn(*args, **kwargs)
        return orig_fn(*args, **kwargs)

    return guarded


if _BASE is not None:

    class _ThreadPatcher(_BASE):  # type: ignore[misc, valid-type]
        """A patcher whose replacements act only in the thread that created it."""

        def __init__(self) -> None:
            super().__init__()
            self._owner = threading.get_ident()

        def patch(self, frame_dict: dict[str, Any], name: str, new_fn: Callable[..., Any],
                  deduplicate: bool = True) -> None:
            orig = frame_dict[name] if name in frame_dict else getattr(builtins, name, None)
            if orig is None or getattr(orig, "__fx_already_patched", False):
                super().patch(frame_dict, name, new_fn, deduplicate)
                return
            super().patch(frame_dict, name, _only_in(self._owner, new_fn, orig), deduplicate)

        def patch_method(self, cls: type, name: str, new_fn: Callable[..., Any], deduplicate: bool = True) -> None:
            orig = getattr(cls, name)
            if getattr(orig, "__fx_already_patched", False):
                super().patch_method(cls, name, new_fn, deduplicate)
                return
            super().patch_method(cls, name, _only_in(self._owner, new_fn, orig), deduplicate)


def trace_isolated(model: nn.Module) -> fx.GraphModule:
    """``fx.symbolic_trace(model)``, with the tracer's patches invisible to other threads."""
    with _LOCK:
        if _st is None:
            return fx.symbolic_trace(model)
        saved = _st._Patcher
        _st._Patcher = _ThreadPatcher
        try:
            return fx.symbolic_trace(model)
        finally:
            _st._Patcher = saved
