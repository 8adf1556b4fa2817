"""The dashboard in a real browser: Debian's Chromium driven by Playwright against a live uvicorn.

Run with ``pytest -m browser tests/test_browser.py``. Screenshots land in
test-artifacts/screenshots/ (git-ignored) for a person to look at.
"""

from __future__ import annotations

import socket
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from _chromium import BROWSER_MARKS, SCREENSHOTS
from conftest import png_bytes, synthetic_tile, write_tiny_spec

BROWSER_SIZE = 64  # input side of the browser tests' tiny model: big enough to see, small enough to be quick

pytestmark = BROWSER_MARKS


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.fixture(scope="module")
def live_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """A real uvicorn server on 127.0.0.1 and a free port, in a thread; stopped at the end."""
    import uvicorn

    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    base = tmp_path_factory.mktemp("browser")
    spec = write_tiny_spec(base / "tilelike", name="tilelike", size=BROWSER_SIZE)
    images = base / "images"
    images.mkdir()
    (images / "tagged-corner.png").write_bytes(png_bytes(synthetic_tile(seed=5, size=BROWSER_SIZE, tagged=True)))
    settings = Settings(models=(str(spec),), include_bundled=False, image_root=images, data_dir=base / "data")
    port = _free_port()
    config = uvicorn.Config(create_app(settings), host="127.0.0.1", port=port, log_level="warning", lifespan="on")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.time() + 30
    while not server.started:
        if time.time() > deadline or not thread.is_alive():
            raise RuntimeError("uvicorn did not start within 30 s")
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)


@pytest.fixture()
def page(browser):
    """A page for the flows. Playwright's waiting helpers evaluate strings, which the server's content
    security policy forbids, so these contexts bypass it; ``strict_page`` keeps it on."""
    context = browser.new_context(viewport={"width": 1280, "height": 900}, bypass_csp=True)
    p = context.new_page()
    p.set_default_timeout(30_000)
    yield p
    context.close()


@pytest.fixture()
def strict_page(browser):
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    p = context.new_page()
    p.set_default_timeout(30_000)
    yield p
    context.close()


def _shot(page, name: str) -> None:
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / f"{name}.png"), full_page=True)


