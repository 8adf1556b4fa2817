"""What the report says, in reading order: one summary page, the evidence, the sign-off, the appendix.

The summary page carries what a reviewer must decide on: the verdict (failed checks first, the
policy's name and sha256), the model and the dataset in one line each, the numbers that decided
it, the most suspicious clusters (or, without discovery, the most flagged images) with
thumbnails, and the caution. The evidence follows (gate checks, per-class measures and mean maps,
clusters, confirmation, flagged images, injection), then an empty sign-off block for a person, and
an appendix with what re-runs the audit (command, settings, policy, spec, fingerprints, versions).

The result is plain data for the template ``templates/report/audit.html``: sentences, table rows
and picture URIs; sections are lists of blocks (paragraph, table, pictures, maps, cluster, bars,
pre). Every sentence is written for any model and any folder: words about "the object" appear
only where boxes or masks were given.
"""


from __future__ import annotations

import json
import time
from importlib import metadata
from typing import TYPE_CHECKING

from pellucid.core.audit.caution import CAUTION
from pellucid.core.audit.report_blocks import cell, p, pct, picture, pre, table, value_text, when
from pellucid.core.audit.report_evidence import (
    MEASURE_SENTENCES,
    checks_table,
    cluster_card,
    cluster_vmax,
    evidence,
    min_suspicion,
    ranked_clusters,
    tested_clusters,
    verdict_of,
)
from pellucid.core.audit.sentences import unreadable_images
from pellucid.core.provenance import provenance_line

if TYPE_CHECKING:
    from pellucid.core.audit.report import ReportContent

__all__ = ["MEASURE_SENTENCES", "PAPERS", "document"]

# Paper sizes the print stylesheet knows: option value → (CSS page size, words).
PAPERS: dict[str, tuple[str, str]] = {
    "a4": ("A4", "A4 (210 × 297 mm)"),
    "letter": ("letter", "US Letter (8.5 × 11 in)"),
}
# What the summary page lists, so that it stays one page on A4 and on Letter; the evidence lists all.
SUMMARY_CHECKS = 5  # failed first
SUMMARY_CLUSTERS = 2
SUMMARY_FLAGGED = 4

DECISION_LINE = ("The gate's verdict is one input to the decision, not the decision itself: the decision follows "
                 "the domain's own rules, reviews and sign-off.")
SCOPE_LINE = ("This report describes one model on one folder of images with one attribution method. A map that "
              "looks right can still be wrong for other images, and the measures are only as good as the labels "
              "(and any boxes or masks) they use.")


# ------------------------------------------------------------------------------------------- summary page


def _model_line(content: ReportContent) -> str:
    s, run = content.summary, content.run
    model = s.get("model", {})
    shape = model.get("input_shape")
    labels = s.get("labels", [])
    parts = [str(model.get("name", run.model_name)), f"sha256 {model.get('fingerprint', run.model_fingerprint)}"]
    if shape:
        parts.append("input " + "×".join(str(v) for v in shape))
    if labels:
        shown = ", ".join(labels[:8]) + (", …" if len(labels) > 8 else "")
        parts.append(f"{len(labels)} classes ({shown})")
    if model.get("output_kind"):
        parts.append(f"output {model['output_kind']}")
    return " · ".join(parts)


def _dataset_line(content: ReportContent) -> str:
    s, run = content.summary, content.run
    ds = s.get("dataset", {})
    unreadable = unreadable_images(ds, s)
    classes = len(ds.get("per_class", {}) or s.get("per_class", {}))
    parts = [f"{s.get('done')} image(s) audited in {classes} classes",
             f"{run.dataset_root}" + (f" ({ds['source']})" if ds.get("source") else ""), f"hash {run.dataset_hash}"]
    parts.append(f"{len(unreadable)} could not be used" if unreadable else "every image used")
    return " · ".join(parts)


def _method_line(content: ReportContent) -> str:
    st = content.settings
    params = ", ".join(f"{k}={v}" for k, v in sorted((st.params or {}).items()))
    target = "each image's true label" if st.target == "label" else "each image's predicted class"
    return f"{st.method}" + (f" ({params})" if params else "") + f", explaining {target}"


def _numbers(content: ReportContent) -> list[dict]:
    s = content.summary
    out = []
    conf = s.get("confusion", {}).get("matrix") or []
    correct = sum(conf[i][i] for i in range(len(conf))) if conf else None
    out.append({"label": "accuracy", "value": pct(s.get("accuracy")),
                "detail": f"{correct} of {s.get('done')} images" if correct is not None else ""})
    out.append({"label": "flagged images", "value": str(s.get("flagged_count", 0)),
                "detail": f"{pct(s.get('flagged_fraction'))} of those audited"})
    flags = s.get("class_flags", [])
    out.append({"label": "class/region flags", "value": str(len(flags)),
                "detail": ", ".join(sorted({f.get("class", "") for f in flags if f.get("class")})) or "none"})
    inj = s.get("injection")
    if inj:
        out.append({"label": f"injection flips to {inj['settings']['suspect_class']!r}",
                    "value": pct(inj.get("flip_rate")),
                    "detail": f"{inj.get('flips', 0)} of {inj.get('eligible', 0)} eligible; {inj.get('tested', 0)} "
                              f"tested, {inj.get('skipped') or 0} skipped"})
    disc = s.get("discovery")
    if disc:
        clusters = ranked_clusters(s)
        suspicious = [c for c in clusters if c.get("suspicion", 0) >= min_suspicion(content)]
        conf_s = s.get("confirmation") or {}
        out.append({"label": "suspicious clusters", "value": str(len(suspicious)),
                    "detail": f"of {len(clusters)} in {len(disc.get('classes', []))} classes; "
                              f"{conf_s.get('confirmed', 0)} confirmed"})
    return out


