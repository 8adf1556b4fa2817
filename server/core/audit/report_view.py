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
from typing import TYPE_CHECKING, Any

import numpy as np

from pellucid.core.audit.caution import CAUTION
from pellucid.core.audit.measures import CORNERS, REGIONS
from pellucid.core.audit.policy import THRESHOLDS, failed_first
from pellucid.core.audit.report_pictures import data_uri, heat_uri, png_uri, scale_uri, shade
from pellucid.core.audit.sentences import has_objects, injection_sentence, unreadable_images
from pellucid.core.audit.settings import ConfirmSettings
from pellucid.core.provenance import provenance_line

if TYPE_CHECKING:
    from pellucid.core.audit.report import ReportContent

__all__ = ["MEASURE_SENTENCES", "PAPERS", "document"]

# Paper sizes the print stylesheet knows: option value → (CSS page size, words).
PAPERS: dict[str, tuple[str, str]] = {
    "a4": ("A4", "A4 (210 × 297 mm)"),
    "letter": ("letter", "US Letter (8.5 × 11 in)"),
}
SUMMARY_CHECKS = 6  # checks listed on the summary page (failed first); all of them under the evidence
SUMMARY_CLUSTERS = 3
SUMMARY_FLAGGED = 4
FLAGGED_PICTURES = 24

MEASURE_SENTENCES: dict[str, str] = {
    "accuracy": "The share of images whose top-1 class is their true label.",
    "confusion": "Rows are true labels, columns the model's calls; off-diagonal cells are the mistakes. Shading "
                 "follows each row's share.",
    "object_share": "Of the map's positive evidence, the share that lies on the annotated object (box or mask); "
                    "near 1 means the evidence sits on what was annotated.",
    "pointing_accuracy": "Pointing game (Zhang et al., ECCV 2016): how often the map's single strongest pixel lands "
                         "on the object, within a tolerance of 15/224 of the input's shorter side (the paper's 15 px "
                         "at 224 px); hits / (hits + misses).",
    "energy_pointing": "Energy-based pointing game (Wang et al., Score-CAM, CVPR-W 2020): the share of the map's "
                       "energy inside the object's bounding box.",
    "regions": "Share of the positive evidence in the border band, each corner box and the centre (corner box = "
               "1/4 of each side, band = 1/16 of the shorter side, centre = 1/2 of each side){off}; a share far "
               "above the region's area points to a possible shortcut such as a stamp, a watermark, a ruler or a "
               "frame.",
    "where": "Each cell is the class's mean share of the evidence in that region{off}; the first row is the region's "
             "share of the image area. Shading grows with share ÷ area (the centre is never flagged and not "
             "shaded); a bold cell is at least {k:g}× its area (the flag rule).",
    "flags": "A corner or the border is flagged for a class when its share of the evidence is at least "
             "{k:g}× its share of the image area.",
    "flagged_images": "Images where a corner or the border holds {k:g}× its share of the area{off}.",
    "flagged_images_objects": "Images where more than {o:.0%} of the evidence lies off the annotated object, or "
                              "where a corner or the border holds {k:g}× its share of the area.",
    "mean_maps": "Each class's maps, scaled so every image weighs the same, averaged at input resolution; "
                 "1 = as much evidence as a uniform map would put there. One colour scale for all classes; corner "
                 "boxes dashed.",
    "discovery": "Discovery looks without a hypothesis: per class, the images' maps are grouped by spectral "
                 "relevance analysis (Lapuschkin et al., Nature Communications 2019), and each group (cluster) is "
                 "ranked by how suspicious its evidence is: compact, in a fixed place, off-centre{off}. A cluster "
                 "is evidence about this model on these images, not proof of a shortcut: a real cue can be small "
                 "and off-centre too.",
    "channels": "Channels of layer {layer} that fire more in the cluster than in {rest}, by {measure}.",
    "confirmation": "Confirmation tests the model's response to a suspicious cluster's evidence region: removal "
                    "fills the region on the cluster's own images and counts the calls of the class that are "
                    "lost; transplant puts the region into images of the other classes and counts the flips to "
                    "the class, net of a control that pastes plain baseline colour in the same shape. 'Confirmed "
                    "shortcut' needs both effects at or above their thresholds.",
    "injection": "The suspect patch is pasted onto images of the other classes. Images where the paste changes "
                 "nothing (they already carry the patch there: at most {levels:g} of 255 levels of change on "
                 "average under it) are skipped and counted. The flip rate is flips / eligible, where eligible "
                 "images are the tested ones the model did not already call the suspect class; the shift is the "
                 "mean change of the suspect class's probability over every tested image.",
    "unreadable": "Images the audit could not use, with the stage and the reason; they are not in any measure.",
    "gate": "Each check compares one measure with the policy's limit; failed checks are listed first. A check "
            "whose measure the audit did not produce fails: missing evidence is not a pass.",
    "background_swap": "Each object is kept and its background replaced by another image's; a model that reads the "
                       "object keeps its accuracy.",
    "gallery": "For the chosen layer, the receptive-field patches where each channel fired hardest over the whole "
               "folder, its mean activation per class, and a synthetic picture that maximises it (feature "
               "visualisation, Olah et al., Distill 2017), which shows what excites the channel, not what it "
               "responds to in the data.",
    "pictures": "Pictures are shown at the resolution the model saw, enlarged without smoothing.",
}

