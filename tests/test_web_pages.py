"""The HTML pages: they render, carry the caution, stay offline, and escape what they show."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("path, marker", [
    ("/", "Models on offer"),
    ("/model", "Layer map"),
    ("/image", "Attribution maps"),
    ("/compare", "shared colour scale"),
    ("/docs", "JSON API"),
])
def test_pages_render(client, path: str, marker: str) -> None:
    r = client.get(path)
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    assert marker in r.text
    assert 'href="/static/pellucid.css"' in r.text


@pytest.mark.parametrize("path", ["/image", "/compare"])
def test_attribution_pages_carry_the_caution(client, path: str) -> None:
    text = client.get(path).text
    assert 'class="caution"' in text and "not proof" in text and "sign-off" in text


def test_model_picker_lists_the_served_models(client) -> None:
    text = client.get("/image").text
    assert re.search(r'<option value="tiny"\s+selected>tiny</option>', text)


def test_query_text_is_escaped(client) -> None:
    text = client.get("/model", params={"model": '"><script>alert(1)</script>'}).text
    assert "<script>alert(1)</script>" not in text


def test_images_have_alt_text(client) -> None:
    for path in ("/model", "/image", "/compare"):
        for tag in re.findall(r"<img\b[^>]*>", client.get(path).text):
            assert re.search(r'\balt="[^"]+"', tag), (path, tag)


def test_static_files_are_served_and_reference_nothing_outside() -> None:
    pattern = re.compile(r"(https?:)?//[a-z0-9.-]+\.[a-z]{2,}", re.IGNORECASE)
    for folder in (REPO / "static", REPO / "templates"):
        for f in folder.rglob("*"):
            if f.suffix in (".js", ".css", ".html"):
                # The SVG namespace is a name, never fetched.
                text = f.read_text(encoding="utf-8").replace('"http://www.w3.org/2000/svg"', '""')
                hits = [m.group(0) for m in pattern.finditer(text)]
                assert not hits, (f.name, hits)


def test_static_assets_load(client) -> None:
    for name in ("pellucid.css", "pellucid.js", "image.js", "model.js", "compare.js"):
        r = client.get(f"/static/{name}")
        assert r.status_code == 200 and len(r.content) > 200, name
