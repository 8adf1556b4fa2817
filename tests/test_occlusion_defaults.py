"""One rule for default occlusion geometry, shared by inspect, the API (and so the pages) and audits.

The rule is Pellucid's own (Zeiler & Fergus, ECCV 2014, fix no patch size): patch = the input's
shorter side // 8, at least 2 px, stride = patch // 2, at least 1 px. The expected values below are
computed in the test from that sentence; each place is then asked what it actually used.
"""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import TINY_SIZE, png_bytes, synthetic_tile, write_tiny_spec
from PIL import Image
from torch import nn

from pellucid.cli import main
from pellucid.core.attribution import compute_attribution
from pellucid.core.occlusion.positions import default_occlusion_geometry


def _expected(h: int, w: int) -> tuple[int, int]:
    # common practice, no source: Pellucid's stated rule, written out independently of the function
    patch = min(h, w) // 8
    patch = patch if patch >= 2 else 2
    stride = patch // 2
    return patch, stride if stride >= 1 else 1


@pytest.mark.parametrize("shape", [(32, 32), (96, 96), (224, 224), (50, 70), (8, 8), (300, 17)])
def test_the_rule(shape: tuple[int, int]) -> None:
    assert default_occlusion_geometry(*shape) == _expected(*shape)


def test_given_values_are_kept_and_a_lone_stride_widens_the_patch() -> None:
    assert default_occlusion_geometry(96, 96, patch=20) == (20, 10)
    assert default_occlusion_geometry(96, 96, patch=20, stride=3) == (20, 3)
    assert default_occlusion_geometry(96, 96, stride=16) == (16, 16)  # never a stride larger than the patch


@pytest.mark.parametrize("side", [24, 40])
def test_the_registry_uses_it_and_reports_it(side: int) -> None:
    net = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                        nn.Linear(4, 3))
    amap = compute_attribution("occlusion", net, torch.rand(1, 3, side, side), target=0)
    assert (amap.params["patch"], amap.params["stride"]) == _expected(side, side)


def test_inspect_uses_it(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    spec = write_tiny_spec(tmp_path / "tiny", samples=False)
    image = tmp_path / "tile.png"
    Image.fromarray(synthetic_tile(seed=2)).save(image)
    assert main(["inspect", str(image), "--model", str(spec), "--out", str(tmp_path / "o"), "--quiet"]) == 0
    capsys.readouterr()
    occ = json.loads((tmp_path / "o" / "result.json").read_text())["attribution"]["occlusion"]
    assert (occ["patch"], occ["stride"]) == _expected(TINY_SIZE, TINY_SIZE)


def test_the_api_uses_it(client) -> None:
    image = client.post("/api/images", files={"file": ("t.png", png_bytes(synthetic_tile(seed=3)), "image/png")})
    assert image.status_code == 200, image.text
    described = next(m for m in client.get("/api/methods").json()["methods"] if m["name"] == "occlusion")
    assert {p["name"]: p["default"] for p in described["params"]}["patch"] is None  # "automatic" on the page
    job = client.post("/api/jobs", json={"image": image.json()["id"], "method": "occlusion"})
    assert job.status_code == 202, job.text
    deadline = time.time() + 120
    while (status := client.get(f"/api/jobs/{job.json()['id']}").json())["state"] not in ("done", "failed"):
        assert time.time() < deadline
        time.sleep(0.05)
    assert status["state"] == "done", status
    result = client.get(f"/api/results/{status['result_id']}").json()
    assert (result["params"]["patch"], result["params"]["stride"]) == _expected(TINY_SIZE, TINY_SIZE)


def test_audits_use_it(tmp_path: Path) -> None:
    from pellucid.core.audit import load_dataset, run_audit
    from pellucid.core.audit.settings import AuditSettings
    from pellucid.core.audit.store import Store
    from pellucid.core.model.loading import load_model
    from pellucid.core.model.spec import ModelSpec

    spec = write_tiny_spec(tmp_path / "tiny", samples=False)
    data = tmp_path / "data"
    for label in ("sound", "crack"):
        (data / label).mkdir(parents=True)
        for n in range(2):
            (data / label / f"{n}.png").write_bytes(png_bytes(synthetic_tile(seed=n, tagged=label == "crack")))
    model = load_model(ModelSpec.from_toml(spec))
    with Store(tmp_path / "store") as store:
        outcome = run_audit(model, load_dataset(data), store=store,
                            settings=AuditSettings(method="occlusion", discovery=None, confirmation=None))
        rows = store.results(outcome.run.id)
    used = {(r.data["map_params"]["patch"], r.data["map_params"]["stride"]) for r in rows if r.status == "done"}
    assert used == {_expected(TINY_SIZE, TINY_SIZE)}
    assert np.isfinite(outcome.summary["accuracy"])