def _top(content: ReportContent) -> dict:
    s = content.summary
    if s.get("discovery"):
        threshold = min_suspicion(content)
        ranked = [c for c in ranked_clusters(s) if c.get("suspicion", 0.0) >= threshold]
        if ranked:
            tested = tested_clusters(s)
            conf_settings = (s.get("confirmation") or {}).get("settings") or {}
            vmax = cluster_vmax(content)
            more = (f" {len(ranked) - SUMMARY_CLUSTERS} more under 'Suspicious clusters' in the evidence."
                    if len(ranked) > SUMMARY_CLUSTERS else "")
            return {"title": "Most suspicious clusters", "kind": "clusters",
                    "note": (f"{len(ranked)} of {len(ranked_clusters(s))} clusters have a suspicion of at least "
                             f"{threshold:g}; each shows its mean map, then its most typical members.{more}"),
                    "items": [cluster_card(content, c, members=3, vmax=vmax, tested=tested.get(c["key"]),
                                            conf_settings=conf_settings, detail=False)
                              for c in ranked[:SUMMARY_CLUSTERS]]}
    flagged = s.get("flagged_images", [])
    if flagged:
        items = []
        for f in flagged[:SUMMARY_FLAGGED]:
            imgs = [i for i in (picture(content, f"flagged/{f['rel']}/image", f"{f['rel']}"),
                                picture(content, f"flagged/{f['rel']}/overlay", f"{f['rel']} with its map")) if i]
            items.append({"caption": f"{f['rel']} — true {f['label']}, called {f['predicted_label']}; "
                                     f"{f['reasons'][0] if f.get('reasons') else ''}", "images": imgs})
        return {"title": "Most flagged images", "kind": "flagged", "items": items,
                "note": (f"{s.get('flagged_count', 0)} image(s) flagged; the first {len(items)}, most suspect first "
                         "(picture, then its map).")}
    none = ("Discovery found no cluster above the suspicion threshold, and no image was flagged."
            if s.get("discovery") else "No image was flagged.")
    return {"title": "Suspicious clusters and flagged images", "kind": "none", "items": [], "note": none}


def _summary(content: ReportContent) -> dict:
    checks, more = checks_table(content, limit=SUMMARY_CHECKS)
    g = content.gate
    return {
        "verdict": verdict_of(content),
        "lines": [("Model", _model_line(content)), ("Dataset", _dataset_line(content)),
                  ("Method", _method_line(content))],
        "checks": checks,
        "checks_title": ("What decided it (failed checks first)" if g and not g.get("passed")
                         else "The checks that held (each measure against its limit)"),
        "checks_more": more,
        "numbers": _numbers(content),
        "top": _top(content),
        "caution": CAUTION,
        "decision_line": DECISION_LINE,
    }


# ----------------------------------------------------------------------------------------------- appendix


def _engine_version() -> str:
    try:
        return f"WeasyPrint {metadata.version('weasyprint')}"
    except metadata.PackageNotFoundError:
        return "no PDF engine installed"


