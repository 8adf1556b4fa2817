"""The jobs panel, the models folder, the skip link and phone width, in a real browser.

Debian's Chromium driven by Playwright against a live uvicorn on 127.0.0.1. The served model can be
slowed down from the test (``_slow_model.py``: the server runs in this process), so a
weight-randomisation check and an audit are caught running and cancelled from the panel. Run with
``pytest -m browser tests/test_browser_jobs.py``; screenshots land in test-artifacts/screenshots/.
"""

from __future__ import annotations

import time
from collections.abc import Iterator

import httpx
import pytest
from _chromium import BROWSER_MARKS, SCREENSHOTS
from _live import live_server
from _slow_model import slow_down, write_slow_spec
from conftest import png_bytes, synthetic_tile, write_tiny_spec

pytestmark = BROWSER_MARKS

PAGES = ("/", "/model", "/image", "/audits", "/compare", "/docs")
PHONE = {"width": 390, "height": 844}  # a common phone held upright, in CSS pixels


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    from pellucid.web.settings import Settings

    root = tmp_path_factory.mktemp("browser-jobs")
    spec = write_slow_spec(root / "slowtile")
    folder = root / "specs"
    write_tiny_spec(folder / "second", name="second", seed=1, samples=False)
    outside = write_tiny_spec(root / "elsewhere", name="elsewhere", seed=2, samples=False)
    (folder / "outside.toml").symlink_to(outside)
    settings = Settings(models=(str(spec),), include_bundled=False, models_dir=folder, data_dir=root / "data")
    try:
        with live_server(settings) as base:
            yield base
    finally:
        slow_down(0)


def _page(browser, viewport=None):
    # Playwright's wait_for_function evaluates strings, which the server's content security policy
    # forbids; these contexts bypass it (test_browser_security.py keeps it on).
    context = browser.new_context(viewport=viewport or {"width": 1280, "height": 900}, bypass_csp=True)
    page = context.new_page()
    page.set_default_timeout(60_000)
    return context, page


@pytest.fixture()
def page(browser):
    context, p = _page(browser)
    yield p
    context.close()


def _shot(page, name: str, *, full: bool = True) -> None:
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / f"{name}.png"), full_page=full)


def _finished_map(base: str, *, seed: int) -> dict:
    """Upload a tile and make its Grad-CAM map at full speed; returns the finished job's listing row."""
    with httpx.Client(base_url=base, timeout=60) as c:
        image = c.post("/api/images", files={"file": (f"tile-{seed}.png", png_bytes(synthetic_tile(seed=seed)),
                                                        "image/png")}).json()
        job = c.post("/api/jobs", json={"image": image["id"], "method": "gradcam"}).json()
        for _ in range(600):
            row = next(j for j in c.get("/api/jobs").json()["jobs"] if j["id"] == job["id"])
            if row["state"] == "done":
                return row
            assert row["state"] in ("queued", "running"), row
            time.sleep(0.05)
    raise AssertionError("the map did not finish")


def _open_panel(page) -> None:
    page.click("#jobs-toggle")
    page.wait_for_function("document.querySelector('#jobs-panel').dataset.loaded === 'true' && "
                           "!document.querySelector('#jobs-panel').hidden")


