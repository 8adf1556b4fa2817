"""The image page and side by side in Chromium: durable (reload and server restart over the same store keep
the page and its maps), bound (a map appears only under the image it was started for), cost before work, the
keyboard read-out, and cancel on side by side.

A tiny CNN that can be slowed down (tests/_slow_model.py) makes jobs long enough to act while they run.
"""

from __future__ import annotations

import dataclasses
import json
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import pytest
from _chromium import BROWSER_MARKS, SCREENSHOTS
from _live import live_server
from _slow_model import slow_down, write_slow_spec

pytestmark = BROWSER_MARKS


@pytest.fixture(scope="module")
def settings(tmp_path_factory: pytest.TempPathFactory):
    """Two slow-capable models (separate names, so each keeps its own measured forward time)."""
    from pellucid.web.settings import Settings

    base = tmp_path_factory.mktemp("durable")
    quick = write_slow_spec(base / "slowtile", name="slowtile")
    costly = write_slow_spec(base / "slowcostly", name="slowcostly")
    return Settings(models=(str(quick), str(costly)), include_bundled=False, data_dir=base / "store")


@pytest.fixture(scope="module")
def server(settings) -> Iterator[str]:
    slow_down(0)
    with live_server(settings) as url:
        yield url
    slow_down(0)


@pytest.fixture()
def page(browser):
    # Playwright's waiting helpers evaluate strings, which the server's content security policy forbids.
    context = browser.new_context(viewport={"width": 1280, "height": 900}, bypass_csp=True)
    p = context.new_page()
    p.set_default_timeout(60_000)
    yield p
    context.close()


def _shot(page, name: str) -> None:
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / f"{name}.png"), full_page=True)


def _ready(page) -> None:
    page.wait_for_function("document.body.dataset.ready === 'true'")


def _open_sample(page, name: str) -> None:
    page.locator("#samples button.sample", has_text=name).click()
    page.wait_for_function(f"document.querySelector('#image-name').textContent === {json.dumps(name)}")
    page.locator("#evidence").wait_for(state="visible")


def _set_params(page, **params) -> None:
    for name, value in params.items():
        field = page.locator(f"#param-{name}")
        if field.evaluate("e => e.tagName") == "SELECT":
            field.select_option(str(value))
        else:
            field.fill(str(value))
    page.locator("#method-params").dispatch_event("change")


def _get(url: str) -> dict:
    with urllib.request.urlopen(url, timeout=30) as r:
        return json.loads(r.read())


def test_switching_image_during_a_job_keeps_the_map_with_its_image(server: str, page) -> None:
    page.goto(server + "/image?model=slowtile")
    _ready(page)
    _open_sample(page, "tile-0.png")
    first = page.url.split("image=")[1].split("&")[0]
    page.select_option("#method-select", "occlusion")
    _set_params(page, patch=2, stride=2, engine="naive")  # 16 × 16 = 256 positions, one forward each
    slow_down(0.01)
    try:
        page.click("#run-button")
        page.wait_for_function("document.querySelector('#job-text').textContent.includes('of 256 patch positions')")
        _open_sample(page, "tile-1.png")  # another image while the job runs
        second = page.url.split("image=")[1].split("&")[0]
        assert second != first
        page.wait_for_function("document.querySelector('#job-text').textContent.includes('not the image shown')")
        _shot(page, "durable-job-elsewhere-running")
        page.wait_for_function("document.querySelector('#job-text').textContent.includes('kept with that image')")
    finally:
        slow_down(0)
    # Nothing of the first image's map is shown or listed under the second image.
    assert page.locator("#result-view").is_hidden()
    assert page.locator("#result-strip .strip-item").count() == 0
    assert page.locator("#strip-empty").is_visible()
    assert _get(f"{server}/api/images/{second}/maps")["maps"] == []
    _shot(page, "durable-job-elsewhere-finished")
    # The map is under its own image: open that image from the recent list and the map is there.
    page.locator(f"#recent li[data-id='{first}'] button.sample").click()
    page.locator("#result-strip .strip-item").first.wait_for()
    page.locator("#result-strip .strip-item").first.click()
    page.locator("#result-view").wait_for(state="visible")
    assert "cclusion" in page.inner_text("#result-title")
    assert f"image={first}" in page.url and "map=" in page.url
    # The method form shows what produced the map on screen.
    assert page.input_value("#method-select") == "occlusion" and page.input_value("#param-patch") == "2"


