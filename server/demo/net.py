"""TileNet: the demo's tiny CNN for glazed-tile inspection (demo only; invented data).

Three conv blocks (Conv2d → BatchNorm2d → ReLU → MaxPool2d), global average pooling, a linear
head. Every stage is its own module with a readable name (``features.block1.conv``,
``features.block2.relu``, …) and ReLUs are not in-place, so forward hooks see each stage's clean
output. Inputs are (N, 3, 96, 96) float tensors normalised with :data:`TILE_MEAN` / :data:`TILE_STD`
(the values the demo spec writes); outputs are (N, num_classes) logits.
"""

from __future__ import annotations

from collections import OrderedDict

import torch
from torch import nn

from pellucid.core.errors import BadParameterError

__all__ = ["TILE_MEAN", "TILE_STD", "build_tilenet", "normalise"]

# Per-channel mean / std of the demo's training tiles (pixels scaled to [0, 1]), rounded.
TILE_MEAN: tuple[float, float, float] = (0.73, 0.74, 0.74)
TILE_STD: tuple[float, float, float] = (0.14, 0.12, 0.12)

_WIDTHS = (12, 24, 48)


def _block(c_in: int, c_out: int) -> nn.Sequential:
    return nn.Sequential(
        OrderedDict(
            conv=nn.Conv2d(c_in, c_out, kernel_size=3, padding=1, bias=False),
            bn=nn.BatchNorm2d(c_out),
            relu=nn.ReLU(inplace=False),
            pool=nn.MaxPool2d(2),
        )
    )


class TileNet(nn.Module):
    """(N, 3, H, W) normalised tiles → (N, num_classes) logits; any H, W ≥ 8 works (GAP head)."""

    def __init__(self, *, num_classes: int = 4) -> None:
        super().__init__()
        w1, w2, w3 = _WIDTHS
        self.features = nn.Sequential(
            OrderedDict(block1=_block(3, w1), block2=_block(w1, w2), block3=_block(w2, w3))
        )
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.flatten = nn.Flatten()
        self.head = nn.Linear(w3, num_classes)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.flatten(self.pool(self.features(x))))


def build_tilenet(*, num_classes: int = 4) -> nn.Module:
    """A freshly initialised TileNet (13,648 parameters with 4 classes)."""
    if not isinstance(num_classes, int) or isinstance(num_classes, bool) or num_classes < 2:
        raise BadParameterError(f"num_classes must be an integer >= 2; received {num_classes!r}")
    return TileNet(num_classes=num_classes)


def normalise(images: torch.Tensor) -> torch.Tensor:
    """(N, H, W, 3) uint8 tiles → (N, 3, H, W) float32, scaled to [0, 1] then mean/std normalised.

    The same arithmetic as the spec's preprocessing (ToTensor then Normalize).
    """
    x = images.permute(0, 3, 1, 2).to(torch.float32) / 255.0
    mean = torch.tensor(TILE_MEAN, dtype=torch.float32).view(1, 3, 1, 1)
    std = torch.tensor(TILE_STD, dtype=torch.float32).view(1, 3, 1, 1)
    return (x - mean) / std
