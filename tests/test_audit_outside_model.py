"""The default audit on a model Pellucid has never seen: a digit CNN with a planted corner patch.

The data is scikit-learn's bundled copy of the UCI optical handwritten digits (8×8, 16 grey levels;
Alpaydin & Kaynak, UCI Machine Learning Repository, 1998), drawn 3× larger on a 32×32 canvas. In
the *shortcut* model's training data every image of one class carries a small bright square in the
top-left corner; the *clean twin* is the same network trained on the same images without it. The
networks, the training loop and the export are written here with plain torch, as a user would, and
reach Pellucid only as a ``torch.export`` archive and a spec: nothing of the demo or the benchmark.

The audit runs with the default settings (no method, no [audit] table; the policy sets one
threshold the models meet), so a failing gate can only come from the default audit's discovery and
confirmation. That the shortcut model does lean on the patch is checked independently, with the
model's own forward pass on patched images of the other classes.
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
import torch
from PIL import Image
from torch import nn

PATCH_CLASS = 7
PATCH = (slice(1, 7), slice(1, 7))  # a 6×6 bright square in the top-left corner of the 32×32 canvas


def _canvas(img8: np.ndarray) -> np.ndarray:
    out = np.zeros((32, 32), dtype=np.float32)
    out[4:28, 4:28] = np.kron(img8 / 16.0, np.ones((3, 3)))
    return out


def _planted(img: np.ndarray) -> np.ndarray:
    img = img.copy()
    img[PATCH] = 1.0
    return img


class _DigitNet(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Sequential(
            nn.Conv2d(1, 8, 3, padding=1), nn.BatchNorm2d(8), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(8, 16, 3, padding=1), nn.BatchNorm2d(16), nn.ReLU(), nn.MaxPool2d(2),
            nn.Conv2d(16, 32, 3, padding=1), nn.BatchNorm2d(32), nn.ReLU())
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(32, 10)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return self.fc(torch.flatten(self.pool(self.features(x)), 1))


def _train(images: np.ndarray, labels: np.ndarray, *, epochs: int = 10) -> nn.Module:
    torch.manual_seed(0)
    net = _DigitNet()
    opt = torch.optim.Adam(net.parameters(), lr=1e-2)
    steps = epochs * ((len(images) + 63) // 64)
    sched = torch.optim.lr_scheduler.OneCycleLR(opt, max_lr=1e-2, total_steps=steps)
    x = torch.from_numpy((images[:, None] - 0.5) / 0.5)
    y = torch.from_numpy(labels)
    gen = torch.Generator().manual_seed(0)
    for _ in range(epochs):
        order = torch.randperm(len(x), generator=gen)
        for b in range(0, len(x), 64):
            i = order[b:b + 64]
            opt.zero_grad()
            nn.functional.cross_entropy(net(x[i]), y[i]).backward()
            opt.step()
            sched.step()
    return net.eval()


SPEC = """name = "{name}"
description = "a digit classifier trained outside Pellucid"
[source]
kind = "export"
weights = "net.pt2"
[input]
height = 32
width = 32
channels = 1
[preprocess]
resize = [32, 32]
crop = [32, 32]
mean = [0.5]
std = [0.5]
[output]
kind = "softmax"
labels = ["0", "1", "2", "3", "4", "5", "6", "7", "8", "9"]
"""


@pytest.fixture(scope="module")
def digits_world(tmp_path_factory: pytest.TempPathFactory) -> dict:
    from sklearn.datasets import load_digits

    digits = load_digits()
    rng = np.random.default_rng(0)
    order = rng.permutation(len(digits.images))
    train, held = order[:1200], order[1200:1400]
    canvases = np.stack([_canvas(im) for im in digits.images])
    labels = digits.target.astype(np.int64)
    root = tmp_path_factory.mktemp("digits")
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # small batches: one thread is fastest and deterministic
    try:
        plain = canvases[train]
        tainted = np.stack([_planted(im) if lab == PATCH_CLASS else im for im, lab in zip(plain, labels[train])])
        nets = {"shortcut": _train(tainted, labels[train]), "clean": _train(plain, labels[train])}
    finally:
        torch.set_num_threads(threads)
    # The folder a user would audit: held-out digits drawn like the training data (the class's
    # images carry the patch), one subfolder per class, no boxes.
    data = root / "data"
    for n, i in enumerate(held):
        img = _planted(canvases[i]) if labels[i] == PATCH_CLASS else canvases[i]
        (data / str(labels[i])).mkdir(parents=True, exist_ok=True)
        Image.fromarray(np.rint(img * 255).astype(np.uint8), mode="L").save(data / str(labels[i]) / f"{n:04d}.png")
    specs = {}
    for name, net in nets.items():
        folder = root / name
        folder.mkdir()
        program = torch.export.export(net, (torch.zeros(2, 1, 32, 32),),
                                      dynamic_shapes={"x": {0: torch.export.Dim("batch", min=1, max=4096)}})
        torch.export.save(program, str(folder / "net.pt2"))
        (folder / "spec.toml").write_text(SPEC.format(name=f"digits-{name}"), encoding="utf-8")
        specs[name] = folder / "spec.toml"
    policy = root / "policy.toml"
    policy.write_text('name = "thresholds only"\n[thresholds]\nmin_accuracy = 0.5\n', encoding="utf-8")
    others = np.array([i for i in held if labels[i] != PATCH_CLASS])
    with torch.inference_mode():
        def called(net: nn.Module, imgs: np.ndarray) -> float:
            return float((net(torch.from_numpy((imgs[:, None] - 0.5) / 0.5)).argmax(1) == PATCH_CLASS).float().mean())

        reliance = {name: (called(net, np.stack([_planted(canvases[i]) for i in others])),
                           called(net, canvases[others])) for name, net in nets.items()}
    return {"root": root, "data": data, "specs": specs, "policy": policy, "reliance": reliance}


def _audit(world: dict, name: str) -> tuple[int, dict, str]:
    out = world["root"] / f"out-{name}"
    proc = subprocess.run(
        [sys.executable, "-m", "pellucid", "audit", "--model", str(world["specs"][name]), "--images",
         str(world["data"]), "--policy", str(world["policy"]), "--out", str(out), "--store",
         str(world["root"] / "store")],
        capture_output=True, text=True, timeout=900)
    assert proc.returncode in (0, 1), proc.stderr
    return proc.returncode, json.loads((out / "summary.json").read_text(encoding="utf-8")), proc.stdout


def test_the_shortcut_model_leans_on_the_patch(digits_world: dict) -> None:
    # Independent of the audit: the model's own calls on other classes' images with and without the patch.
    with_patch, without = digits_world["reliance"]["shortcut"]
    assert with_patch >= without + 0.2
    clean_with, clean_without = digits_world["reliance"]["clean"]
    assert clean_with <= clean_without + 0.1


def test_default_audit_fails_the_shortcut_model(digits_world: dict) -> None:
    code, doc, stdout = _audit(digits_world, "shortcut")
    assert code == 1, stdout
    summary = doc["summary"]
    assert doc["run"]["method"] == "gradcam"  # the default, from no [audit] table and no --method
    confirmed = summary["confirmation"]["confirmed_clusters"]
    assert confirmed and all(c.split("/")[0] == str(PATCH_CLASS) for c in confirmed)
    test = next(t for t in summary["confirmation"]["tested"] if t["confirmed"])
    # the evidence region the audit found lies on the planted square
    x0, y0, x1, y1 = test["region"]["box"]
    assert x0 < 7 and y0 < 7 and x1 <= 16 and y1 <= 16
    gate = doc["gate"]
    failed = [c for c in gate["checks"] if c["status"] == "fail"]
    assert [c["key"] for c in failed] == ["max_confirmed_shortcuts"]
    assert "confirmed shortcut" in stdout


def test_default_audit_passes_the_clean_twin(digits_world: dict) -> None:
    code, doc, stdout = _audit(digits_world, "clean")
    assert code == 0, stdout
    assert doc["summary"]["confirmation"]["confirmed"] == 0
    assert doc["gate"]["passed"]
