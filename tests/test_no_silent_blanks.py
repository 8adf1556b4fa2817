"""No silent blanks: NaN scores fail every job with the CLI's sentence; a saturated map says so; logit is offered.

Three small models are built here: one that returns NaN for any real picture (finite on the all-zero
input a model is checked with when it loads), one that returns NaN only when a pixel is hidden with
zeros (so only the occlusion map is poisoned), and one whose class probability is saturated (a
margin of 40 between the logits).
"""

from __future__ import annotations

import json
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import png_bytes, synthetic_tile
from torch import nn

from pellucid.cli import main
from pellucid.core.attribution import compute_attribution, method_names
from pellucid.core.errors import ModelOutputError

SIZE = 16
LABELS = ("first", "second")
NAN_SENTENCE = "the model returned NaN or infinite scores for this input"
FAST = {"occlusion": {"patch": 4, "stride": 4}, "rise": {"masks": 16, "batch_size": 8},
        "smoothgrad": {"samples": 2}, "integrated_gradients": {"steps": 4}}


class _Base(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        torch.manual_seed(0)
        self.features = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU())
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.head = nn.Linear(4, 2)

    def logits(self, x: torch.Tensor) -> torch.Tensor:
        return self.head(self.pool(self.features(x)).flatten(1))


class NanOnPictures(_Base):
    def forward(self, x: torch.Tensor) -> torch.Tensor:
        varied = x.flatten(1).std(dim=1, keepdim=True) > 0
        return torch.where(varied, torch.full_like(self.logits(x), float("nan")), self.logits(x))


class NanWhenZeroed(_Base):
    def forward(self, x: torch.Tensor) -> torch.Tensor:
        zeroed = (x == 0).all(dim=1).flatten(1).any(dim=1, keepdim=True) & (x.flatten(1).std(1, keepdim=True) > 0)
        return torch.where(zeroed, torch.full_like(self.logits(x), float("nan")), self.logits(x))


class Saturated(_Base):
    """logit(first) = 40 + a small image-dependent term: p(first) ≈ 1 − 4e-18 for any picture."""

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        small = self.logits(x)[:, :1] * 20.0
        return torch.cat([40.0 + small, torch.zeros_like(small)], dim=1)


def build_nan_on_pictures() -> nn.Module:
    return NanOnPictures()


def build_nan_when_zeroed() -> nn.Module:
    return NanWhenZeroed()


def build_saturated() -> nn.Module:
    return Saturated()