DECISION_LINE = ("The gate's verdict is one input to the decision, not the decision itself: the decision follows "
                 "the domain's own rules, reviews and sign-off.")
SCOPE_LINE = ("This report describes one model on one folder of images with one attribution method. A map that "
              "looks right can still be wrong for other images, and the measures are only as good as the labels "
              "(and any boxes or masks) they use.")


# ---------------------------------------------------------------------------------------------- small parts


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _when(t: float | None) -> str:
    return time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(t)) if t else "—"


def _value(key: str, value: float | None) -> str:
    if value is None:
        return "n/a"
    kind = THRESHOLDS.get(key, ("", "fraction"))[1]
    if kind == "count":
        return f"{int(value)}"
    if kind == "signed":
        return f"{value:+.3f}"
    return f"{100 * value:.1f}%"


def _words(name: str) -> str:
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


def _img(content: ReportContent, name: str, alt: str, label: str = "") -> dict | None:
    png = content.pictures.get(name)
    return {"uri": data_uri(png), "alt": alt, "label": label} if png else None


def _status(status: str) -> dict:
    return cell(status.upper(), cls=f"status {'na' if status == 'n/a' else status}")


# ------------------------------------------------------------------------------------------------ verdict


def _verdict(content: ReportContent) -> dict:
    g = content.gate
    run = content.run
    if not g:
        return {"state": "none", "word": "NO VERDICT", "headline": "No policy judged this run",
                "detail": [("This report shows the measures without a pass/fail verdict; "
                            f"'pellucid report {run.id} --policy FILE' judges the stored measures against a policy "
                            "without re-running the audit.")]}
    policy = g.get("policy") or {}
    checks = g.get("checks") or []
    failed = sum(1 for c in checks if c.get("status") == "fail")
    passed = bool(g.get("passed"))
    how = ("judged now from the stored measures (the audit was not re-run)" if content.gate_source == "given"
           else "judged when the audit ran and stored with the run")
    detail = [f"{failed} of {len(checks)} checks failed; {how}.",
              f"Policy file {policy.get('path') or '—'}, sha256 {policy.get('sha256') or '—'}."]
    stored = content.stored_gate
    if content.gate_source == "given" and stored:
        sp = stored.get("policy") or {}
        detail.append(f"Stored with the run: {'PASS' if stored.get('passed') else 'FAIL'} under policy "
                      f"{sp.get('name')!r} (sha256 {sp.get('sha256') or '—'}).")
    return {"state": "pass" if passed else "fail", "word": "PASS" if passed else "FAIL",
            "headline": f"Gate: {'PASS' if passed else 'FAIL'} under policy {policy.get('name')!r}",
            "detail": detail}


_COMPARISON = {">=": "at least", "<=": "at most", ">": "above", "<": "below"}


def _check_rows(checks: list[dict], *, sentences: bool) -> list[list[Any]]:
    rows = []
    for c in failed_first(checks):
        comparison = c.get("comparison", "")
        limit = f"{_COMPARISON.get(comparison, comparison)} {_value(c['key'], c.get('threshold'))}".strip()
        row = [_status(c.get("status", "n/a")), c.get("scope", ""), cell(c["key"], "key"),
               _value(c["key"], c.get("measured")), limit]
        if sentences:
            row.append(c.get("sentence", ""))
        rows.append(row)
    return rows