def test_panel_lists_and_cancels_a_running_weight_randomisation_check(server: str, page) -> None:
    made = _finished_map(server, seed=11)
    slow_down(3.0)  # three seconds per map: the check runs long enough to be seen and cancelled
    try:
        with httpx.Client(base_url=server, timeout=60) as c:
            check = c.post(f"/api/results/{made['result_id']}/sanity").json()
        page.goto(server + "/model")
        page.wait_for_function("document.querySelector('#jobs-count').dataset.busy === 'true'")
        assert int(page.inner_text("#jobs-count")) >= 1
        _open_panel(page)
        row = page.locator(f'.job-row[data-id="{check["id"]}"]')
        page.wait_for_function(f"document.querySelector('.job-row[data-id=\"{check['id']}\"]')?.dataset.state "
                               "=== 'running' && document.querySelector('.job-row[data-id=\"" + check["id"] +
                               "\"] .job-line').innerText.includes(' maps')")
        assert "Weight-randomisation check" in row.inner_text()
        assert "slowtile" in row.locator(".job-subject").inner_text()
        _shot(page, "jobs-panel-sanity-running", full=False)
        row.locator("button.job-cancel").click()
        page.wait_for_function(f"document.querySelector('.job-row[data-id=\"{check['id']}\"]').dataset.state "
                               "=== 'cancelled'")
    finally:
        slow_down(0)
    assert not row.locator("button.job-cancel").is_visible()
    assert "stopped after" in row.locator(".job-line").inner_text()
    page.wait_for_function("document.querySelector('#jobs-announce').textContent"
                           ".includes('Weight-randomisation check cancelled')")  # said to screen readers
    with httpx.Client(base_url=server, timeout=60) as c:
        assert c.get(f"/api/jobs/{check['id']}").json()["state"] == "cancelled"
    # The finished map's row links to the image page with that map open.
    done_row = page.locator(f'.job-row[data-id="{made["id"]}"]')
    assert done_row.get_attribute("data-state") == "done"
    href = done_row.locator("a.job-link").get_attribute("href")
    assert href == f"/image?model=slowtile&image={made['image']}&map={made['result_id']}"


def test_panel_cancels_a_running_audit_and_links_its_run(server: str, page) -> None:
    slow_down(0.2)
    try:
        with httpx.Client(base_url=server, timeout=120) as c:
            job = c.post("/api/audits", json={"source": {"kind": "demo", "split": "clean", "per_class": 10, "seed": 5},
                                              "method": "gradcam", "discovery": False}).json()
        page.goto(server + "/audits")
        _open_panel(page)
        selector = f'.job-row[data-id="{job["id"]}"]'
        page.wait_for_function(f"document.querySelector('{selector}')?.dataset.state === 'running' && "
                               f"document.querySelector('{selector} .job-line').innerText.includes('of 40 images')")
        row = page.locator(selector)
        assert "Folder audit" in row.inner_text()
        _shot(page, "jobs-panel-audit-running", full=False)
        row.locator("button.job-cancel").click()
        page.wait_for_function(f"document.querySelector('{selector}').dataset.state === 'cancelled'")
    finally:
        slow_down(0)
    assert "of 40 images" in row.locator(".job-line").inner_text()
    href = row.locator("a.job-link").get_attribute("href")
    assert href.startswith("/audits?run=")
    run_id = href.split("=", 1)[1]
    with httpx.Client(base_url=server, timeout=60) as c:
        run = c.get(f"/api/audits/runs/{run_id}").json()
    assert run["status"] == "cancelled" and run["done"] < 40


def test_panel_opens_and_closes_from_the_keyboard(server: str, page) -> None:
    page.goto(server + "/")
    page.focus("#jobs-toggle")
    page.keyboard.press("Enter")
    page.wait_for_function("!document.querySelector('#jobs-panel').hidden")
    assert page.get_attribute("#jobs-toggle", "aria-expanded") == "true"
    page.keyboard.press("Tab")  # into the panel
    assert page.evaluate("document.querySelector('#jobs-panel').contains(document.activeElement)")
    page.keyboard.press("Escape")
    assert page.locator("#jobs-panel").is_hidden()
    assert page.evaluate("document.activeElement.id") == "jobs-toggle"
    assert page.get_attribute("#jobs-toggle", "aria-expanded") == "false"


