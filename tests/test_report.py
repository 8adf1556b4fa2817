"""Reviewer reports (HTML): summary page first, evidence, an empty sign-off block, the appendix; self-contained.

The PDF printed from this HTML is checked in tests/test_report_pdf.py. The numbers the summary
shows are recounted here from the store's per-image rows, not taken from the run's summary.
"""

from __future__ import annotations

import dataclasses
import json
import re
import sys
from html.parser import HTMLParser
from pathlib import Path

import pytest

from pellucid.core.audit import AuditSettings, GallerySpec, InjectionSpec, load_dataset, run_audit
from pellucid.core.audit.policy import parse_policy
from pellucid.core.audit.report import build_report, render_html, write_report
from pellucid.core.audit.store import Store
from pellucid.core.errors import BadParameterError
from pellucid.core.model.loading import load_model
from pellucid.demo.tiles import make_split, write_folder
from tests.test_audit_engine import _tiny_model


class _Doc(HTMLParser):
    """Tags, attributes, visible text, and which top-level part (summary, evidence, …) each text sits in."""

    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.attrs: list[tuple[str, str, str]] = []  # (tag, name, value)
        self.ids: set[str] = set()
        self.text: list[str] = []
        self.styles: list[str] = []
        self._in_style = False
        self.form_cells: list[str] = []
        self._in_form = 0
        self._cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list) -> None:
        self.tags.append(tag)
        for name, value in attrs:
            self.attrs.append((tag, name, value or ""))
            if name == "id":
                self.ids.add(value)
        cls = dict(attrs).get("class") or ""
        self._in_style = tag == "style"
        if tag == "table" and "form" in cls.split():
            self._in_form = 1
        if self._in_form and tag == "td":
            self._cell = []

    def handle_endtag(self, tag: str) -> None:
        self._in_style = False if tag == "style" else self._in_style
        if self._in_form and tag == "td" and self._cell is not None:
            self.form_cells.append("".join(self._cell))
            self._cell = None
        if tag == "table":
            self._in_form = 0

    def handle_data(self, data: str) -> None:
        if self._in_style:
            self.styles.append(data)
            return
        self.text.append(data)
        if self._cell is not None:
            self._cell.append(data)


def _parse(html: str) -> _Doc:
    doc = _Doc()
    doc.feed(html)
    doc.close()
    return doc


@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("report")
    model = load_model(_tiny_model(root / "model"))
    records = make_split("clean", per_class=2, seed=3)
    write_folder(records, root / "data")
    rec = next(r for r in records if r.tagged)
    x0, y0, x1, y1 = rec.tag_box
    store = Store(root / "store")
    out = run_audit(model, load_dataset(root / "data"), store=store, settings=AuditSettings(method="gradcam"),
                    injection=InjectionSpec(patch=rec.image[y0:y1, x0:x1].copy(), suspect_class="crack", at=(x0, y0)),
                    background_swap=True, gallery=GallerySpec(layer="features.block1.relu", top=3, visual_steps=4),
                    command="pellucid audit --model tiny …")
    yield store, out, root
    store.close()