def _checks_table(content: ReportContent, *, limit: int | None) -> tuple[dict | None, str]:
    checks = (content.gate or {}).get("checks") or []
    if not checks:
        return None, ""
    rows = _check_rows(checks, sentences=False)
    more = ""
    if limit is not None and len(rows) > limit:
        shown = rows[:limit]
        more = f"{len(rows) - limit} more check(s) under 'Gate checks' in the evidence."
        rows = shown
    return table(["result", "scope", "policy key", "measured", "limit"], rows, num=(3, 4), cls="checks",
                 widths=(10, 14, 36, 18, 22)), more


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
    out.append({"label": "accuracy", "value": _pct(s.get("accuracy")),
                "detail": f"{correct} of {s.get('done')} images" if correct is not None else ""})
    out.append({"label": "flagged images", "value": str(s.get("flagged_count", 0)),
                "detail": f"{_pct(s.get('flagged_fraction'))} of those audited"})
    flags = s.get("class_flags", [])
    out.append({"label": "class/region flags", "value": str(len(flags)),
                "detail": ", ".join(sorted({f.get("class", "") for f in flags if f.get("class")})) or "none"})
    inj = s.get("injection")
    if inj:
        out.append({"label": f"injection flips to {inj['settings']['suspect_class']!r}",
                    "value": _pct(inj.get("flip_rate")),
                    "detail": f"{inj.get('flips', 0)} of {inj.get('eligible', 0)} eligible; {inj.get('tested', 0)} "
                              f"tested, {inj.get('skipped') or 0} skipped"})
    disc = s.get("discovery")
    if disc:
        clusters = _ranked_clusters(s)
        suspicious = [c for c in clusters if c.get("suspicion", 0) >= _min_suspicion(content)]
        conf_s = s.get("confirmation") or {}
        out.append({"label": "suspicious clusters", "value": str(len(suspicious)),
                    "detail": f"of {len(clusters)} in {len(disc.get('classes', []))} classes; "
                              f"{conf_s.get('confirmed', 0)} confirmed"})
    return out


def _ranked_clusters(s: dict) -> list[dict]:
    """Every cluster of every class, most suspicious first (the stored ranking where there is one)."""
    disc = s.get("discovery") or {}
    clusters = {c["key"]: c for cd in disc.get("classes", []) for c in cd.get("clusters", [])}
    order = [k for k in disc.get("ranking", []) if k in clusters]
    rest = sorted((c for k, c in clusters.items() if k not in order),
                  key=lambda c: (-c.get("suspicion", 0.0), -c.get("size", 0), c["key"]))
    return [clusters[k] for k in order] + rest


def _min_suspicion(content: ReportContent) -> float:
    conf = content.summary.get("confirmation") or {}
    value = (conf.get("settings") or {}).get("min_suspicion")
    if value is None and content.settings.confirmation is not None:
        value = content.settings.confirmation.min_suspicion
    return float(ConfirmSettings().min_suspicion if value is None else value)


def _tested(s: dict) -> dict[str, dict]:
    return {t["cluster"]: t for t in (s.get("confirmation") or {}).get("tested", []) if t.get("cluster")}


def _confirmation_words(t: dict | None, settings: dict) -> str:
    if t is None:
        return "not tested"
    verdict = t.get("verdict", "not tested")
    removal, transplant = t.get("removal") or {}, t.get("transplant") or {}
    parts = []
    if removal.get("calls_lost_share") is not None:
        parts.append(f"calls lost {_pct(removal['calls_lost_share'])} (needs ≥ {_pct(settings.get('min_calls_lost'))})")
    net = transplant.get("net_flip_rate", transplant.get("flip_rate"))
    if net is not None:
        parts.append(f"net flips {_pct(net)} (needs ≥ {_pct(settings.get('min_transplant_flips'))})")
    return verdict + (": " + ", ".join(parts) if parts else "")


def _where_words(c: dict, objects: bool) -> str:
    pl = c.get("placement") or {}
    words = []
    if pl.get("region"):
        words.append(f"{_words(pl['region'])} {_pct(pl.get('region_share'))} of the evidence "
                     f"({pl.get('region_concentration', 0):.1f}× its area)")
    if objects and pl.get("off_object") is not None:
        words.append(f"{_pct(pl['off_object'])} off the annotated object")
    return "; ".join(words)


def _cluster_vmax(content: ReportContent) -> float:
    maps = [a for n, a in content.arrays.items() if n.startswith("discovery/")]
    return max((float(np.max(a)) for a in maps if a.size), default=1.0) or 1.0


def _cluster_card(content: ReportContent, c: dict, *, members: int, vmax: float, tested: dict | None,
                  conf_settings: dict, detail: bool) -> dict:
    key = c["key"]
    mean = content.arrays.get(f"discovery/{key}/mean")
    thumbs = []
    for k in range(members):
        img = _img(content, f"discovery/{key}/member/{k}", f"cluster {key}, member {k + 1}")
        if img is not None:
            thumbs.append(img)
    objects = has_objects(content.summary)
    class_size = c.get("size", 0) / c["share"] if c.get("share") else None
    return {
        "kind": "cluster", "key": key, "class": c.get("class", ""),
        "title": f"Cluster {key}",
        "size": (f"{c.get('size')} of {round(class_size)} {c.get('class')!r} images ({_pct(c.get('share'))})"
                 if class_size else f"{c.get('size')} images"),
        "suspicion": f"{c.get('suspicion', 0.0):.2f}",
        "reasons": list(c.get("reasons") or []),
        "where": _where_words(c, objects),
        "mean": heat_uri(mean, vmax=vmax) if mean is not None else None,
        "members": thumbs,
        "confirmation": _confirmation_words(tested, conf_settings),
        "confirmed": bool(tested and tested.get("confirmed")),
        "channels": _channel_table(c.get("channels")) if detail else None,
        "channel_note": (c.get("channels") or {}).get("note") if detail else None,
        "channel_meaning": _channel_meaning(c.get("channels")) if detail else "",
    }