@pytest.fixture(scope="module")
def demo_tile(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A tile image file to upload: a shipped demo sample when there is one, else a synthetic tile."""
    shipped = sorted((Path(__file__).resolve().parents[1] / "demo_models" / "tilenet" / "samples").glob("*.png"))
    if shipped:
        return shipped[0]
    path = tmp_path_factory.mktemp("upload") / "tile.png"
    path.write_bytes(png_bytes(synthetic_tile(seed=7, size=96, tagged=True)))
    return path


def test_model_page_shows_kernel_grid_and_layer_map(live_server: str, page) -> None:
    page.goto(live_server + "/model")
    page.wait_for_function("document.body.dataset.ready === 'true'")
    grid = page.locator("#kernel-grid")
    grid.wait_for(state="visible")
    assert not page.locator("#kernel-colorbar").is_visible()  # the RGB grid has no colour bar
    assert page.evaluate("document.querySelector('#kernel-grid').naturalWidth") > 0
    assert page.locator("#kernel-layer").input_value() == "features.conv1"
    rows = page.locator("#layer-table tbody tr")
    assert rows.count() >= 6
    foot = page.locator("#layer-table tfoot").inner_text()
    # 3·8·9+8 + 8·16·9+16 + 16·4+4 = 1,460 parameters in the tiny net (counted by hand from its definition).
    assert "1,460" in foot
    assert page.locator("#model-fingerprint").inner_text().strip()
    # Another conv layer on request: the per-channel grid with its colour bar.
    page.select_option("#kernel-layer", "features.conv2")
    page.wait_for_function("document.querySelector('#kernel-grid').dataset.layer === 'features.conv2'")
    assert page.locator("#kernel-colorbar").is_visible()
    _shot(page, "model-anatomy")


def test_image_page_evidence_flow(live_server: str, page, demo_tile: Path) -> None:
    page.goto(live_server + "/image")
    page.wait_for_function("document.body.dataset.ready === 'true'")
    assert not page.locator("#job-box").is_visible() and not page.locator("#result-view").is_visible()
    page.set_input_files("#file-input", str(demo_tile))

    # Top-k as labelled bars with numbers.
    page.locator("#topk li").first.wait_for()
    labels = page.locator("#topk .bar-label").all_inner_texts()
    assert set(labels) <= {"sound", "crack", "chip", "bubble"} and len(labels) == 4
    values = page.locator("#topk .bar-value").all_inner_texts()
    assert all(v.endswith("%") for v in values)
    assert abs(sum(float(v.rstrip("%")) for v in values) - 100.0) < 0.5  # softmax over all 4 classes
    # What the model was given is stated beside the picture.
    page.wait_for_function("document.querySelector('#image-size').innerText.includes('model input 64×64')")

    # Pick a layer and see its grid; open one channel.
    page.select_option("#layer-select", "features.conv1")
    page.wait_for_function("document.querySelector('#act-grid').dataset.layer === 'features.conv1'")
    page.wait_for_function("document.querySelector('#act-grid').complete && "
                           "document.querySelector('#act-grid').naturalWidth > 0")
    page.locator("#act-grid").click(position={"x": 6, "y": 6})  # inside the first cell
    page.locator("#channel-view").wait_for(state="visible")
    assert "channel" in page.locator("#channel-title").inner_text()
    page.locator("#channel-stack").hover()  # the centre
    page.wait_for_function("document.querySelector('#channel-readout').innerText.includes('activation')")
    _shot(page, "image-features")

    # Occlusion: progress reaches the end, the heatmap appears, the engine is named.
    page.select_option("#method-select", "occlusion")
    page.fill("#param-patch", "16")
    page.fill("#param-stride", "8")
    page.click("#run-button")
    page.wait_for_function("document.querySelector('#job-box').dataset.state === 'done'")
    assert page.evaluate("document.querySelector('#job-bar').value") == 1
    page.locator("#result-view").wait_for(state="visible")
    assert page.locator("#result-engine").inner_text().strip()
    assert page.locator("#result-map").get_attribute("src").startswith("data:image/png")
    rbox = page.locator("#result-stack").bounding_box()
    page.locator("#result-stack").hover(position={"x": rbox["width"] * 0.8, "y": rbox["height"] * 0.8})
    page.wait_for_function("document.querySelector('#result-readout').innerText.includes('probability drop')")
    page.fill("#result-opacity", "0.3")
    page.dispatch_event("#result-opacity", "input")
    assert page.evaluate("document.querySelector('#result-map').style.opacity") == "0.3"
    assert page.locator("#evidence .caution").is_visible()

    # Can the map be trusted: faithfulness curves and the weight-randomisation check.
    page.click("#faith-button")
    page.locator("#faith-chart").wait_for()
    assert "deletion area" in page.locator("#faith-out").inner_text()
    page.click("#sanity-button")
    page.locator("#sanity-verdict").wait_for()
    assert page.locator("#sanity-verdict").inner_text().startswith(("Passes", "Fails"))
    _shot(page, "image-occlusion")

    # A second method, scored too: the page ranks the two maps.
    page.select_option("#method-select", "saliency")
    page.click("#run-button")
    page.wait_for_function("document.querySelectorAll('#result-strip .strip-item').length === 2")
    page.click("#faith-button")
    page.locator("#ranking-box").wait_for(state="visible")
    assert page.locator("#ranking tbody tr").count() == 2
    _shot(page, "image-ranking")
    page.select_option("#method-select", "occlusion")

    # A slow second run (every pixel a position, brute force), cancelled while it runs.
    page.fill("#param-patch", "2")
    page.fill("#param-stride", "1")
    page.select_option("#param-engine", "batched")
    page.click("#run-button")
    page.wait_for_function("document.querySelector('#job-box').dataset.state === 'running' && "
                           "document.querySelector('#job-text').innerText.includes(' of ')")
    page.click("#cancel-button")
    page.wait_for_function("document.querySelector('#job-box').dataset.state === 'cancelled'")
    assert page.evaluate("document.querySelector('#job-bar').value") < 1
    assert "cancelled" in page.locator("#job-text").inner_text()
    assert page.locator("#run-button").is_enabled()
    _shot(page, "image-cancelled")


def test_pages_load_nothing_from_outside_and_keep_the_policy(live_server: str, strict_page, demo_tile: Path) -> None:
    page = strict_page
    seen: list[str] = []
    console: list[str] = []
    page.on("request", lambda request: seen.append(request.url))
    page.on("console", lambda msg: console.append(msg.text))
    page.on("pageerror", lambda exc: console.append(str(exc)))
    for path in ("/", "/model", "/image", "/compare", "/docs"):
        page.goto(live_server + path)
        page.wait_for_load_state("networkidle")
    page.goto(live_server + "/image")
    page.locator("body[data-ready='true']").wait_for()
    page.set_input_files("#file-input", str(demo_tile))
    page.locator("#topk li").first.wait_for()
    page.locator("#act-grid[data-layer]").wait_for()
    page.click("#run-button")
    page.locator("#job-box[data-state='done']").wait_for()
    page.locator("#result-strip .strip-item").first.wait_for()
    page.wait_for_load_state("networkidle")
    outside = [u for u in seen if not u.startswith((live_server + "/", "data:"))]
    assert seen and not outside, f"requests left 127.0.0.1: {outside}"
    refused = [m for m in console if "Content Security Policy" in m or "Refused" in m]
    assert not refused, refused
    # The bars' widths are set through the CSSOM, which the policy allows.
    assert page.locator("#topk .bar-fill").first.evaluate("e => e.style.width").endswith("%")


def test_compare_two_images_on_one_scale(live_server: str, page, demo_tile: Path) -> None:
    page.goto(live_server + "/image")
    page.wait_for_function("document.body.dataset.ready === 'true'")
    page.set_input_files("#file-input", str(demo_tile))
    page.locator("#topk li").first.wait_for()
    page.goto(live_server + "/compare")
    page.wait_for_function("document.body.dataset.ready === 'true'")
    options_b = page.locator("#image-b option").all_inner_texts()
    assert any(o.startswith("demo sample") for o in options_b)
    page.select_option("#image-b", label=next(o for o in options_b if o.startswith("demo sample")))
    page.fill("#param-patch", "16")
    page.fill("#param-stride", "8")
    page.click("#compare-run")
    page.wait_for_function("document.body.dataset.compared === 'true'")
    assert "Shared colour scale" in page.locator("#scale-note").inner_text()
    facts_a = page.locator("#facts-a").inner_text()
    facts_b = page.locator("#facts-b").inner_text()
    assert facts_a.split("scale ")[-1] == facts_b.split("scale ")[-1]  # the same numbers on both sides
    assert page.locator("#colorbar-a").is_visible() and page.locator("#colorbar-b").is_visible()
    _shot(page, "compare")
