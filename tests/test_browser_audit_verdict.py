"""The audits page in a real browser shows the stored verdict, the injection counts and the unreadable images.

A run is audited from the command line (a policy that fails because one file is not an image, an
injection test at random places), then a live uvicorn serves the same store and Debian's Chromium
opens the run. Run with ``pytest -m browser``; the screenshot lands in test-artifacts/screenshots/.
"""

from __future__ import annotations

import json
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from _chromium import CHROMIUM, CHROMIUM_ARGS, SCREENSHOTS
from conftest import png_bytes, synthetic_tile, write_tiny_spec
from test_browser import _free_port

from pellucid.cli import main

SIZE = 64

pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's Chromium is not installed at /usr/bin/chromium"),
]


@pytest.fixture(scope="module")
def audited(tmp_path_factory) -> tuple[Path, str]:
    root = tmp_path_factory.mktemp("browser-verdict")
    spec = write_tiny_spec(root / "model", name="plain", size=SIZE, samples=False)
    data = root / "images" / "folder"
    for label, seeds in (("sound", (1, 2)), ("crack", (3, 4))):
        (data / label).mkdir(parents=True)
        for s in seeds:
            (data / label / f"{s}.png").write_bytes(png_bytes(synthetic_tile(seed=s, size=SIZE)))
    (data / "sound" / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n cut short")
    (root / "mark.png").write_bytes(png_bytes(np.full((6, 6, 3), 250, dtype=np.uint8)))
    (root / "gate.toml").write_text('name = "strict gate"\n[thresholds]\nmin_accuracy = 0.0\nmax_failed_images = 0\n',
                                    encoding="utf-8")
    code = main(["audit", "--model", str(spec), "--data", str(data), "--out", str(root / "out"), "--store",
                 str(root / "data"), "--policy", str(root / "gate.toml"), "--inject-patch", str(root / "mark.png"),
                 "--inject-at", "random", "--inject-class", "crack", "--quiet"])
    assert code == 1
    run_id = json.loads((root / "out" / "summary.json").read_text())["run"]["id"]
    return root, run_id


@pytest.fixture(scope="module")
def server(audited):
    import uvicorn

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    root, _ = audited
    settings = Settings(models=(str(root / "model" / "spec.toml"),), include_bundled=False,
                        image_root=root / "images", data_dir=root / "data")
    port = _free_port()
    server = uvicorn.Server(uvicorn.Config(create_app(settings), host="127.0.0.1", port=port, log_level="warning"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.time() + 30
    while not server.started:
        assert time.time() < deadline and thread.is_alive(), "uvicorn did not start"
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)


def test_run_view_shows_verdict_counts_and_unreadable_images(server, audited):
    from playwright.sync_api import sync_playwright

    _, run_id = audited
    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=CHROMIUM_ARGS)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 900})
            page.set_default_timeout(30_000)
            page.goto(f"{server}/audits?run={run_id}")
            page.locator(f"#run-view[data-loaded='{run_id}']").wait_for()  # every part drawn
            page.locator("#unreadable-box:not([hidden])").wait_for()
            verdict = page.locator("#run-verdict").inner_text()
            assert "Gate FAIL under policy “strict gate”" in verdict and "Stored with the run" in verdict
            assert page.locator("#run-verdict li").first.inner_text().startswith("FAIL")
            injection = page.locator("#injection-text").inner_text()
            assert "eligible" in injection and "skipped" in injection and "random place" in injection
            assert "sound/broken.png" in page.locator("#unreadable-table").inner_text()
            heads = page.locator("#class-table thead").inner_text()
            assert "on object" not in heads  # no boxes or masks in this folder
            row = page.locator("#runs-table tbody tr", has_text=run_id)
            assert "FAIL" in row.inner_text()
            SCREENSHOTS.mkdir(parents=True, exist_ok=True)
            page.screenshot(path=str(SCREENSHOTS / "audit-run-verdict.png"), full_page=True)
        finally:
            browser.close()
