"""Discovery and confirmation through the API, the stored run and the audits page.

The demo model ``tilenet`` learned the orange calibration tag (see its model card); on a demo
folder where half of every class carries the tag, the default audit must rank the tagged cracks
first and confirm them. The page is checked in Debian's Chromium (browser marker).
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from pellucid.core.model.bundled import bundled_spec_path
from pellucid.web.app import create_app
from pellucid.web.settings import Settings

CHROMIUM = Path("/usr/bin/chromium")
SCREENSHOTS = Path(__file__).resolve().parents[1] / "test-artifacts" / "screenshots"
DEMO = {"kind": "demo", "split": "clean", "per_class": 12, "seed": 3}


def _settings(root: Path) -> Settings:
    return Settings(models=(str(bundled_spec_path("tilenet")),), include_bundled=False, data_dir=root / "data")


def _wait(client: TestClient, job_id: str, timeout: float = 600.0) -> dict:
    deadline = time.time() + timeout
    while True:
        status = client.get(f"/api/audits/jobs/{job_id}").json()
        if status["state"] in ("done", "failed", "cancelled"):
            return status
        assert time.time() < deadline, status
        time.sleep(0.1)


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    with TestClient(create_app(_settings(tmp_path_factory.mktemp("discovery-web")))) as c:
        yield c


@pytest.fixture(scope="module")
def default_run(client: TestClient) -> str:
    started = client.post("/api/audits", json={"source": DEMO})
    assert started.status_code == 200, started.text
    status = _wait(client, started.json()["id"])
    assert status["state"] == "done", status
    return status["run_id"]


def test_default_audit_through_the_api_discovers_and_confirms(client: TestClient, default_run: str) -> None:
    run = client.get(f"/api/audits/runs/{default_run}").json()
    assert run["method"] == "gradcam"  # no method asked: the default for a model with hooks
    assert run["settings"]["audit"]["discovery"] and run["settings"]["audit"]["confirmation"]
    d = client.get(f"/api/audits/runs/{default_run}/discovery").json()
    scores = [c["suspicion"] for c in d["clusters"]]
    assert scores == sorted(scores, reverse=True)
    top = d["clusters"][0]
    assert top["class"] == "crack" and top["placement"]["region"] == "bottom_right"
    assert top["confirmation"]["confirmed"] and top["key"] in d["confirmation"]["confirmed_clusters"]
    assert top["mean_png"].startswith("data:image/png;base64,")
    assert all(t["png"].startswith("data:image/png") for t in top["thumbnails"])
    assert top["pictures"]["region"].startswith("data:image/png")
    assert top["channels"]["layer"] and len(top["channels"]["channels"]) == 8
    assert "not proof" in d["caution"]


def test_discovery_can_be_turned_off(client: TestClient) -> None:
    started = client.post("/api/audits", json={"source": DEMO, "discovery": False})
    status = _wait(client, started.json()["id"])
    assert status["state"] == "done", status
    r = client.get(f"/api/audits/runs/{status['run_id']}/discovery")
    assert r.status_code == 404
    assert r.json()["detail"].startswith(f"run {status['run_id']} ran no discovery")


def test_a_channel_layer_without_a_map_is_refused_before_the_job(client: TestClient) -> None:
    before = len(client.get("/api/audits/runs").json()["runs"])
    r = client.post("/api/audits", json={"source": DEMO, "channel_layer": "no.such.layer"})
    assert 400 <= r.status_code < 500
    assert "the channel layer 'no.such.layer' cannot be ranked" in r.json()["detail"]
    assert len(client.get("/api/audits/runs").json()["runs"]) == before


def test_unknown_run_is_a_404_sentence(client: TestClient) -> None:
    r = client.get("/api/audits/runs/nope/discovery")
    assert r.status_code == 404 and r.json()["detail"]


@pytest.mark.browser
@pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's Chromium is not installed at /usr/bin/chromium")
def test_the_run_view_shows_the_clusters_and_the_verdict(tmp_path: Path) -> None:
    import uvicorn
    from playwright.sync_api import sync_playwright

    settings = _settings(tmp_path)
    app = create_app(settings)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", lifespan="on"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.time() + 30
    while not server.started:
        assert time.time() < deadline and thread.is_alive(), "uvicorn did not start"
        time.sleep(0.05)
    try:
        import httpx

        base = f"http://127.0.0.1:{port}"
        job = httpx.post(f"{base}/api/audits", json={"source": DEMO}, timeout=60).json()["id"]
        while httpx.get(f"{base}/api/audits/jobs/{job}", timeout=60).json()["state"] not in ("done", "failed"):
            time.sleep(0.2)
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=[
                "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                "--disable-sync", "--no-first-run"])
            try:
                page = browser.new_page(viewport={"width": 1280, "height": 900})
                errors: list[str] = []
                page.on("pageerror", lambda e: errors.append(str(e)))
                page.goto(f"{base}/audits")
                page.locator("#runs-table button:has-text('open')").first.click()
                page.locator("#discovery .cluster-row").first.wait_for(timeout=60_000)
                assert page.locator("#discovery-box").is_visible()
                first = page.locator("#discovery .cluster-row").first
                assert "crack/" in first.inner_text() and "confirmed shortcut" in first.inner_text()
                assert "not proof" in page.locator("#discovery-caution").inner_text()
                SCREENSHOTS.mkdir(parents=True, exist_ok=True)
                page.locator("#discovery-box").screenshot(path=str(SCREENSHOTS / "audit_discovery.png"))
                assert errors == []
            finally:
                browser.close()
    finally:
        server.should_exit = True
        thread.join(timeout=30)
