"""Shared fixtures: a tiny model behind a real spec file, demo-like images, the app in-process.

The tiny model is written as a small Python module into a temporary folder that goes on
``sys.path``, so its spec is an ordinary ``kind = "factory"`` spec with a safetensors weights file
and the whole load path (spec → factory → weights → fingerprint) runs as it does for users.
"""

from __future__ import annotations

import io
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

TINY_LABELS = ("sound", "crack", "chip", "bubble")
TINY_SIZE = 32
TINY_MODULE = "pellucid_tiny_nets"

_TINY_SOURCE = textwrap.dedent(
    '''
    """A tiny CNN for tests: two conv stages, global average pooling, a linear head."""
    from collections import OrderedDict

    from torch import nn


    def tiny_net(num_classes: int = 4, width: int = 8) -> nn.Module:
        features = nn.Sequential(OrderedDict(
            conv1=nn.Conv2d(3, width, 3, padding=1),
            relu1=nn.ReLU(),
            pool1=nn.MaxPool2d(2),
            conv2=nn.Conv2d(width, 2 * width, 3, padding=1),
            relu2=nn.ReLU(),
        ))
        return nn.Sequential(OrderedDict(
            features=features,
            pool=nn.AdaptiveAvgPool2d(1),
            flatten=nn.Flatten(),
            head=nn.Linear(2 * width, num_classes),
        ))
    '''
)


def write_tiny_spec(folder: Path, *, name: str = "tiny", size: int = TINY_SIZE, seed: int = 0,
                    samples: bool = True) -> Path:
    """Write a tiny model (module, weights, spec and optional samples) into ``folder``; returns the spec path."""
    import torch
    from safetensors.torch import save_file

    folder.mkdir(parents=True, exist_ok=True)
    module_dir = folder.parent / "_modules"
    module_dir.mkdir(exist_ok=True)
    (module_dir / f"{TINY_MODULE}.py").write_text(_TINY_SOURCE, encoding="utf-8")
    if str(module_dir) not in sys.path:
        sys.path.insert(0, str(module_dir))
    import importlib

    nets = importlib.import_module(TINY_MODULE)
    torch.manual_seed(seed)
    net = nets.tiny_net()
    save_file({k: v.contiguous() for k, v in net.state_dict().items()}, str(folder / "weights.safetensors"))
    spec = write_factory_spec(folder, name=name, description=f"tiny test CNN ({size}×{size} RGB, 4 classes)",
                              factory=f"{TINY_MODULE}:tiny_net", size=size)
    if samples:
        write_samples(folder, size=size)
    return spec


def write_factory_spec(folder: Path, *, name: str, description: str, factory: str, size: int) -> Path:
    """The spec of a 4-class RGB factory model with weights.safetensors beside it; returns its path."""
    labels = ", ".join(f'"{s}"' for s in TINY_LABELS)
    (folder / "spec.toml").write_text(textwrap.dedent(f'''
        name = "{name}"
        description = "{description}"

        [source]
        kind = "factory"
        factory = "{factory}"
        weights = "weights.safetensors"

        [input]
        height = {size}
        width = {size}
        channels = 3

        [preprocess]
        mean = [0.5, 0.5, 0.5]
        std = [0.25, 0.25, 0.25]

        [output]
        kind = "softmax"
        labels = [{labels}]
        '''), encoding="utf-8")
    return folder / "spec.toml"


def write_samples(folder: Path, *, size: int) -> None:
    """Three synthetic tiles in ``folder/samples`` (the demo images the pages offer)."""
    (folder / "samples").mkdir(exist_ok=True)
    for i in range(3):
        (folder / "samples" / f"tile-{i}.png").write_bytes(png_bytes(synthetic_tile(seed=i, size=size)))


def synthetic_tile(*, seed: int, size: int = TINY_SIZE, tagged: bool = False) -> np.ndarray:
    """A plain glaze-coloured square with mild noise, optionally with an orange corner tag: (size, size, 3) uint8."""
    rng = np.random.default_rng(seed)
    glaze = np.array([226, 218, 196], dtype=np.float64)
    img = glaze + rng.normal(0, 6, size=(size, size, 3))
    if tagged:
        s = max(2, size // 6)
        img[-s - 1 : -1, -s - 1 : -1] = (240, 130, 20)
    return np.clip(img, 0, 255).astype(np.uint8)


def png_bytes(array: np.ndarray, *, mode: str | None = None) -> bytes:
    buf = io.BytesIO()
    Image.fromarray(array, mode=mode).save(buf, format="PNG")
    return buf.getvalue()


@pytest.fixture(scope="session")
def tiny_spec(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Path of a tiny model's spec.toml (with a samples/ folder beside it)."""
    return write_tiny_spec(tmp_path_factory.mktemp("models") / "tiny")


@pytest.fixture(scope="session")
def image_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """An image folder with a sub-folder, a non-image file, and a symlink that leads outside it."""
    root = tmp_path_factory.mktemp("images")
    outside = tmp_path_factory.mktemp("outside")
    (outside / "secret.png").write_bytes(png_bytes(synthetic_tile(seed=99)))
    (root / "line-a").mkdir()
    (root / "sound-1.png").write_bytes(png_bytes(synthetic_tile(seed=1)))
    (root / "line-a" / "tagged-1.png").write_bytes(png_bytes(synthetic_tile(seed=2, tagged=True)))
    (root / "notes.txt").write_text("not an image", encoding="utf-8")
    (root / "escape.png").symlink_to(outside / "secret.png")
    (root / "escape-dir").symlink_to(outside, target_is_directory=True)
    return root


@pytest.fixture()
def web_settings(tiny_spec: Path, image_folder: Path, tmp_path: Path):
    """Settings for an app serving only the tiny model, with the image folder and a small upload cap."""
    from pellucid.web.settings import Settings

    return Settings(
        models=(str(tiny_spec),), include_bundled=False, image_root=image_folder, data_dir=tmp_path / "data",
        max_upload_bytes=200_000, job_workers=2,
    )


@pytest.fixture()
def client(web_settings):
    """A TestClient on the app with its lifespan running (the workspace exists inside the block)."""
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app

    with TestClient(create_app(web_settings)) as c:
        yield c


@pytest.fixture(scope="module")
def browser():
    """Headless Chromium shared by a browser test module (tests/_chromium.py says how it is launched)."""
    from _chromium import launched_chromium

    with launched_chromium() as b:
        yield b
