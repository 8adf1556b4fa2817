"""Tracing for the incremental engine must not break forward passes in other threads."""

from __future__ import annotations

import threading

import torch
import torchvision
from torch import fx, nn

from pellucid.core.occlusion._fx_trace import trace_isolated


def test_trace_equals_symbolic_trace():
    model = torchvision.models.resnet18(num_classes=4).eval()
    gm = trace_isolated(model)
    x = torch.randn(1, 3, 64, 64)
    with torch.inference_mode():
        assert torch.equal(gm(x), model(x))
    assert [n.op for n in gm.graph.nodes] == [n.op for n in fx.symbolic_trace(model).graph.nodes]


def test_other_threads_run_normally_while_a_model_is_traced():
    # Plain symbolic_trace patches nn.Module.__call__ process-wide; a forward in another thread
    # during the trace then fails inside the tracer (found by the bounded load test).
    tracee = torchvision.models.resnet50(num_classes=4).eval()
    other = nn.Sequential(nn.Conv2d(3, 4, 3), nn.BatchNorm2d(4), nn.ReLU()).eval()
    errors: list[BaseException] = []
    stop = threading.Event()

    def hammer() -> None:
        x = torch.randn(1, 3, 16, 16)
        while not stop.is_set():
            try:
                with torch.inference_mode():
                    other(x)
            except BaseException as exc:  # noqa: BLE001 - record whatever breaks
                errors.append(exc)
                return

    worker = threading.Thread(target=hammer)
    worker.start()
    try:
        for _ in range(5):
            trace_isolated(tracee)
    finally:
        stop.set()
        worker.join(timeout=30)
    assert errors == []
    # And the originals are back afterwards.
    assert nn.Module.__call__ is not None and not getattr(nn.Module.__call__, "__fx_already_patched", False)


def test_conv_subclasses_with_their_own_forward_are_traced_through():
    # The incremental occlusion engine reads same-padding convolutions (a pad module, then
    # F.conv2d) from the traced graph. torch.fx keeps modules from torch.nn as leaves but traces
    # into a subclass defined elsewhere, so such a layer must appear as its pad and its conv2d call.
    import torch.nn.functional as F

    class SamePad(nn.Conv2d):
        def __init__(self) -> None:
            super().__init__(3, 4, 3, stride=2, bias=False)
            self.static_padding = nn.ZeroPad2d((0, 1, 0, 1))

        def forward(self, x: torch.Tensor) -> torch.Tensor:
            return F.conv2d(self.static_padding(x), self.weight, self.bias, self.stride, 0, 1, 1)

    SamePad.__module__ = "somewhere_else"  # as in a third-party package, not torch.nn
    model = nn.Sequential(SamePad(), nn.ReLU()).eval()
    gm = trace_isolated(model)
    ops = [(n.op, n.target if n.op == "call_module" else getattr(n.target, "__name__", n.target))
           for n in gm.graph.nodes if n.op in ("call_module", "call_function")]
    assert ops[0] == ("call_module", "0.static_padding") and ops[1][1] == "conv2d" and ops[-1] == ("call_module", "1")
    x = torch.randn(1, 3, 16, 16)
    with torch.inference_mode():
        assert torch.equal(gm(x), model(x))
