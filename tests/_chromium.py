"""Debian's Chromium for the browser tests: where it is, how it is launched, and the marks a browser
test module carries. Nothing is downloaded: Playwright drives the system's browser."""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path

import pytest

CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = [
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
SCREENSHOTS = Path(__file__).resolve().parents[1] / "test-artifacts" / "screenshots"
BROWSER_MARKS = [
    pytest.mark.browser,
    pytest.mark.skipif(not CHROMIUM.exists(), reason="Debian's Chromium is not installed at /usr/bin/chromium "
                       "(apt-get install chromium)"),
]


@contextmanager
def launched_chromium(extra_args: Sequence[str] = ()) -> Iterator:
    """A headless Chromium for the duration of the block."""
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=str(CHROMIUM), headless=True,
                                     args=[*CHROMIUM_ARGS, *extra_args])
        try:
            yield browser
        finally:
            browser.close()