def _channel_meaning(ch: dict | None) -> str:
    if not ch or not ch.get("channels"):
        return ""
    return MEASURE_SENTENCES["channels"].format(layer=ch.get("layer"), rest=ch.get("compared_with", "the rest"),
                                                measure=ch.get("measure", "effect size"))


def _channel_table(ch: dict | None) -> dict | None:
    if not ch or not ch.get("channels"):
        return None
    rows = [[r.get("channel"), f"{r.get('effect', 0.0):.2f}", f"{r.get('mean_cluster', 0.0):.3f}",
             f"{r.get('mean_rest', 0.0):.3f}"] for r in ch["channels"]]
    return table(["channel", "effect (Cohen's d)", f"mean in cluster ({ch.get('cluster_images', '?')} images)",
                  f"mean in {ch.get('compared_with', 'the rest')} ({ch.get('rest_images', '?')} images)"], rows,
                 num=(0, 1, 2, 3), cls="compact", widths=(14, 22, 30, 34))


def _top(content: ReportContent) -> dict:
    s = content.summary
    if s.get("discovery"):
        threshold = _min_suspicion(content)
        ranked = [c for c in _ranked_clusters(s) if c.get("suspicion", 0.0) >= threshold]
        if ranked:
            tested = _tested(s)
            conf_settings = (s.get("confirmation") or {}).get("settings") or {}
            vmax = _cluster_vmax(content)
            return {"title": "Most suspicious clusters", "kind": "clusters",
                    "note": (f"Clusters of images whose evidence looks alike, with suspicion at least {threshold:g} "
                             f"(of {len(_ranked_clusters(s))} clusters); mean map first, then the most typical "
                             "members."),
                    "items": [_cluster_card(content, c, members=3, vmax=vmax, tested=tested.get(c["key"]),
                                            conf_settings=conf_settings, detail=False)
                              for c in ranked[:SUMMARY_CLUSTERS]]}
    flagged = s.get("flagged_images", [])
    if flagged:
        items = []
        for f in flagged[:SUMMARY_FLAGGED]:
            imgs = [i for i in (_img(content, f"flagged/{f['rel']}/image", f"{f['rel']}"),
                                _img(content, f"flagged/{f['rel']}/overlay", f"{f['rel']} with its map")) if i]
            items.append({"caption": f"{f['rel']} — true {f['label']}, called {f['predicted_label']}; "
                                     f"{f['reasons'][0] if f.get('reasons') else ''}", "images": imgs})
        return {"title": "Most flagged images", "kind": "flagged", "items": items,
                "note": (f"{s.get('flagged_count', 0)} image(s) flagged; the first {len(items)}, most suspect first "
                         "(picture, then its map).")}
    none = ("Discovery found no cluster above the suspicion threshold, and no image was flagged."
            if s.get("discovery") else "No image was flagged.")
    return {"title": "Suspicious clusters and flagged images", "kind": "none", "items": [], "note": none}


