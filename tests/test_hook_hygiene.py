"""Hook hygiene: after any failed request no forward or backward hook is left on the served model.

A leaked hook would keep tensors alive (memory grows with every request) and, worse, would record
into a later request's views. Each case makes a request fail in a different place and then counts
the hooks on every model the workspace has loaded.
"""

from __future__ import annotations

import time
from pathlib import Path

import pytest
import torch
from conftest import png_bytes, synthetic_tile
from torch import nn

from pellucid.core.views.probe import count_hooks

SIZE = 24
LABELS = ("sound", "crack", "chip")


class _Net(nn.Module):
    def __init__(self, *, mode: str = "plain") -> None:
        super().__init__()
        self.mode = mode
        self.features = nn.Sequential(nn.Conv2d(3, 4, 3, padding=1), nn.ReLU(), nn.Conv2d(4, 4, 3, padding=1))
        self.head = nn.Linear(4, len(LABELS))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = self.features(x)
        if self.mode == "flaky" and torch.is_grad_enabled():
            raise RuntimeError("boom inside forward (gradient pass)")
        logits = self.head(f.mean(dim=(2, 3)))
        # NaN on pictures (every input value ≥ 0), finite on the loader's dry runs (zeros, a random
        # normal batch), so the model loads and fails at request time.
        nan = self.mode == "nan" and bool((x.detach() >= 0).all()) and float(x.detach().amax()) > 0
        return logits * float("nan") if nan else logits


def build_plain() -> nn.Module:
    torch.manual_seed(0)
    return _Net()


def build_flaky() -> nn.Module:
    torch.manual_seed(0)
    return _Net(mode="flaky")


def build_nan() -> nn.Module:
    torch.manual_seed(0)
    return _Net(mode="nan")


def _spec(folder: Path, name: str, factory: str) -> Path:
    labels = ", ".join(f'"{s}"' for s in LABELS)
    path = folder / f"{name}.toml"
    path.write_text(
        f'name = "{name}"\n[source]\nkind = "factory"\nfactory = "test_hook_hygiene:{factory}"\n'
        f"[input]\nheight = {SIZE}\nwidth = {SIZE}\n[output]\nlabels = [{labels}]\n",
        encoding="utf-8",
    )
    return path


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory):
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    base = tmp_path_factory.mktemp("hooks")
    specs = [_spec(base, "plain", "build_plain"), _spec(base, "flaky", "build_flaky"), _spec(base, "nan", "build_nan")]
    settings = Settings(models=tuple(map(str, specs)), include_bundled=False, data_dir=base / "data", job_workers=2)
    with TestClient(create_app(settings)) as c:
        for name in ("plain", "flaky", "nan"):
            assert c.get(f"/api/models/{name}").status_code == 200
        yield c


@pytest.fixture(scope="module")
def image(client) -> str:
    data = png_bytes(synthetic_tile(seed=3, size=SIZE))
    return client.post("/api/images", files={"file": ("t.png", data, "image/png")}).json()["id"]


def _hooks(client) -> dict[str, int]:
    ws = client.app.state.workspace
    return {name: count_hooks(ws.model(name).module) for name in ("plain", "flaky", "nan")}


def _wait(client, job_id: str) -> dict:
    deadline = time.time() + 60
    while (state := client.get(f"/api/jobs/{job_id}").json())["state"] not in ("done", "failed", "cancelled"):
        assert time.time() < deadline, state
        time.sleep(0.02)
    return state


def test_no_hooks_before_anything_fails(client) -> None:
    assert _hooks(client) == {"plain": 0, "flaky": 0, "nan": 0}


def test_a_probe_really_is_counted(client) -> None:
    """The counter can see a hook (so the zeros below mean something)."""
    from pellucid.core.views.probe import Probe

    module = client.app.state.workspace.model("plain").module
    with Probe(module, ["features.0", "features.2"]):
        assert count_hooks(module) == 2
    assert count_hooks(module) == 0


FAILURES = [
    ("unknown-layer", "post", "/api/activations", {"model": "plain", "layer": "features.7"}, 404),
    ("unknown-layer-channel", "post", "/api/activations/channel",
     {"model": "plain", "layer": "nope", "channel": 0}, 404),
    ("channel-out-of-range", "post", "/api/activations/channel",
     {"model": "plain", "layer": "features.2", "channel": 99}, 422),
    ("bad-params", "post", "/api/jobs", {"model": "plain", "method": "gradcam", "params": {"layer": "features.9"}},
     404),
    ("bad-k", "post", "/api/predict", {"model": "plain", "k": 0}, 422),
    ("nan-model-predict", "post", "/api/predict", {"model": "nan"}, 422),
]


@pytest.mark.parametrize("case", FAILURES, ids=[c[0] for c in FAILURES])
def test_failed_request_leaves_no_hook(case, client, image) -> None:
    _id, verb, url, body, status = case
    r = getattr(client, verb)(url, json={"image": image, **body})
    assert r.status_code == status, r.text
    assert _hooks(client) == {"plain": 0, "flaky": 0, "nan": 0}


@pytest.mark.parametrize("method", ["gradcam", "saliency", "integrated_gradients"])
def test_exception_inside_a_method_leaves_no_hook(method, client, image) -> None:
    r = client.post("/api/jobs", json={"image": image, "model": "flaky", "method": method})
    assert r.status_code == 202, r.text
    state = _wait(client, r.json()["id"])
    assert state["state"] == "failed" and "boom" in state["error"]
    assert _hooks(client) == {"plain": 0, "flaky": 0, "nan": 0}


def test_nan_model_jobs_leave_no_hook(client, image) -> None:
    for method in ("gradcam", "occlusion"):
        r = client.post("/api/jobs", json={"image": image, "model": "nan", "method": method,
                                           "params": {"patch": 8, "stride": 8} if method == "occlusion" else {}})
        if r.status_code == 202:
            _wait(client, r.json()["id"])
        else:
            assert 400 <= r.status_code < 500, r.text
        assert _hooks(client) == {"plain": 0, "flaky": 0, "nan": 0}


def test_cancelled_job_leaves_no_hook(client, image) -> None:
    r = client.post("/api/jobs", json={"image": image, "model": "plain", "method": "smoothgrad",
                                       "params": {"samples": 10_000, "batch_size": 1}})
    assert r.status_code == 202, r.text
    job_id = r.json()["id"]
    deadline = time.time() + 30
    while client.get(f"/api/jobs/{job_id}").json()["done"] < 1:
        assert time.time() < deadline
        time.sleep(0.01)
    client.post(f"/api/jobs/{job_id}/cancel")
    assert _wait(client, job_id)["state"] == "cancelled"
    assert _hooks(client) == {"plain": 0, "flaky": 0, "nan": 0}


def test_successful_views_leave_no_hook_either(client, image) -> None:
    assert client.post("/api/activations", json={"image": image, "model": "plain", "layer": "features.1"}
                       ).status_code == 200
    r = client.post("/api/jobs", json={"image": image, "model": "plain", "method": "gradcam"})
    assert _wait(client, r.json()["id"])["state"] == "done"
    assert _hooks(client) == {"plain": 0, "flaky": 0, "nan": 0}