def test_html_reads_in_order_and_stands_alone(finished) -> None:
    store, outcome, root = finished
    policy = parse_policy({"name": "test gate", "thresholds": {"min_accuracy": 0.99, "max_corner_share": 0.9}})
    html_path, pdf_path = write_report(store, outcome.run.id, root / "out", policy=policy)
    assert html_path.name == "report.html" and pdf_path.name == "report.pdf"
    html = html_path.read_text(encoding="utf-8")
    doc = _parse(html)

    # Self-contained: pictures inline, styles inline, every link a place inside this document.
    assert doc.tags[:2] == ["html", "head"] and "table" in doc.tags
    assert "link" not in doc.tags and "script" not in doc.tags and "iframe" not in doc.tags
    srcs = [v for t, n, v in doc.attrs if n == "src"]
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    hrefs = [v for t, n, v in doc.attrs if n == "href"]
    assert hrefs and all(h.startswith("#") and h[1:] in doc.ids for h in hrefs), hrefs
    css = " ".join(doc.styles)
    assert "url(" not in css and "@import" not in css
    assert not re.search(r"(?i)\b(?:https?:)?//[a-z0-9.-]+\.[a-z]{2,}", " ".join(v for _, _, v in doc.attrs) + css)

    body = " ".join(doc.text)
    run = outcome.run
    for needle in (run.model_fingerprint, run.dataset_hash, run.id, "pellucid audit --model tiny",
                   '"flag_concentration": 4.0', "evidence", "sign-off", "Injection test", "Channel response gallery",
                   "Background swap", "Gate: FAIL under policy 'test gate'", "min_accuracy",
                   "judged now from the stored measures", f"pellucid report {run.id} --policy"):
        assert needle in body, needle
    assert json.dumps(run.settings, indent=2, sort_keys=True) in body

    # Reading order: the verdict and the caution on the summary, then evidence, sign-off, appendix.
    at = {k: body.index(k) for k in ("FAIL", "Caution.", "Gate checks", "Reviewer's sign-off",
                                     "Re-running this audit")}
    assert at["FAIL"] < at["Caution."] < at["Gate checks"] < at["Reviewer's sign-off"] < at["Re-running this audit"]
    assert body.index("min_accuracy") < body.index("max_corner_share")  # the failed check first
    summary_text = body[: at["Gate checks"]]
    assert "domain's own rules" in summary_text and "not proof" in summary_text

    # The summary's accuracy, recounted from the stored per-image rows.
    rows = [r for r in store.results(run.id) if r.status == "done"]
    correct = sum(1 for r in rows if r.data["predicted_label"] == r.label)
    assert f"{100 * correct / len(rows):.1f}%" in summary_text and f"{correct} of {len(rows)} images" in summary_text

    # The sign-off block is there and empty: reviewer, date, decision, notes for a person to fill in.
    signoff = body[at["Reviewer's sign-off"]: at["Re-running this audit"]]
    for label in ("Reviewer", "Date", "Decision", "Notes", "Signature"):
        assert label in signoff
    assert doc.form_cells and all(not c.strip() for c in doc.form_cells)
    assert "the decision follows the domain's own rules" in signoff


def test_the_stored_verdict_and_no_policy(finished) -> None:
    store, outcome, _ = finished
    html = render_html(build_report(store, outcome.run.id))
    body = " ".join(_parse(html).text)
    assert "NO VERDICT" in body and f"pellucid report {outcome.run.id} --policy FILE" in body


def test_paper_sizes_and_a_bad_one(finished) -> None:
    store, outcome, _ = finished
    content = build_report(store, outcome.run.id)
    assert re.search(r"@page\s*{\s*size:\s*A4;", render_html(content))
    assert re.search(r"@page\s*{\s*size:\s*letter;", render_html(content, paper="letter"))
    with pytest.raises(BadParameterError, match="paper must be one of a4, letter"):
        render_html(content, paper="a5")


def test_values_cannot_leave_their_place(finished) -> None:
    """A model name with quotes, angle brackets and a line break stays text: in the page, in the title and in
    the print footer's CSS string."""
    store, outcome, _ = finished
    content = build_report(store, outcome.run.id)
    evil = 'm"</style><script>alert(1)</script>\\\n<img src=x>'
    content.run = dataclasses.replace(content.run, model_name=evil)
    doc = _parse(render_html(content))
    assert "script" not in doc.tags and doc.tags.count("style") == 1
    assert not [v for t, n, v in doc.attrs if n == "src" and not v.startswith("data:image/png")]
    assert evil in " ".join(doc.text)
    assert "</style>" not in " ".join(doc.styles)


def test_report_of_unfinished_run(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        run = store.create_run(model_name="m", model_fingerprint="f" * 64, model_spec=None, dataset_root="/d",
                               dataset_hash="d" * 64, method="gradcam", settings={"audit": {}}, tool_version="0",
                               command=None, total=1)
        with pytest.raises(BadParameterError, match="only finished runs have a report"):
            write_report(store, run.id, tmp_path / "out")


def test_without_the_pdf_engine_the_html_is_kept_and_one_line_says_what_to_install(finished, monkeypatch, capsys):
    from pellucid.cli import main

    store, outcome, root = finished
    monkeypatch.setitem(sys.modules, "weasyprint", None)  # as if the package were not installed
    out = root / "no-engine"
    code = main(["report", outcome.run.id, "--store", str(store.root), "--out", str(out)])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "pip install weasyprint" in err[0] and "Traceback" not in err[0]
    assert (out / "report.html").is_file() and not list(out.glob("report.pdf*"))