def _spec(folder: Path, name: str) -> Path:
    labels = ", ".join(f'"{s}"' for s in LABELS)
    path = folder / f"{name}.toml"
    path.write_text(textwrap.dedent(f'''
        name = "{name}"
        [source]
        kind = "factory"
        factory = "test_no_silent_blanks:build_{name.replace("-", "_")}"
        [input]
        height = {SIZE}
        width = {SIZE}
        channels = 3
        [preprocess]
        mean = [0.5, 0.5, 0.5]
        std = [0.25, 0.25, 0.25]
        [output]
        kind = "softmax"
        labels = [{labels}]
        '''), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def specs(tmp_path_factory) -> dict[str, Path]:
    folder = tmp_path_factory.mktemp("blank-models")
    return {name: _spec(folder, name) for name in ("nan-on-pictures", "nan-when-zeroed", "saturated")}


@pytest.fixture(scope="module")
def picture(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("blank-picture") / "p.png"
    path.write_bytes(png_bytes(synthetic_tile(seed=3, size=SIZE)))
    return path


def _x() -> torch.Tensor:
    return torch.randn(1, 3, SIZE, SIZE, generator=torch.Generator().manual_seed(0))


@pytest.mark.parametrize("name", method_names())
def test_nan_scores_fail_every_method_with_the_cli_sentence(name):
    with pytest.raises(ModelOutputError, match=NAN_SENTENCE):
        compute_attribution(name, NanOnPictures().eval(), _x(), params=FAST.get(name))


def test_a_map_poisoned_by_nan_is_refused_not_drawn():
    net = NanWhenZeroed().eval()
    x = _x()
    assert torch.isfinite(net(x)).all()  # the picture itself scores fine
    with pytest.raises(ModelOutputError, match="map holds NaN or infinite values"):
        compute_attribution("occlusion", net, x, params={"patch": 4, "stride": 4, "baseline": "zero"})


def test_saturated_probability_warns_and_logit_moves():
    # common practice, no source: for a softmax, ∂p/∂z = p(1 − p), so near p = 1 the probability
    # barely moves however much the raw score does. The check below measures both directly.
    net = Saturated().eval()
    x = _x()
    prob = compute_attribution("occlusion", net, x, target=0, params={"patch": 4, "stride": 4})
    logit = compute_attribution("occlusion", net, x, target=0, params={"patch": 4, "stride": 4, "output": "logit"})
    with torch.no_grad():
        p = float(torch.softmax(net(x).double(), dim=1)[0, 0])
    assert p >= 0.99
    assert float(np.abs(prob.raw).max()) <= 0.01  # the probability map is flat …
    assert float(np.abs(logit.raw).max()) > 0.01  # … while the raw score moves
    assert prob.extras.get("saturated") and 'output = "logit"' in prob.warning
    assert logit.warning is None and logit.params["output"] == "logit"


def _wait(client, job_id: str, timeout: float = 60.0) -> dict:
    deadline = time.time() + timeout
    while True:
        status = client.get(f"/api/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, status
        time.sleep(0.02)


@pytest.fixture(scope="module")
def client(specs, picture, tmp_path_factory):
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    settings = Settings(models=tuple(str(p) for p in specs.values()), include_bundled=False,
                        data_dir=tmp_path_factory.mktemp("blank-data"), job_workers=2)
    with TestClient(create_app(settings)) as c:
        r = c.post("/api/images", files={"file": ("p.png", picture.read_bytes(), "image/png")})
        assert r.status_code == 200, r.text
        c.image_id = r.json()["id"]
        yield c


@pytest.mark.parametrize("name", method_names())
def test_every_web_job_on_nan_scores_fails_with_the_cli_sentence(client, name):
    r = client.post("/api/jobs", json={"model": "nan-on-pictures", "image": client.image_id, "method": name,
                                       "params": FAST.get(name, {})})
    if r.status_code != 202:  # refused up front is fine too, as long as it says why
        assert 400 <= r.status_code < 500 and "NaN" in r.json()["detail"], r.text
        return
    status = _wait(client, r.json()["id"])
    assert status["state"] == "failed" and NAN_SENTENCE in status["error"], status


def test_web_offers_logit_and_passes_on_the_saturation_warning(client):
    occlusion = next(m for m in client.get("/api/methods").json()["methods"] if m["name"] == "occlusion")
    output = next(p for p in occlusion["params"] if p["name"] == "output")
    assert "logit" in output["choices"]
    base = {"model": "saturated", "image": client.image_id, "method": "occlusion", "target": 0}
    r = client.post("/api/jobs", json={**base, "params": {"patch": 4, "stride": 4}})
    status = _wait(client, r.json()["id"])
    result = client.get(f"/api/results/{status['result_id']}").json()
    assert result["warning"] and 'output = "logit"' in result["warning"]
    r = client.post("/api/jobs", json={**base, "params": {"patch": 4, "stride": 4, "output": "logit"}})
    status = _wait(client, r.json()["id"])
    result = client.get(f"/api/results/{status['result_id']}").json()
    assert result["warning"] is None and result["params"]["output"] == "logit"
    assert "score" in result["value_label"]


def test_gradcam_on_the_linear_head_is_refused_at_submission(client):
    r = client.post("/api/jobs", json={"model": "saturated", "image": client.image_id, "method": "gradcam",
                                       "params": {"layer": "head"}})
    assert 400 <= r.status_code < 500 and r.json()["error"] == "UnsupportedLayerError", r.text
    detail = r.json()["detail"]
    assert "valid layers: features.0, features.1, features" in detail and "\n" not in detail


def test_cli_offers_logit_and_refuses_the_head(specs, picture, tmp_path, capsys):
    code = main(["inspect", str(picture), "--model", str(specs["saturated"]), "--out", str(tmp_path / "a"),
                 "--method", "occlusion", "--param", "occlusion.output=logit", "--param", "occlusion.patch=4",
                 "--param", "occlusion.stride=4"])
    assert code == 0, capsys.readouterr().err
    doc = json.loads((tmp_path / "a" / "result.json").read_text())
    assert doc["attribution"]["occlusion"]["output"] == "logit" and "warning" not in doc["attribution"]["occlusion"]
    capsys.readouterr()
    code = main(["inspect", str(picture), "--model", str(specs["saturated"]), "--out", str(tmp_path / "p"),
                 "--param", "occlusion.patch=4", "--param", "occlusion.stride=4", "--quiet"])
    out = capsys.readouterr().out
    assert code == 0 and 'use output = "logit"' in out
    doc = json.loads((tmp_path / "p" / "result.json").read_text())
    assert 'output = "logit"' in doc["attribution"]["occlusion"]["warning"]
    code = main(["inspect", str(picture), "--model", str(specs["saturated"]), "--out", str(tmp_path / "b"),
                 "--method", "gradcam", "--param", "gradcam.layer=head"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "valid layers" in err.splitlines()[-1] and "Traceback" not in err
