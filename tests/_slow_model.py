"""A tiny CNN whose forward pass can be slowed down on request, for tests that must catch a job running.

The module is written into a temporary folder on ``sys.path`` (as ``conftest.write_tiny_spec`` does);
servers started by the tests run in the test process, so setting ``slow_down(seconds)`` makes every
forward pass of every copy of the model (the audit's own copy, the sanity check's deep copy) sleep
that long per image.
"""

from __future__ import annotations

import importlib
import sys
import textwrap
from pathlib import Path

from conftest import write_factory_spec, write_samples

MODULE = "pellucid_slow_nets"

_SOURCE = textwrap.dedent(
    '''
    """A tiny CNN that sleeps DELAY seconds per image in each forward pass (DELAY = 0: full speed)."""
    import time
    from collections import OrderedDict

    from torch import nn

    DELAY = 0.0


    class SlowNet(nn.Module):
        def __init__(self, num_classes: int = 4, width: int = 8) -> None:
            super().__init__()
            self.features = nn.Sequential(OrderedDict(
                conv1=nn.Conv2d(3, width, 3, padding=1),
                relu1=nn.ReLU(),
                pool1=nn.MaxPool2d(2),
                conv2=nn.Conv2d(width, 2 * width, 3, padding=1),
                relu2=nn.ReLU(),
            ))
            self.pool = nn.AdaptiveAvgPool2d(1)
            self.head = nn.Linear(2 * width, num_classes)

        def forward(self, x):
            if DELAY:
                time.sleep(DELAY * x.shape[0])
            return self.head(self.pool(self.features(x)).flatten(1))


    def slow_net() -> nn.Module:
        return SlowNet()
    '''
)


def _module():
    return importlib.import_module(MODULE)


def write_slow_spec(folder: Path, *, name: str = "slowtile", size: int = 32) -> Path:
    """Write the model (module, weights, spec, three sample tiles) into ``folder``; returns the spec path."""
    import torch
    from safetensors.torch import save_file

    folder.mkdir(parents=True, exist_ok=True)
    module_dir = folder.parent / "_slow_modules"
    module_dir.mkdir(exist_ok=True)
    (module_dir / f"{MODULE}.py").write_text(_SOURCE, encoding="utf-8")
    if str(module_dir) not in sys.path:
        sys.path.insert(0, str(module_dir))
    torch.manual_seed(0)
    net = _module().slow_net()
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(folder / "weights.safetensors"))
    spec = write_factory_spec(folder, name=name, description=f"tiny CNN that can be slowed down ({size}×{size} RGB, "
                              "4 classes)", factory=f"{MODULE}:slow_net", size=size)
    write_samples(folder, size=size)
    return spec


def slow_down(seconds_per_image: float) -> None:
    _module().DELAY = float(seconds_per_image)
