"""The report's building blocks: number formats and the blocks a section is made of.

A section is a list of blocks, each a small dict the template ``templates/report/audit.html``
knows how to draw: a paragraph, a table (cells may carry a class and a style), preformatted
text, pictures. Keeping them plain data keeps the sections testable without a page engine.
"""

from __future__ import annotations

import time
from typing import TYPE_CHECKING, Any

from pellucid.core.audit.policy import THRESHOLDS
from pellucid.core.audit.report_pictures import data_uri

if TYPE_CHECKING:
    from pellucid.core.audit.report import ReportContent

__all__ = ["cell", "p", "pct", "picture", "pictures", "pre", "region_words", "status_cell", "table", "value_text",
           "when"]


def pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def when(t: float | None) -> str:
    return time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(t)) if t else "—"


def value_text(key: str, value: float | None) -> str:
    if value is None:
        return "n/a"
    kind = THRESHOLDS.get(key, ("", "fraction"))[1]
    if kind == "count":
        return f"{int(value)}"
    if kind == "signed":
        return f"{value:+.3f}"
    return f"{100 * value:.1f}%"


def region_words(name: str) -> str:
    return name.replace("_", "-")


def p(text: str, cls: str = "") -> dict:
    return {"kind": "p", "text": text, "cls": cls}


def table(head: list[str], rows: list[list[Any]], *, num: tuple[int, ...] = (), cls: str = "",
          caption: str = "", widths: tuple[int, ...] = ()) -> dict:
    """A table block; a cell is a value or ``{"text", "cls", "style"}``; columns in ``num`` align right.

    ``widths`` (percent per column) fixes the layout: the page engine then sizes the columns from
    them instead of measuring every cell's text twice, which is most of a long table's cost.
    """
    assert not widths or len(widths) == len(head), (head, widths)
    return {"kind": "table", "head": head, "rows": rows, "num": set(num), "cls": cls, "caption": caption,
            "widths": widths}


def cell(text: Any, cls: str = "", style: str = "") -> dict:
    return {"text": text, "cls": cls, "style": style}


def pre(text: str) -> dict:
    return {"kind": "pre", "text": text}


def pictures(items: list[dict], cls: str = "") -> dict:
    """``items``: [{"caption", "images": [{"uri", "alt", "label"}]}]."""
    return {"kind": "pictures", "items": items, "cls": cls}


def picture(content: ReportContent, name: str, alt: str, label: str = "") -> dict | None:
    png = content.pictures.get(name)
    return {"uri": data_uri(png), "alt": alt, "label": label} if png else None


def status_cell(status: str) -> dict:
    return cell(status.upper(), cls=f"status {'na' if status == 'n/a' else status}")
