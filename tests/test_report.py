"""Reviewer reports: files exist, the HTML parses and stands alone, the PDF has pages, both name the inputs."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser
from pathlib import Path

import pytest

from pellucid.core.audit import AuditSettings, GallerySpec, InjectionSpec, load_dataset, run_audit
from pellucid.core.audit.policy import parse_policy
from pellucid.core.audit.report import write_report
from pellucid.core.audit.store import Store
from pellucid.core.errors import BadParameterError
from pellucid.core.model.loading import load_model
from pellucid.demo.tiles import make_split, write_folder
from tests.test_audit_engine import _tiny_model


class _Collector(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.tags: list[str] = []
        self.srcs: list[str] = []
        self.links: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list) -> None:
        self.tags.append(tag)
        a = dict(attrs)
        if "src" in a:
            self.srcs.append(a["src"])
        if "href" in a:
            self.links.append(a["href"])

    def handle_data(self, data: str) -> None:
        self.text.append(data)


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


def test_html_and_pdf(finished) -> None:
    store, outcome, root = finished
    policy = parse_policy({"name": "test gate", "thresholds": {"min_accuracy": 0.99, "max_corner_share": 0.9}})
    files = write_report(store, outcome.run.id, root / "out", policy=policy)
    html_path, pdf_path = files
    assert html_path.name == "report.html" and pdf_path.name == "report.pdf"

    text = html_path.read_text(encoding="utf-8")
    parser = _Collector()
    parser.feed(text)
    parser.close()
    assert parser.tags[:2] == ["html", "head"] and "table" in parser.tags
    assert parser.srcs and all(s.startswith("data:image/png;base64,") for s in parser.srcs)  # self-contained
    assert not parser.links and "http" not in " ".join(parser.srcs)
    body = " ".join(parser.text)
    run = outcome.run
    for needle in (run.model_fingerprint, run.dataset_hash, run.id, "pellucid audit --model tiny",
                   '"flag_concentration": 4.0', "evidence", "sign-off", "Injection test", "Channel response gallery",
                   "Background swap", "Gate: FAIL", "min_accuracy"):
        assert needle in body, needle
    assert json.dumps(run.settings, indent=2, sort_keys=True) in body

    pdf = pdf_path.read_bytes()
    assert pdf.startswith(b"%PDF")
    pages = len(re.findall(rb"/Type\s*/Page\b(?!s)", pdf))
    assert pages > 0
    assert run.model_fingerprint.encode() in pdf
    assert run.dataset_hash.encode() in pdf
    assert b"flag_concentration" in pdf


def test_report_of_unfinished_run(tmp_path: Path) -> None:
    with Store(tmp_path) as store:
        run = store.create_run(model_name="m", model_fingerprint="f" * 64, model_spec=None, dataset_root="/d",
                               dataset_hash="d" * 64, method="gradcam", settings={"audit": {}}, tool_version="0",
                               command=None, total=1)
        with pytest.raises(BadParameterError, match="only finished runs have a report"):
            write_report(store, run.id, tmp_path / "out")