def _appendix(content: ReportContent, *, paper: str) -> list[dict]:
    run, s = content.run, content.summary
    model, ds = s.get("model", {}), s.get("dataset", {})
    out: list[dict] = []
    rerun: list[dict] = [
        p("Everything needed to re-run this audit:"),
        table(["what", "value"], [
            ["run id", cell(run.id, "mono")], ["status", run.status], ["started", when(run.created)],
            ["finished", when(run.finished)], ["tool version", f"pellucid {run.tool_version}"],
            ["model", run.model_name], ["model fingerprint (sha256)", cell(run.model_fingerprint, "mono")],
            ["model spec", cell(run.model_spec or "—", "mono")], ["dataset", cell(run.dataset_root, "mono")],
            ["dataset hash", cell(run.dataset_hash, "mono")],
            ["manifest sha256", cell(ds.get("manifest_sha256") or "—", "mono")], ["method", run.method],
            ["environment", provenance_line(s["provenance"]) if s.get("provenance") else "not recorded"],
        ], cls="keyvalue", widths=(30, 70)),
        p("Exact command:"),
        pre(run.command or "(not recorded: the run was started from the dashboard or a notebook)"),
    ]
    if content.gate_source == "given" and content.gate:
        path = ((content.gate.get("policy") or {}).get("path")) or "POLICY.toml"
        rerun += [p("This report's verdict was judged from the stored measures with:"),
                  pre(f"pellucid report {run.id} --policy {path}")]
    out.append({"id": "rerun", "title": "Re-running this audit", "blocks": rerun})
    out.append({"id": "settings", "title": "Settings", "blocks": [
        p("Settings (JSON, as stored with the run):"), pre(json.dumps(run.settings, indent=2, sort_keys=True))]})
    if content.gate:
        pol = content.gate.get("policy") or {}
        rows = [["name", pol.get("name", "")], ["description", pol.get("description") or "—"],
                ["file", cell(pol.get("path") or "—", "mono")], ["sha256", cell(pol.get("sha256") or "—", "mono")]]
        rows += [[cell(k, "mono"), value_text(k, v)] for k, v in (pol.get("thresholds") or {}).items()]
        blocks = [table(["policy", "value"], rows, cls="keyvalue", widths=(30, 70))]
        if pol.get("classes"):
            blocks += [p("Per-class thresholds:"), pre(json.dumps(pol["classes"], indent=2, sort_keys=True))]
        if pol.get("injection"):
            blocks += [p("Injection:"), pre(json.dumps(pol["injection"], indent=2, sort_keys=True))]
        out.append({"id": "policy", "title": "Policy", "blocks": blocks})
    mod: list[dict] = [table(["what", "value"], [
        ["name", model.get("name", run.model_name)], ["description", model.get("description", "")],
        ["fingerprint", cell(model.get("fingerprint", run.model_fingerprint), "mono")],
        ["input (C, H, W)", model.get("input_shape")], ["output", model.get("output_kind")],
        ["classes", ", ".join(s.get("labels", []))],
    ], cls="keyvalue", widths=(30, 70))]
    if model.get("spec_text"):
        mod += [p("Model spec:"), pre(model["spec_text"])]
    if model.get("card_text"):
        mod += [p("Model card:"), pre(model["card_text"])]
    out.append({"id": "model", "title": "Model", "blocks": mod})
    annotated = (f"{ds.get('with_box')} with an object box, {ds.get('with_mask')} with a mask"
                 if ds.get("with_box") or ds.get("with_mask") else "no boxes or masks given")
    dsec: list[dict] = [
        p(f"{ds.get('images')} readable image(s) from {ds.get('source')} at {ds.get('root')}; {annotated}; "
          f"{len(ds.get('skipped', []))} skipped at intake; {len(s.get('failed', []))} failed in the audit."),
        table(["class", "images"], [[c, n] for c, n in ds.get("per_class", {}).items()], num=(1,)),
    ]
    dsec += [p(f"Note: {note}", "note") for note in ds.get("notes", [])]
    out.append({"id": "dataset", "title": "Dataset", "blocks": dsec})
    prov = s.get("provenance") or {}
    from pellucid import __version__

    env_rows = [[k, str(v)] for k, v in prov.items()]
    env_rows += [["report made by", f"pellucid {__version__} at {when(content.generated)}"],
                 ["PDF engine", _engine_version()], ["paper", PAPERS[paper][1]]]
    out.append({"id": "environment", "title": "Environment", "blocks": [
        p("Where the audit ran (as recorded with the run) and what made this report:"),
        table(["what", "value"], env_rows, cls="keyvalue", widths=(30, 70))]})
    return out


# ----------------------------------------------------------------------------------------------- document


def document(content: ReportContent, *, paper: str = "a4") -> dict:
    """The whole report as data for the template, in reading order."""
    run = content.run
    verdict = verdict_of(content)
    from pellucid import __version__

    return {
        "title": f"Folder audit report · {run.model_name} · {run.id}",
        "description": (f"Folder audit of model {run.model_name} (sha256 {run.model_fingerprint}) on "
                        f"{run.dataset_root} (dataset hash {run.dataset_hash}): {verdict['headline']}"),
        "keywords": ["pellucid", "folder audit", run.id, run.model_fingerprint, run.method],
        "generator": f"Pellucid {__version__}",
        "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(content.generated)),
        "paper": PAPERS[paper][0],
        "running": {"left": f"Pellucid folder audit · {run.model_name}",
                    "right": verdict["headline"] if content.gate else "no verdict (no policy judged this run)",
                    "footer": f"run {run.id}\nmodel sha256 {run.model_fingerprint}"},
        "run": {"id": run.id, "model": run.model_name, "fingerprint": run.model_fingerprint,
                "dataset_hash": run.dataset_hash, "generated": when(content.generated),
                "finished": when(run.finished)},
        "summary": _summary(content),
        "evidence": evidence(content),
        "signoff": {"decision_line": DECISION_LINE, "scope": SCOPE_LINE, "caution": CAUTION,
                    "rows": ["Reviewer (name, role)", "Date", "Decision", "Rules or procedure applied", "Notes",
                             "Signature"]},
        "appendix": _appendix(content, paper=paper),
    }