def test_reload_and_a_server_restart_keep_the_page_and_its_maps(settings, browser, tmp_path: Path) -> None:
    fresh = dataclasses.replace(settings, data_dir=tmp_path / "store")
    context = browser.new_context(viewport={"width": 1280, "height": 900}, bypass_csp=True)
    page = context.new_page()
    page.set_default_timeout(60_000)
    try:
        with live_server(fresh) as url:
            port = url.rsplit(":", 1)[1]
            page.goto(url + "/image?model=slowtile")
            _ready(page)
            _open_sample(page, "tile-2.png")
            page.select_option("#method-select", "gradcam")
            page.click("#run-button")
            page.locator("#result-view").wait_for(state="visible")
            link = page.locator("#result-link").get_attribute("href")
            map_id = page.url.split("map=")[1].split("&")[0]
            assert link.endswith(f"&map={map_id}")
            title = page.inner_text("#result-title")
            page.reload()
            _ready(page)
            page.locator("#result-view").wait_for(state="visible")
            assert page.inner_text("#result-title") == title
            assert page.input_value("#method-select") == "gradcam"
            # Another image is a new history entry: Back brings the first image and its map again.
            _open_sample(page, "tile-0.png")
            assert page.locator("#result-view").is_hidden()
            page.go_back()
            page.wait_for_function("document.querySelector('#image-name').textContent === 'tile-2.png'")
            page.locator("#result-view").wait_for(state="visible")
            assert page.inner_text("#result-title") == title
        page.goto("about:blank")
        # A new server process over the same store folder, on the same address.
        with live_server(dataclasses.replace(fresh, port=int(port))) as again:
            page.goto(again + link)
            _ready(page)
            page.locator("#result-view").wait_for(state="visible")
            assert page.inner_text("#result-title") == title
            assert page.inner_text("#image-name") == "tile-2.png"
            assert page.locator("#result-strip .strip-item").count() == 1
            assert page.locator("#recent li").count() == 2  # tile-2 and tile-0, both kept in the store
            _shot(page, "durable-after-restart")
            # Forget the other image: it leaves the list and the store; the one on screen stays.
            page.once("dialog", lambda dialog: dialog.accept())
            page.locator("#recent li", has_text="tile-0.png").locator("button.forget").click()
            page.wait_for_function("document.querySelectorAll('#recent li').length === 1")
            assert [i["name"] for i in _get(again + "/api/images")] == ["tile-2.png"]
            assert page.locator("#result-view").is_visible()
    finally:
        context.close()


def test_a_long_map_asks_before_it_starts(server: str, page) -> None:
    slow_down(0.05)  # measured once per model: every forward of 'slowcostly' now costs about 50 ms
    try:
        page.goto(server + "/image?model=slowcostly")
        _ready(page)
        _open_sample(page, "tile-0.png")
        page.select_option("#method-select", "occlusion")
        _set_params(page, patch=1, stride=1, engine="naive")  # 32 × 32 = 1,024 forwards ≈ 50 s
        page.wait_for_function("document.querySelector('#method-cost').textContent.includes('1,024 patch positions')")
        page.click("#run-button")
        page.locator("#cost-confirm").wait_for(state="visible")
        text = page.inner_text("#cost-confirm-text")
        assert "more than 30 s" in text and "1,024 patch positions" in text
        _shot(page, "durable-cost-confirm")
        # The same weights are served as 'slowtile' too; that model's maps of this image are not listed here.
        assert page.locator("#result-strip .strip-item").count() == 0
        page.click("#cost-stop")
        assert page.locator("#cost-confirm").is_hidden()
        assert page.locator("#job-box").is_hidden()
        jobs = _get(server + "/api/jobs")["jobs"]
        assert not [j for j in jobs if j.get("model") == "slowcostly" and j["kind"] == "occlusion"]
    finally:
        slow_down(0)


