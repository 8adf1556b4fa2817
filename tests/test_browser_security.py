"""Cross-origin writes and DNS rebinding, tried from a real browser (issue 11, findings 1 and 2).

Debian's Chromium (Playwright for Python) against a real uvicorn server on 127.0.0.1:

- a page served by a *second* server on another port posts a multipart upload to Pellucid with
  ``fetch(…, {mode: "no-cors"})``, which browsers send without a CORS preflight;
- a Pellucid page opened as ``http://localhost:PORT`` posts to ``http://127.0.0.1:PORT`` (another
  origin on the same machine);
- Chromium resolves ``rebind.evil.example`` to 127.0.0.1 (``--host-resolver-rules``), as a page that
  rebinds its own name would, and opens Pellucid by that name.

Nothing is stored in the first two cases and the third gets no page; a same-origin upload from
Pellucid's own page still works. Run with ``pytest -m browser tests/test_browser_security.py``.
"""

from __future__ import annotations

import base64
import http.server
import threading
from collections.abc import Iterator

import httpx
import pytest
from _chromium import BROWSER_MARKS, SCREENSHOTS, launched_chromium
from _live import free_port, live_server
from conftest import png_bytes, synthetic_tile, write_tiny_spec

REBIND_NAME = "rebind.evil.example"

pytestmark = BROWSER_MARKS

_PNG_B64 = base64.b64encode(png_bytes(synthetic_tile(seed=8))).decode()

_UPLOAD_JS = """async ([target, b64]) => {
  const bytes = Uint8Array.from(atob(b64), c => c.charCodeAt(0));
  const form = new FormData();
  form.append("file", new Blob([bytes], {type: "image/png"}), "planted.png");
  try {
    const r = await fetch(target + "/api/images", {method: "POST", body: form, mode: "no-cors",
                                                    credentials: "include"});
    return r.type + ":" + r.status;
  } catch (e) {
    return "error:" + e;
  }
}"""


@pytest.fixture(scope="module")
def pellucid(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    from pellucid.web.settings import Settings

    base = tmp_path_factory.mktemp("browser-security")
    spec = write_tiny_spec(base / "tilelike", name="tilelike", size=32)
    settings = Settings(models=(str(spec),), include_bundled=False, data_dir=base / "store")
    with live_server(settings) as url:
        yield url


@pytest.fixture(scope="module")
def other_origin() -> Iterator[str]:
    """A second web server on 127.0.0.1 and another port: the 'other site' a user might visit."""
    page = (b"<!doctype html><html><head><title>another site</title></head>"
            b"<body><h1>An unrelated page on another origin</h1></body></html>")

    class Handler(http.server.BaseHTTPRequestHandler):
        def do_GET(self) -> None:  # noqa: N802 - the standard library's name
            self.send_response(200)
            self.send_header("Content-Type", "text/html; charset=utf-8")
            self.send_header("Content-Length", str(len(page)))
            self.end_headers()
            self.wfile.write(page)

        def log_message(self, *args) -> None:
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", free_port()), Handler)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield f"http://127.0.0.1:{server.server_address[1]}"
    finally:
        server.shutdown()
        server.server_close()


@pytest.fixture(scope="module")
def browser():
    # the shared browser, plus a name that resolves to this machine (the DNS-rebinding case)
    with launched_chromium([f"--host-resolver-rules=MAP {REBIND_NAME} 127.0.0.1"]) as b:
        yield b


@pytest.fixture()
def page(browser):
    # page.evaluate runs script text, which Pellucid's content security policy forbids on its own pages.
    context = browser.new_context(viewport={"width": 1000, "height": 700}, bypass_csp=True)
    p = context.new_page()
    p.set_default_timeout(30_000)
    yield p
    context.close()


def _stored(pellucid: str) -> list[str]:
    return [img["name"] for img in httpx.get(pellucid + "/api/images", timeout=30).json()]


def _upload_statuses(page) -> list[int]:
    """HTTP statuses of the page's upload requests as they came off the wire. The page itself sees an
    opaque answer, or a network error once the browser withholds a cross-origin one (Pellucid sends
    Cross-Origin-Resource-Policy: same-origin), so the status is read from Chromium's DevTools protocol."""
    cdp = page.context.new_cdp_session(page)
    cdp.send("Network.enable")
    uploads: set[str] = set()
    statuses: list[int] = []
    cdp.on("Network.requestWillBeSent", lambda e: uploads.add(e["requestId"])
           if e["request"]["method"] == "POST" and e["request"]["url"].endswith("/api/images") else None)
    cdp.on("Network.responseReceivedExtraInfo", lambda e: statuses.append(e["statusCode"])
           if e["requestId"] in uploads else None)
    return statuses


def _await_answer(page, statuses: list[int], *, seconds: float = 15.0) -> None:
    """Let the browser deliver the upload's answer (a loaded machine may take more than a moment)."""
    waited = 0.0
    while not statuses and waited < seconds:
        page.wait_for_timeout(100)
        waited += 0.1
    page.wait_for_timeout(200)  # a second answer, if one came, would arrive by now


def test_upload_from_another_site_is_refused(page, pellucid: str, other_origin: str) -> None:
    statuses = _upload_statuses(page)
    page.goto(other_origin + "/")
    page.evaluate(_UPLOAD_JS, [pellucid, _PNG_B64])
    _await_answer(page, statuses)
    assert statuses == [403], statuses  # the browser sent it without asking; the server said no
    assert "planted.png" not in _stored(pellucid)
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / "security-other-origin.png"))


def test_upload_from_the_same_machine_under_another_name_is_refused(page, pellucid: str) -> None:
    port = pellucid.rsplit(":", 1)[1]
    statuses = _upload_statuses(page)
    page.goto(f"http://localhost:{port}/")  # Pellucid's own page, but the origin http://localhost:PORT
    page.evaluate(_UPLOAD_JS, [pellucid, _PNG_B64])
    _await_answer(page, statuses)
    assert statuses == [403], statuses
    assert "planted.png" not in _stored(pellucid)


def test_a_rebound_name_gets_no_page(page, pellucid: str) -> None:
    port = pellucid.rsplit(":", 1)[1]
    response = page.goto(f"http://{REBIND_NAME}:{port}/")
    assert response is not None and response.status == 400
    assert "ForeignHost" in page.content()
    api = page.goto(f"http://{REBIND_NAME}:{port}/api/audits/runs")
    assert api is not None and api.status == 400
    SCREENSHOTS.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(SCREENSHOTS / "security-rebound-name.png"))


def test_same_origin_upload_still_works(page, pellucid: str) -> None:
    page.goto(pellucid + "/image")
    statuses = _upload_statuses(page)
    outcome = page.evaluate(_UPLOAD_JS.replace('mode: "no-cors"', 'mode: "same-origin"'), [pellucid, _PNG_B64])
    page.wait_for_timeout(300)
    assert outcome == "basic:200" and statuses == [200], (outcome, statuses)
    assert "planted.png" in _stored(pellucid)
