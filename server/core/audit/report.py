"""The reviewer's report for a stored audit run: one self-contained HTML file, and the PDF printed from it.

The report opens with one summary page (the verdict with its failed checks first, the model and
the dataset in one line each, the numbers that decided it, the most suspicious clusters or flagged
images, the caution), then the evidence, an empty sign-off block for the reviewer, and an appendix
with everything that re-runs the audit (:mod:`pellucid.core.audit.report_view` says what goes
where).

One document, two files: the HTML is rendered from ``templates/report/audit.html`` (Jinja2,
autoescaped; its styles inline and every picture a ``data:`` URI, so it can be mailed or archived
as one file), and the PDF is that same HTML laid out through its print stylesheet by WeasyPrint
(:mod:`pellucid.core.audit.report_pdf`): paper A4 or Letter, page numbers, run id and model
fingerprint in every page's footer, table headers repeated across pages. Jinja is used here as a
templating library for a file; the core still imports nothing of the web layer.

Reading a stored run needs no torch: ``pellucid report`` starts without it.
"""

from __future__ import annotations

import functools
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pellucid.core.audit.policy import Policy, evaluate_policy, gate_of
from pellucid.core.audit.report_view import MEASURE_SENTENCES, PAPERS, document
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.audit.store import DONE, RunRecord, Store
from pellucid.core.errors import BadParameterError, StoreError

__all__ = ["MEASURE_SENTENCES", "PAPERS", "ReportContent", "build_report", "render_html", "write_report"]

# Stored artefacts the report shows: PNG pictures, and maps (npy) it colours itself.
_PICTURES = ("flagged/", "injection/", "swap/", "gallery/visual/", "discovery/", "confirm/")


def _is_array(name: str) -> bool:
    return name.startswith("mean_map/") or name == "gallery/patches" or (
        name.startswith("discovery/") and name.endswith("/mean"))


@dataclass
class ReportContent:
    """Everything a report shows, read once from the store."""

    run: RunRecord
    summary: dict
    settings: AuditSettings
    gate: dict | None  # PolicyResult.to_dict(): stored with the run, or judged now under a given policy
    pictures: dict[str, bytes]  # artefact name → PNG bytes
    arrays: dict[str, np.ndarray] = field(default_factory=dict)  # artefact name → map (class and cluster means)
    generated: float = 0.0
    gate_source: str = "stored"  # "stored" (judged when the audit ran) or "given" (judged now, --policy)
    stored_gate: dict | None = None


def build_report(store: Store, run_id: str, *, policy: Policy | None = None) -> ReportContent:
    """Read a finished run, its verdict (or judge its stored measures under ``policy``) and its pictures."""
    run = store.get_run(run_id)
    if run.status != DONE or not run.summary:
        raise BadParameterError(
            f"run {run.id} is {run.status}; only finished runs have a report. Resume it with the command it was "
            f"started with{': ' + run.command if run.command else ''}"
        )
    summary = run.summary
    stored_gate = gate_of(run)
    # A given policy re-judges the stored measures (nothing is re-run); else the stored verdict is shown.
    gate = evaluate_policy(policy, summary, labels=summary["labels"]).to_dict() if policy else stored_gate
    pictures: dict[str, bytes] = {}
    arrays: dict[str, np.ndarray] = {}
    for name, digest in store.run_artefacts(run.id).items():
        if _is_array(name):
            arrays[name] = store.get_array(digest)
        elif name.startswith(_PICTURES):
            pictures[name] = store.get_bytes(digest)
    return ReportContent(run=run, summary=summary, settings=AuditSettings.from_dict(run.settings["audit"]),
                         gate=gate, pictures=pictures, arrays=arrays, generated=time.time(),
                         gate_source="given" if policy else "stored", stored_gate=stored_gate)


def _css_string(value: object) -> str:
    """A CSS string literal (for the page's running header and footer): quotes, backslashes, angle
    brackets and line breaks escaped, so no value can end the string or the style element."""
    out = []
    for ch in str(value):
        if ch == "\n":
            out.append("\\A ")
        elif ch in '"\\<>' or ord(ch) < 0x20:
            out.append(f"\\{ord(ch):x} ")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


@functools.lru_cache(maxsize=1)
def _template():
    import jinja2
    from markupsafe import Markup

    from pellucid._resources import resource_dir

    folder = resource_dir("templates") / "report"
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(folder)), autoescape=True,
                             undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters["css_string"] = lambda v: Markup(_css_string(v))
    # The stylesheet is Pellucid's own file, inlined as it is (escaping would break its quotes).
    return env.get_template("audit.html"), Markup((folder / "report.css").read_text(encoding="utf-8"))


def render_html(content: ReportContent, *, paper: str = "a4") -> str:
    """The report as one self-contained HTML document; ``paper`` ("a4" or "letter") sets its printed page."""
    if paper not in PAPERS:
        raise BadParameterError(f"paper must be one of {', '.join(PAPERS)}; received {paper!r}")
    template, css = _template()
    return template.render(doc=document(content, paper=paper), css=css)


def write_report(store: Store, run_id: str, out_dir: str | Path, *, policy: Policy | None = None,
                 pdf: bool = True, paper: str = "a4") -> list[Path]:
    """Write ``report.html`` (and ``report.pdf``, printed from it) for a finished run into ``out_dir``."""
    if paper not in PAPERS:
        raise BadParameterError(f"paper must be one of {', '.join(PAPERS)}; received {paper!r}")
    out = Path(out_dir)
    content = build_report(store, run_id, policy=policy)
    html = render_html(content, paper=paper)
    try:
        out.mkdir(parents=True, exist_ok=True)
        html_path = out / "report.html"
        html_path.write_text(html, encoding="utf-8")
        files = [html_path]
        if pdf:
            from pellucid.core.audit.report_pdf import print_pdf

            pdf_path = out / "report.pdf"
            print_pdf(html, pdf_path)
            files.append(pdf_path)
    except OSError as exc:
        raise StoreError(f"cannot write the report into {str(out)!r}: {exc.strerror or exc}") from None
    return files