def test_map_read_out_by_keyboard_and_no_hidden_tab_stops(server: str, page) -> None:
    page.goto(server + "/image?model=slowtile")
    _ready(page)
    _open_sample(page, "tile-1.png")
    page.select_option("#method-select", "saliency")
    page.click("#run-button")
    page.locator("#result-view").wait_for(state="visible")
    result_id = page.url.split("map=")[1].split("&")[0]
    values = _get(f"{server}/api/results/{result_id}")["values"]
    stack = page.locator("#result-stack")
    assert stack.get_attribute("tabindex") == "0"
    stack.focus()
    page.keyboard.press("ArrowDown")  # first key: the centre cell
    page.keyboard.press("ArrowRight")
    rows, cols = len(values), len(values[0])
    row, col = rows // 2, cols // 2 + 1
    readout = page.inner_text("#result-readout")
    assert readout.startswith(f"pixel ({col}, {row}):"), readout
    assert page.locator("#result-stack .crosshair").is_visible()
    # The read-out prints the stored value to 4 significant figures (toExponential(3) for small values).
    shown = float(readout.split(":")[1].split("·")[0])
    assert abs(shown - values[row][col]) <= max(5e-5, 5e-4 * abs(values[row][col]))
    _shot(page, "durable-keyboard-readout")
    # The weight-randomisation chart counts whole steps: every label on its x axis is an integer
    # (common practice, no source: a count has no fractions).
    page.click("#sanity-button")  # straight from the focused map: the click must land
    page.locator("#sanity-chart").wait_for()
    ticks = page.locator("#sanity-chart text.chart-tick[text-anchor='middle']").evaluate_all(
        "nodes => nodes.map((n) => n.textContent)")
    assert ticks and all(t.strip().isdigit() for t in ticks), ticks
    page.locator("#sanity-out").scroll_into_view_if_needed()
    page.screenshot(path=str(SCREENSHOTS / "durable-sanity-chart.png"))
    # Walk the whole page by Tab: no stop on an element that cannot be seen (the hidden file input).
    page.locator("body").focus()
    seen = []
    for _ in range(80):
        page.keyboard.press("Tab")
        info = page.evaluate("""() => { const a = document.activeElement;
            const r = a.getBoundingClientRect();
            const shown = r.width > 2 && r.height > 2 && getComputedStyle(a).visibility !== 'hidden';
            return {id: a.id, tag: a.tagName, visible: shown}; }""")
        seen.append(info)
    assert all(s["id"] != "file-input" for s in seen)
    assert all(s["visible"] for s in seen if s["tag"] != "BODY"), [s for s in seen if not s["visible"]]
    assert any(s["id"] == "result-stack" for s in seen)


def test_side_by_side_cancels_both_jobs_and_says_when_models_differ(server: str, page) -> None:
    page.goto(server + "/compare")
    _ready(page)
    page.select_option("#model-a", "slowtile")
    page.select_option("#model-b", "slowtile")
    page.select_option("#method-select", "occlusion")
    _set_params(page, patch=1, stride=1, engine="naive")
    page.wait_for_function("document.querySelector('#image-a').value.includes(':')")
    slow_down(0.01)
    try:
        page.click("#compare-run")
        page.wait_for_function("document.querySelector('#job-a span').textContent.includes('patch positions')")
        assert page.locator("#compare-cancel").is_enabled()
        page.click("#compare-cancel")
        page.wait_for_function("document.querySelector('#compare-error').textContent.includes('cancelled')")
    finally:
        slow_down(0)
    assert page.locator("#stack-a").is_hidden() and page.locator("#stack-b").is_hidden()
    # Two different models on one scale: the page says so.
    page.select_option("#model-b", "slowcostly")
    page.select_option("#method-select", "gradcam")
    page.wait_for_function("document.querySelector('#image-b').value.includes(':')")
    page.click("#compare-run")
    page.wait_for_function("document.body.dataset.compared === 'true'")
    assert "different models" in page.inner_text("#scale-note")
    # This untrained net's last feature map has no positive Grad-CAM evidence (seen on these tiles): each
    # side says so beside its map rather than showing a blank scale.
    assert "zero everywhere" in page.inner_text("#warning-a") and "zero everywhere" in page.inner_text("#warning-b")
    assert page.locator("#stack-a").is_visible() and page.locator("#stack-b").is_visible()
    _shot(page, "durable-compare-two-models")


def test_a_new_job_clears_the_last_error(server: str, page) -> None:
    page.goto(server + "/image?model=slowtile")
    _ready(page)
    _open_sample(page, "tile-2.png")
    page.select_option("#method-select", "occlusion")
    _set_params(page, patch=0)
    page.click("#run-button")
    page.locator("#job-error").wait_for(state="visible")
    assert "patch" in page.inner_text("#job-error")
    _set_params(page, patch=8, stride=8)
    page.click("#run-button")
    page.locator("#result-view").wait_for(state="visible")
    assert page.locator("#job-error").is_hidden()
    assert "finished" in page.inner_text("#job-text")