def _summary(content: ReportContent) -> dict:
    checks, more = _checks_table(content, limit=SUMMARY_CHECKS)
    g = content.gate
    return {
        "verdict": _verdict(content),
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


# ----------------------------------------------------------------------------------------------- evidence


def _gate_section(content: ReportContent) -> dict:
    verdict = _verdict(content)
    blocks: list[dict] = [p(f"{verdict['headline']}. " + " ".join(verdict["detail"]))]
    checks = (content.gate or {}).get("checks") or []
    if checks:
        blocks.append(p(MEASURE_SENTENCES["gate"], "meaning"))
        blocks.append(table(["result", "scope", "policy key", "measured", "limit", "check"],
                            _check_rows(checks, sentences=True), num=(3, 4), cls="checks",
                            widths=(8, 9, 23, 11, 11, 38)))
    return {"id": "gate", "title": "Gate checks", "blocks": blocks}


def _where_table(content: ReportContent) -> dict:
    s, k = content.summary, content.settings.flag_concentration
    areas = s.get("region_areas", {})
    flagged = {(f.get("class"), f.get("region")) for f in s.get("class_flags", [])}
    head = ["class", *(_words(n) for n in REGIONS)]
    rows: list[list[Any]] = [["share of the area", *(_pct(areas.get(n)) for n in REGIONS)]]
    for c, v in s.get("per_class", {}).items():
        row: list[Any] = [c]
        for n in REGIONS:
            share = v["regions"][n]["mean_share" if n != "centre" else "mean_share_all"]
            if share is None or not areas.get(n):
                row.append("n/a")
                continue
            if n == "centre":  # where the subject usually is: never flagged, so not shaded either
                row.append(_pct(share))
                continue
            ratio = share / areas[n]
            bg, fg = shade(ratio, 2 * k)
            bold = ratio >= k or (c, n) in flagged
            row.append(cell(_pct(share), cls="flag" if bold else "", style=f"background:{bg};color:{fg}"))
        rows.append(row)
    return table(head, rows, num=tuple(range(1, len(head))), cls="shaded")


def _confusion_table(s: dict) -> dict | None:
    conf = s.get("confusion") or {}
    labels, matrix = conf.get("labels") or [], conf.get("matrix") or []
    if not labels:
        return None
    rows = []
    for i, c in enumerate(labels):
        total = sum(matrix[i]) or 1
        row: list[Any] = [c]
        for j in range(len(labels)):
            bg, fg = shade(matrix[i][j] / total, 1.0, colour="#4f8d91")
            row.append(cell(matrix[i][j], cls="diag" if i == j else "", style=f"background:{bg};color:{fg}"))
        row.append(sum(matrix[i]))
        rows.append(row)
    return table(["true ↓ / called →", *labels, "images"], rows, num=tuple(range(1, len(labels) + 2)),
                 cls="shaded confusion", caption="Confusion matrix")


def _measures_section(content: ReportContent) -> dict:
    s, st = content.summary, content.settings
    k, objects = st.flag_concentration, has_objects(s)
    off = " (only evidence off the annotated object counts)" if objects else ""
    blocks: list[dict] = [p(MEASURE_SENTENCES["accuracy"], "meaning")]
    if objects:
        blocks += [p(MEASURE_SENTENCES[n], "meaning") for n in ("object_share", "pointing_accuracy", "energy_pointing")]
    blocks += [p(MEASURE_SENTENCES["regions"].format(off=off), "meaning"),
               p(MEASURE_SENTENCES["flags"].format(k=k), "meaning")]
    rows = []
    obj = s.get("object", {})
    for c, v in s.get("per_class", {}).items():
        corner = max(CORNERS, key=lambda n: v["regions"][n]["mean_share"] or 0.0)
        on_object = [_pct(v["object_share"]), _pct(v["pointing_accuracy"]), _pct(v["energy_pointing"])] \
            if objects else []
        rows.append([c, v["images"], _pct(v["accuracy"]), *on_object, _pct(v["regions"]["border"]["mean_share"]),
                     f"{_pct(v['regions'][corner]['mean_share'])} ({_words(corner)})",
                     _pct(v["regions"]["centre"]["mean_share_all"]), v["no_evidence"]])
    all_objects = [_pct(obj.get("object_share")), _pct(obj.get("pointing_accuracy")),
                   _pct(obj.get("energy_pointing"))] if objects else []
    rows.append([cell("all", "total"), s.get("done"), _pct(s.get("accuracy")), *all_objects, "", "", "", ""])
    object_heads = ["on object", "pointing game", "energy pointing"] if objects else []
    heads = ["class", "images", "accuracy", *object_heads, "border", "largest corner", "centre",
             "maps without evidence"]
    blocks.append(table(heads, rows, num=tuple(range(1, len(heads))), caption="Per class"))
    for f in s.get("class_flags", []):
        blocks.append(p(f["sentence"], "flagline"))
    blocks.append(p(MEASURE_SENTENCES["where"].format(off=off, k=k), "meaning"))
    w = _where_table(content)
    w["caption"] = "Where the evidence sits, per true class"
    blocks.append(w)
    confusion = _confusion_table(s)
    if confusion is not None:
        blocks += [p(MEASURE_SENTENCES["confusion"], "meaning"), confusion]
    maps = {c: content.arrays[f"mean_map/{c}"] for c in s.get("labels", []) if f"mean_map/{c}" in content.arrays}
    if maps:
        vmax = max(float(a.max()) for a in maps.values()) or 1.0
        blocks += [p(MEASURE_SENTENCES["mean_maps"], "meaning"),
                   {"kind": "maps", "caption": "Mean positive evidence per true class",
                    "items": [{"label": c, "uri": heat_uri(a, vmax=vmax, layout=st.regions)}
                              for c, a in maps.items()],
                    "scale": {"uri": scale_uri(), "lo": "0", "hi": f"{vmax:.1f}",
                              "mid": "evidence per pixel; 1 = what a uniform map puts everywhere"}}]
    return {"id": "measures", "title": "Per-class measures and mean maps", "blocks": blocks}


def _discovery_section(content: ReportContent) -> dict | None:
    s = content.summary
    disc = s.get("discovery")
    if not disc:
        return None
    objects = has_objects(s)
    off = ", off the annotated object" if objects else ""
    ranked = _ranked_clusters(s)
    tested = _tested(s)
    conf_settings = (s.get("confirmation") or {}).get("settings") or {}
    threshold = _min_suspicion(content)
    blocks: list[dict] = [p(MEASURE_SENTENCES["discovery"].format(off=off), "meaning")]
    if disc.get("method"):
        blocks.append(p(f"Method: {disc['method']}; settings "
                        + ", ".join(f"{k} {v}" for k, v in (disc.get("settings") or {}).items()) + "."))
    rows = []
    for n, c in enumerate(ranked, start=1):
        t = tested.get(c["key"])
        rows.append([n, cell(c["key"], "mono"), c.get("class", ""), c.get("size"), _pct(c.get("share")),
                     cell(f"{c.get('suspicion', 0.0):.2f}", "flag" if c.get("suspicion", 0.0) >= threshold else ""),
                     _where_words(c, objects), t.get("verdict", "not tested") if t else "not tested"])
    if rows:
        blocks.append(table(["#", "cluster", "class", "images", "share of class", "suspicion", "where its "
                             "evidence sits", "confirmation"], rows, num=(0, 3, 4, 5),
                            caption=f"Every cluster, most suspicious first (bold: suspicion ≥ {threshold:g})",
                            widths=(5, 11, 10, 9, 9, 11, 30, 15)))
    for cd in disc.get("classes", []):
        if cd.get("note"):
            blocks.append(p(f"{cd.get('class')}: {cd['note']}", "note"))
    vmax = _cluster_vmax(content)
    shown = [c for c in ranked if c.get("suspicion", 0.0) >= threshold] or ranked[:1]
    if shown:
        blocks.append({"kind": "scale", "uri": scale_uri(), "lo": "0", "hi": f"{vmax:.1f}",
                       "label": "cluster mean maps on one scale; 1 = what an even spread puts everywhere"})
    for c in shown:
        blocks.append(_cluster_card(content, c, members=6, vmax=vmax, tested=tested.get(c["key"]),
                                    conf_settings=conf_settings, detail=True))
    caution = (s.get("confirmation") or {}).get("caution")
    if caution:
        blocks.append({"kind": "caution", "text": caution})
    return {"id": "discovery", "title": "Suspicious clusters (discovery)", "blocks": blocks}


def _confirmation_section(content: ReportContent) -> dict | None:
    conf = content.summary.get("confirmation") or {}
    tested = conf.get("tested") or []
    if not conf:
        return None
    st = conf.get("settings") or {}
    blocks: list[dict] = [p(MEASURE_SENTENCES["confirmation"], "meaning"),
                          p(f"{conf.get('candidates', len(tested))} cluster(s) tested (suspicion ≥ "
                            f"{st.get('min_suspicion', '?')}, at least {st.get('min_size', '?')} images, at most "
                            f"{st.get('max_clusters', '?')}); {conf.get('confirmed', 0)} confirmed. Thresholds: calls "
                            f"lost ≥ {_pct(st.get('min_calls_lost'))}, net flips ≥ "
                            f"{_pct(st.get('min_transplant_flips'))}.")]
    if conf.get("channel_note"):
        blocks.append(p(f"Channels: {conf['channel_note']}.", "note"))
    for t in tested:
        key = t.get("cluster", "")
        blocks.append({"kind": "h3", "text": f"Cluster {key}: {t.get('verdict', 'not tested')}",
                       "cls": "confirmed" if t.get("confirmed") else ""})
        if t.get("sentence"):
            blocks.append(p(t["sentence"]))
        removal, transplant, region = t.get("removal") or {}, t.get("transplant") or {}, t.get("region") or {}
        rows: list[list[Any]] = []
        if removal:
            rows.append(["removal", removal.get("how", ""), removal.get("images", ""),
                         f"{removal.get('calls_lost', '?')} of {removal.get('calls', '?')} calls lost "
                         f"({_pct(removal.get('calls_lost_share'))}); mean p {removal.get('p_before', 0):.2f} → "
                         f"{removal.get('p_after', 0):.2f}; accuracy {_pct(removal.get('accuracy_before'))} → "
                         f"{_pct(removal.get('accuracy_after'))}",
                         f"calls lost ≥ {_pct(st.get('min_calls_lost'))}"])
        if transplant:
            control = transplant.get("control") or {}
            rows.append(["transplant", transplant.get("how", ""),
                         f"{transplant.get('eligible', '?')} eligible ({transplant.get('tested', '?')} tested, "
                         f"{transplant.get('skipped', 0)} skipped)",
                         f"{transplant.get('flips', '?')} flips ({_pct(transplant.get('flip_rate'))}); control "
                         f"{control.get('flips', '?')} ({_pct(control.get('flip_rate'))}); net "
                         f"{_pct(transplant.get('net_flip_rate'))}",
                         f"net flips ≥ {_pct(st.get('min_transplant_flips'))}"])
        if rows:
            blocks.append(table(["test", "what was done", "images", "effect", "threshold"], rows,
                                widths=(12, 26, 18, 29, 15)))
        if region:
            blocks.append(p(f"Region: {region.get('words', region.get('kind', ''))}; box {region.get('box')}, "
                            f"{_pct(region.get('area'))} of the image, from {region.get('from', '—')}.", "note"))
        pics = [i for i in (_img(content, f"confirm/{key}/before", f"{key} before", "before"),
                            _img(content, f"confirm/{key}/after", f"{key} after removal", "region filled"),
                            _img(content, f"confirm/{key}/patch", f"{key} transplanted patch", "transplanted part"),
                            _img(content, f"confirm/{key}/region", f"{key} region", "region")) if i]
        if pics:
            blocks.append(pictures([{"caption": f"Cluster {key}: its most typical image, the region filled, the "
                                                "part transplanted, and the region", "images": pics}], "wide"))
    return {"id": "confirmation", "title": "Confirmation", "blocks": blocks}


def _flagged_section(content: ReportContent) -> dict:
    s, st = content.summary, content.settings
    k, o = st.flag_concentration, st.flag_outside
    objects = has_objects(s)
    rule = (MEASURE_SENTENCES["flagged_images_objects"].format(o=o, k=k) if objects
            else MEASURE_SENTENCES["flagged_images"].format(k=k, off=""))
    flagged = s.get("flagged_images", [])
    blocks: list[dict] = [p(rule, "meaning"),
                          p(f"{s.get('flagged_count', 0)} image(s) flagged ({_pct(s.get('flagged_fraction'))} of "
                            "those audited), most suspect first; each picture is followed by its map, on its own "
                            f"scale. {MEASURE_SENTENCES['pictures']}")]
    items = []
    for f in flagged[:FLAGGED_PICTURES]:
        imgs = [i for i in (_img(content, f"flagged/{f['rel']}/image", f["rel"]),
                            _img(content, f"flagged/{f['rel']}/overlay", f"{f['rel']} with its map")) if i]
        items.append({"caption": f"{f['rel']} — true {f['label']}, called {f['predicted_label']}; "
                                 + "; ".join(f.get("reasons", [])), "images": imgs})
    if items:
        blocks.append(pictures(items))
    if len(flagged) > FLAGGED_PICTURES:
        blocks.append(table(["more flagged images", "true", "called", "why"],
                            [[cell(f["rel"], "mono"), f["label"], f["predicted_label"], "; ".join(f["reasons"])]
                             for f in flagged[FLAGGED_PICTURES:]], widths=(32, 12, 12, 44)))
    if s.get("flagged_count", 0) > len(flagged):
        blocks.append(p(f"The run lists the first {len(flagged)} of {s['flagged_count']} flagged images.", "note"))
    return {"id": "flagged", "title": "Flagged images", "blocks": blocks}


def _injection_section(content: ReportContent) -> dict | None:
    inj = content.summary.get("injection")
    if not inj:
        return None
    st_inj = inj["settings"]
    blocks: list[dict] = [
        p(MEASURE_SENTENCES["injection"].format(levels=inj.get("same_patch_levels", 8.0)), "meaning"),
        p(f"Suspect class {st_inj['suspect_class']!r}; patch {st_inj['patch_size'][0]}×{st_inj['patch_size'][1]} px "
          f"({st_inj['source']}, sha256 {st_inj['patch_sha256']})"
          + (f"; random places drawn from seed {st_inj.get('seed', 0)}" if st_inj.get("at") == "random" else "")
          + "."),
        p(injection_sentence(inj)),
        table(["class", "other-class images", "skipped (already carry the patch)", "tested", "eligible", "flips",
               "flip rate", "mean shift"],
              [[c, v.get("considered", v["tested"]), v.get("skipped", "—"), v["tested"], v["eligible"], v["flips"],
                _pct(v["flip_rate"]), "n/a" if v.get("mean_shift") is None else f"{v['mean_shift']:+.3f}"]
               for c, v in inj["per_class"].items()], num=(1, 2, 3, 4, 5, 6, 7), caption="Per class"),
    ]
    patch = _img(content, "injection/patch", "the suspect patch", "the suspect patch")
    if patch:
        blocks.append(pictures([{"caption": "The suspect patch", "images": [patch]}]))
    ex = []
    for e in inj.get("examples", []):
        n = e.get("index")
        pair = [i for i in (_img(content, f"injection/example/{n}/before", f"{e['rel']} before", "before"),
                            _img(content, f"injection/example/{n}/after", f"{e['rel']} with the patch", "after"))
                if i]
        ex.append({"caption": (f"{e['rel']}: {e['before']} → {e['after']}, p({st_inj['suspect_class']}) "
                               f"{e['p_suspect_before']:.2f} → {e['p_suspect_after']:.2f}"), "images": pair})
    if ex:
        blocks.append(pictures(ex))
    if inj.get("skipped_images"):
        blocks.append(table(["skipped image", "why"],
                            [[cell(x["rel"], "mono"), x["reason"]] for x in inj["skipped_images"][:200]],
                            widths=(35, 65)))
    return {"id": "injection", "title": "Injection test", "blocks": blocks}


def _swap_section(content: ReportContent) -> dict | None:
    sw = content.summary.get("background_swap")
    if not sw:
        return None
    blocks = [p(MEASURE_SENTENCES["background_swap"], "meaning"),
              p(f"{sw['tested']} image(s) with {sw['object_source']}: accuracy {_pct(sw['accuracy_before'])} → "
                f"{_pct(sw['accuracy_after'])} (change {sw['accuracy_change']:+.3f}); {sw['changed_predictions']} "
                "prediction(s) changed.")]
    ex = []
    for n in range(12):
        pair = [i for i in (_img(content, f"swap/example/{n}/before", f"example {n + 1} before", "before"),
                            _img(content, f"swap/example/{n}/after", f"example {n + 1} swapped", "swapped")) if i]
        if pair:
            ex.append({"caption": f"Example {n + 1}", "images": pair})
    if ex:
        blocks.append(pictures(ex))
    return {"id": "swap", "title": "Background swap", "blocks": blocks}


def _gallery_section(content: ReportContent) -> dict | None:
    g = content.summary.get("gallery")
    patches = content.arrays.get("gallery/patches")
    if not g or patches is None:
        return None
    rows = []
    for c in g["most_selective"][:6]:
        visual = _img(content, f"gallery/visual/{c}", f"channel {c}, synthetic picture", "synthetic")
        means = [float(v) for v in g["class_means"][c]]
        top = max(means) if means and max(means) > 0 else 1.0
        rows.append({
            "title": f"channel {c}",
            "detail": f"prefers {g['preferred_class'][c]!r}, selectivity {g['selectivity'][c]:.2f}",
            "visual": visual,
            "patches": [{"uri": png_uri(patches[c, n]), "alt": f"channel {c}, top patch {n + 1}"}
                        for n in range(patches.shape[1])],
            "bars": [{"label": cls, "value": f"{m:.3f}", "width": f"{max(0.0, m) / top * 100:.0f}%"}
                     for cls, m in zip(g["classes"], means)],
        })
    blocks = [p(MEASURE_SENTENCES["gallery"], "meaning"),
              p(f"Layer {g['layer']} ({g['output_shape'][0]} channels), top {g['top']} units per channel over "
                f"{g['images']} image(s); receptive field {g['rf_size']} px, jump {g['rf_jump']}; the most "
                "class-selective channels first."),
              {"kind": "gallery", "rows": rows}]
    return {"id": "gallery", "title": "Channel response gallery", "blocks": blocks}


def _unreadable_section(content: ReportContent) -> dict | None:
    unreadable = unreadable_images(content.summary.get("dataset", {}), content.summary)
    if not unreadable:
        return None
    return {"id": "unreadable", "title": "Images that could not be used", "blocks": [
        p(MEASURE_SENTENCES["unreadable"], "meaning"),
        table(["image", "stage", "reason"], [[cell(u["rel"], "mono"), u["stage"], u["reason"]] for u in unreadable],
              widths=(30, 16, 54)),
    ]}


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
            ["run id", cell(run.id, "mono")], ["status", run.status], ["started", _when(run.created)],
            ["finished", _when(run.finished)], ["tool version", f"pellucid {run.tool_version}"],
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
        rows += [[cell(k, "mono"), _value(k, v)] for k, v in (pol.get("thresholds") or {}).items()]
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
    env_rows += [["report made by", f"pellucid {__version__} at {_when(content.generated)}"],
                 ["PDF engine", _engine_version()], ["paper", PAPERS[paper][1]]]
    out.append({"id": "environment", "title": "Environment", "blocks": [
        p("Where the audit ran (as recorded with the run) and what made this report:"),
        table(["what", "value"], env_rows, cls="keyvalue", widths=(30, 70))]})
    return out


# ----------------------------------------------------------------------------------------------- document


def document(content: ReportContent, *, paper: str = "a4") -> dict:
    """The whole report as data for the template, in reading order."""
    run = content.run
    verdict = _verdict(content)
    evidence = [sec for sec in (
        _gate_section(content), _measures_section(content), _discovery_section(content),
        _confirmation_section(content), _flagged_section(content), _injection_section(content),
        _swap_section(content), _gallery_section(content), _unreadable_section(content)) if sec]
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
                "dataset_hash": run.dataset_hash, "generated": _when(content.generated),
                "finished": _when(run.finished)},
        "summary": _summary(content),
        "evidence": evidence,
        "signoff": {"decision_line": DECISION_LINE, "scope": SCOPE_LINE, "caution": CAUTION,
                    "rows": ["Reviewer (name, role)", "Date", "Decision", "Rules or procedure applied", "Notes",
                             "Signature"]},
        "appendix": _appendix(content, paper=paper),
    }
