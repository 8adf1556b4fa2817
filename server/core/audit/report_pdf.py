"""The report's PDF: the HTML report laid out by an HTML-to-PDF engine (WeasyPrint), not a second renderer.

The PDF is the same document as the HTML file, printed through its print stylesheet (CSS paged
media: paper size, margins, the footer with run id and model fingerprint, page numbers, table
headers repeated on every page a table spans). Its metadata comes from the HTML's head: the
title, ``description`` (the PDF's subject), ``keywords`` and ``generator`` (the creating tool).

WeasyPrint draws text with Pango and HarfBuzz, which come from the operating system's packages
(on Debian: ``libpango-1.0-0 libpangoft2-1.0-0 libharfbuzz0b libharfbuzz-subset0`` and a font such
as ``fonts-dejavu-core``). It is imported only when a PDF is asked for, so commands that read the
store start without it, and a machine without those libraries still gets the HTML report.

Nothing is fetched while printing: the report carries every picture inline (``data:`` URIs), and
the fetcher given to the engine refuses any other scheme, so a stray link cannot reach a network
or the file system.
"""

from __future__ import annotations

import logging
import os
from pathlib import Path

from pellucid.core.errors import ReportError

__all__ = ["SYSTEM_PACKAGES", "print_pdf"]

# What the engine needs from Debian's packages (the Makefile's set-up installs the same list).
SYSTEM_PACKAGES = "libpango-1.0-0 libpangoft2-1.0-0 libharfbuzz0b libharfbuzz-subset0 fonts-dejavu-core"


def _engine():
    """The weasyprint module, or a ReportError saying what to install."""
    from PIL import ImageFile

    decodes_truncated = ImageFile.LOAD_TRUNCATED_IMAGES
    try:
        import weasyprint
    except ImportError:
        raise ReportError("the PDF needs the weasyprint package, which is not installed: pip install weasyprint "
                          "(the HTML report was written; --no-pdf writes it alone)") from None
    except OSError as exc:  # the package is there, its system libraries (Pango, HarfBuzz) are not
        raise ReportError(f"the PDF engine cannot load its system libraries ({exc}); on Debian or Ubuntu: "
                          f"apt-get install {SYSTEM_PACKAGES} (the HTML report was written; --no-pdf writes it "
                          "alone)") from None
    finally:
        # Importing the engine switches Pillow, process-wide, to decoding truncated files; the
        # intake must keep refusing them (a damaged upload is named, not half-read).
        ImageFile.LOAD_TRUNCATED_IMAGES = decodes_truncated
    # The engine logs every CSS property it does not know; those are for screens, not for the reader.
    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    return weasyprint


def print_pdf(html: str, path: Path) -> int:
    """Lay out ``html`` (a self-contained document) on pages and write it to ``path``; returns the page count."""
    weasyprint = _engine()
    fetcher = weasyprint.urls.URLFetcher(allowed_protocols={"data"}, fail_on_errors=True)
    try:
        document = weasyprint.HTML(string=html, url_fetcher=fetcher, media_type="print").render()
    except weasyprint.urls.FatalURLFetchingError as exc:
        raise ReportError(f"the report refers to something outside itself ({exc}); every picture must be inline"
                          ) from None
    # Written beside and moved into place, so a failure never leaves half a PDF under the final name.
    part = path.with_name(path.name + ".part")
    try:
        document.write_pdf(str(part))
        os.replace(part, path)
    finally:
        part.unlink(missing_ok=True)
    return len(document.pages)