def test_add_a_model_from_the_models_folder(server: str, page) -> None:
    page.goto(server + "/model")
    page.wait_for_function("document.body.dataset.ready === 'true'")
    page.locator("#add-model").wait_for(state="visible")
    page.click("#add-model summary")
    options = page.locator("#add-model-file option").all_inner_texts()
    assert any(o.startswith("second/spec.toml") for o in options)
    assert not any("outside" in o for o in options)  # a link that leads out of the folder is not offered
    page.select_option("#add-model-file", "second/spec.toml")
    _shot(page, "model-add-from-folder", full=False)
    page.click("#add-model-button")
    page.wait_for_function("document.querySelector('#model-select').value === 'second' && "
                           "document.querySelector('#model-name').innerText === 'second'")
    assert "Added second" in page.inner_text("#add-model-note")
    page.reload()
    assert "second" in page.locator("#model-select option").all_inner_texts()
    # Wherever the picker sits (right of the heading here, left in the audit form), the form opens on screen.
    for path in ("/model", "/audits"):
        page.goto(server + path)
        page.locator("#add-model").wait_for(state="visible")
        page.click("#add-model summary")
        box = page.locator(".add-model-body").bounding_box()
        assert box["x"] >= 0 and box["x"] + box["width"] <= 1280, (path, box)


@pytest.mark.parametrize("path", PAGES)
def test_no_page_scrolls_sideways_at_phone_width(server: str, browser, path: str) -> None:
    context, page = _page(browser, PHONE)
    try:
        page.goto(server + path)
        page.wait_for_load_state("networkidle")
        width = page.evaluate("document.documentElement.scrollWidth")
        assert width <= PHONE["width"], f"{path} is {width} px wide at {PHONE['width']} px"
        if path == "/model":
            _open_panel(page)
            assert page.evaluate("document.documentElement.scrollWidth") <= PHONE["width"]
        _shot(page, "phone" + (path.replace("/", "-") if path != "/" else "-server"))
    finally:
        context.close()


@pytest.mark.parametrize("path", ("/", "/model"))
def test_skip_link_first_and_no_hidden_tab_stops(server: str, page, path: str) -> None:
    page.goto(server + path)
    page.wait_for_load_state("networkidle")
    page.keyboard.press("Tab")
    assert page.evaluate("document.activeElement.className") == "skip-link"
    box = page.locator(".skip-link").bounding_box()
    assert box["y"] >= 0 and box["width"] > 20  # shown while it has the focus
    # Every further tab stop is something a sighted keyboard user can see.
    seen = 0
    for _ in range(80):
        page.keyboard.press("Tab")
        hidden = page.evaluate("""() => {
            const e = document.activeElement;
            if (!e || e === document.body) return null;
            const r = e.getBoundingClientRect();
            const s = getComputedStyle(e);
            const invisible = r.width < 2 || r.height < 2 || s.visibility === 'hidden' || s.opacity === '0'
                || e.closest('[hidden]') !== null;
            return invisible ? (e.id || e.outerHTML.slice(0, 80)) : '';
        }""")
        if hidden is None:
            break
        assert hidden == "", f"{path}: a tab stop nobody can see: {hidden}"
        seen += 1
    assert seen >= 5
    page.focus(".skip-link")
    page.keyboard.press("Enter")
    assert page.evaluate("document.activeElement.id") == "main"


def test_an_open_map_and_an_open_audit_run_fit_a_phone(server: str, browser) -> None:
    """The widest views: the image page with a map open, the audits page with a finished run open."""
    made = _finished_map(server, seed=12)
    with httpx.Client(base_url=server, timeout=120) as c:
        job = c.post("/api/audits", json={"source": {"kind": "demo", "split": "clean", "per_class": 2, "seed": 6},
                                          "method": "gradcam"}).json()
        for _ in range(2400):
            row = next(j for j in c.get("/api/jobs").json()["jobs"] if j["id"] == job["id"])
            if row["state"] not in ("queued", "running"):
                break
            time.sleep(0.05)
    assert row["state"] == "done", row
    context, page = _page(browser, PHONE)
    try:
        for name, path in (("phone-image-map", made["link"]), ("phone-audit-run", row["link"])):
            page.goto(server + path)
            page.wait_for_load_state("networkidle")
            if name == "phone-image-map":
                page.locator("#result-view").wait_for(state="visible")
            else:
                page.locator("#run-view").wait_for(state="visible")
            width = page.evaluate("document.documentElement.scrollWidth")
            assert width <= PHONE["width"], f"{path} is {width} px wide at {PHONE['width']} px"
            _shot(page, name)
    finally:
        context.close()
