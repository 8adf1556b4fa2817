"""The audits page and JSON API: start, follow, cancel, resume, read, compare, report, delete."""

from __future__ import annotations

import base64
import time
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from pellucid.web.app import create_app
from pellucid.web.settings import Settings
from tests.test_audit_engine import _tiny_model


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("web")
    spec = _tiny_model(root / "model")
    app = create_app(Settings(models=(str(spec),), include_bundled=False, data_dir=root / "data"))
    with TestClient(app) as c:
        yield c


def _wait(client: TestClient, job_id: str, timeout: float = 120.0) -> dict:
    deadline = time.time() + timeout
    while True:
        status = client.get(f"/api/audits/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, status
        time.sleep(0.05)


def test_page(client: TestClient) -> None:
    r = client.get("/audits")
    assert r.status_code == 200
    assert "Folder audits" in r.text and "/static/audits.js" in r.text and "/static/audits.css" in r.text
    assert 'aria-current="page"' in r.text
    assert client.get("/static/audits.js").status_code == 200


def test_full_audit_through_the_api(client: TestClient) -> None:
    opts = client.get("/api/audits/options").json()
    assert opts["models"][0]["name"] == "tiny-tiles"
    demo = next(p for p in opts["policies"] if p["name"] == "policy-demo")
    assert demo["method"] == "occlusion"
    body = {"source": {"kind": "demo", "split": "clean", "per_class": 2, "seed": 1}, "method": "gradcam",
            "injection": {"kind": "demo_tag", "suspect_class": "crack"}, "background_swap": True,
            "gallery_layer": "features.block1.relu", "gallery_top": 3, "policy": "policy-demo"}
    started = client.post("/api/audits", json=body)
    assert started.status_code == 200, started.text
    status = _wait(client, started.json()["id"])
    assert status["state"] == "done", status
    run_id = status["run_id"]

    runs = client.get("/api/audits/runs").json()["runs"]
    entry = next(r for r in runs if r["id"] == run_id)
    assert entry["status"] == "done" and entry["gate"] in ("pass", "fail") and entry["done"] == 8

    run = client.get(f"/api/audits/runs/{run_id}").json()
    s = run["summary"]
    gate = run["gate"]  # stored with the run, failed checks first
    assert gate["policy"]["name"] == "demo tile line gate" and gate["policy"]["sha256"]
    statuses = [c["status"] for c in gate["checks"]]
    assert statuses == sorted(statuses, key=lambda st: st != "fail")
    assert entry["gate"] == ("pass" if gate["passed"] else "fail")
    assert run["injection_sentence"].startswith("Pasting the suspect patch")
    assert s["injection"]["settings"]["source"].endswith("policy-demo-tag.png")  # as `--inject-patch FILE` says
    assert "evidence" in run["caution"]

    flagged = client.get(f"/api/audits/runs/{run_id}/flagged").json()
    assert flagged["flagged_count"] == len(s["flagged_images"])
    for img in flagged["images"]:
        assert img["image"].startswith("data:image/png;base64,") and img["overlay"].startswith("data:image/png")

    one = client.get(f"/api/audits/runs/{run_id}/image", params={"rel": "crack/crack_00002.png"}).json()
    assert one["result"]["predicted_label"] in ("sound", "crack", "chip", "bubble")
    assert one["overlay"].startswith("data:image/png") and one["scale"]["vmax"] >= one["scale"]["vmin"]

    mm = client.get(f"/api/audits/runs/{run_id}/mean-maps").json()
    assert {m["class"] for m in mm["maps"]} <= {"sound", "crack", "chip", "bubble"}
    g = client.get(f"/api/audits/runs/{run_id}/gallery").json()
    assert g["layer"] == "features.block1.relu" and len(g["channels"][0]["patches"]) == 3
    assert g["channels"][0]["visual"].startswith("data:image/png")
    png = client.get(f"/api/audits/runs/{run_id}/artefact", params={"name": "injection/patch"})
    assert png.status_code == 200 and png.content.startswith(b"\x89PNG")

    html = client.get(f"/api/audits/runs/{run_id}/report.html")
    assert html.status_code == 200 and "attachment" in html.headers["content-disposition"]
    assert run["model_fingerprint"] in html.text
    pdf = client.get(f"/api/audits/runs/{run_id}/report.pdf")
    assert pdf.status_code == 200 and pdf.content.startswith(b"%PDF")

    other = client.post("/api/audits", json={"source": body["source"], "method": "occlusion",
                                             "params": {"patch": 16, "stride": 16}})
    other_id = _wait(client, other.json()["id"])["run_id"]
    diff = client.get("/api/audits/compare", params={"first": run_id, "second": other_id}).json()
    assert diff["same_dataset"] and diff["settings_changed"]["audit.method"]["second"] == "occlusion"

    assert client.delete(f"/api/audits/runs/{other_id}").status_code == 200
    assert client.get(f"/api/audits/runs/{other_id}").status_code == 404


def test_cancel_then_resume(client: TestClient) -> None:
    body = {"source": {"kind": "demo", "per_class": 12, "seed": 2}, "method": "occlusion",
            "params": {"patch": 8, "stride": 4}}
    job = client.post("/api/audits", json=body).json()
    deadline = time.time() + 60
    while True:  # cancel once some images are stored
        s = client.get(f"/api/audits/jobs/{job['id']}").json()
        if s["phase"] == "images" and s["done"] > 0:
            break
        assert time.time() < deadline and s["state"] in ("queued", "running"), s
        time.sleep(0.02)
    cancelled = client.post(f"/api/audits/jobs/{job['id']}/cancel").json()
    status = _wait(client, cancelled["id"])
    assert status["state"] == "cancelled", status
    run = client.get(f"/api/audits/runs/{status['run_id']}").json()
    assert run["status"] == "cancelled" and run["resumable"] and run["done"] < 48
    resumed = client.post(f"/api/audits/runs/{run['id']}/resume")
    assert resumed.status_code == 200, resumed.text
    final = _wait(client, resumed.json()["id"])
    assert final["state"] == "done" and final["run_id"] == run["id"]
    done = client.get(f"/api/audits/runs/{run['id']}").json()
    assert done["status"] == "done" and done["summary"]["timing"]["images_reused"] == run["done"]


@pytest.mark.parametrize("body, status, message", [
    ({"source": {"kind": "demo"}, "method": "nope"}, 422, "unknown attribution method"),
    ({"source": {"kind": "demo"}, "method": "occlusion", "params": {"stride": 0}}, 422, "stride"),
    ({"source": {"kind": "folder", "path": "x"}}, 422, "no image folder"),
    ({"source": {"kind": "demo"}, "policy": "nope"}, 404, "no policy named"),
    ({"source": {"kind": "demo", "per_class": 0}}, 422, "per_class"),
    ({"source": {"kind": "demo"}, "model": "other"}, 404, "no model named"),
])
def test_bad_requests(client: TestClient, body: dict, status: int, message: str) -> None:
    r = client.post("/api/audits", json=body)
    assert r.status_code == status, r.text
    assert message in r.json()["detail"]


def test_bad_upload_patch_is_refused_before_the_job(client: TestClient) -> None:
    before = len(client.get("/api/audits/runs").json()["runs"])
    body = {"source": {"kind": "demo", "per_class": 2}, "injection": {
        "kind": "upload", "suspect_class": "crack", "at": [1, 1],
        "patch_png": base64.b64encode(b"not a png").decode()}}
    r = client.post("/api/audits", json=body)
    assert r.status_code == 415 and "not an image" in r.json()["detail"], r.text
    assert len(client.get("/api/audits/runs").json()["runs"]) == before


def test_unknown_run_and_job(client: TestClient) -> None:
    assert client.get("/api/audits/runs/nope").status_code == 404
    assert client.get("/api/audits/jobs/nope").status_code == 404
    assert client.get("/api/audits/runs/nope/report.html").status_code == 404


def test_unusable_data_folder(tmp_path: Path) -> None:
    (tmp_path / "file").write_text("x")
    app = create_app(Settings(models=(str(_tiny_model(tmp_path / "m")),), include_bundled=False,
                              data_dir=tmp_path / "file"))
    with TestClient(app) as c:
        r = c.get("/api/audits/runs")
        assert r.status_code == 503 and "not a folder" in r.json()["detail"]
