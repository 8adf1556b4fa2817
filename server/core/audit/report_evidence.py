"""The report's evidence, section by section, and the verdict and clusters the summary page quotes.

Sections, in order: every gate check with its sentence; per-class measures, where the evidence
sits, the confusion matrix and the class mean maps; every cluster of the discovery, ranked, with
pictures and channel ranking; the confirmation tests; flagged images; the injection test;
background swap and channel gallery when they ran; the images that could not be used. Every
sentence is written for any model and any folder: words about "the object" appear only where
boxes or masks were given.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from pellucid.core.audit.measures import CORNERS, REGIONS
from pellucid.core.audit.policy import failed_first
from pellucid.core.audit.report_blocks import (
    cell,
    p,
    pct,
    picture,
    pictures,
    region_words,
    status_cell,
    table,
    value_text,
)
from pellucid.core.audit.report_pictures import heat_uri, png_uri, scale_uri, shade
from pellucid.core.audit.sentences import has_objects, injection_sentence, unreadable_images
from pellucid.core.audit.settings import ConfirmSettings

if TYPE_CHECKING:
    from pellucid.core.audit.report import ReportContent

__all__ = ["MEASURE_SENTENCES", "check_rows", "checks_table", "cluster_card", "cluster_vmax", "evidence",
           "min_suspicion", "ranked_clusters", "tested_clusters", "verdict_of"]

FLAGGED_PICTURES = 24  # flagged images shown as pictures; the rest are listed in a table

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


# ------------------------------------------------------------------------------------------------ verdict


def verdict_of(content: ReportContent) -> dict:
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


def check_rows(checks: list[dict], *, sentences: bool) -> list[list[Any]]:
    rows = []
    for c in failed_first(checks):
        comparison = c.get("comparison", "")
        limit = f"{_COMPARISON.get(comparison, comparison)} {value_text(c['key'], c.get('threshold'))}".strip()
        row = [status_cell(c.get("status", "n/a")), c.get("scope", ""), cell(c["key"], "key"),
               value_text(c["key"], c.get("measured")), limit]
        if sentences:
            row.append(c.get("sentence", ""))
        rows.append(row)
    return rows


def checks_table(content: ReportContent, *, limit: int | None) -> tuple[dict | None, str]:
    checks = (content.gate or {}).get("checks") or []
    if not checks:
        return None, ""
    rows = check_rows(checks, sentences=False)
    more = ""
    if limit is not None and len(rows) > limit:
        shown = rows[:limit]
        more = f"{len(rows) - limit} more check(s), with their sentences, in the evidence."
        rows = shown
    return table(["result", "scope", "policy key", "measured", "limit"], rows, num=(3, 4), cls="checks",
                 widths=(10, 14, 36, 18, 22)), more


# ----------------------------------------------------------------------------------------------- clusters


def ranked_clusters(s: dict) -> list[dict]:
    """Every cluster of every class, most suspicious first (the stored ranking where there is one)."""
    disc = s.get("discovery") or {}
    clusters = {c["key"]: c for cd in disc.get("classes", []) for c in cd.get("clusters", [])}
    order = [k for k in disc.get("ranking", []) if k in clusters]
    rest = sorted((c for k, c in clusters.items() if k not in order),
                  key=lambda c: (-c.get("suspicion", 0.0), -c.get("size", 0), c["key"]))
    return [clusters[k] for k in order] + rest


def min_suspicion(content: ReportContent) -> float:
    conf = content.summary.get("confirmation") or {}
    value = (conf.get("settings") or {}).get("min_suspicion")
    if value is None and content.settings.confirmation is not None:
        value = content.settings.confirmation.min_suspicion
    return float(ConfirmSettings().min_suspicion if value is None else value)


def tested_clusters(s: dict) -> dict[str, dict]:
    return {t["cluster"]: t for t in (s.get("confirmation") or {}).get("tested", []) if t.get("cluster")}


def _confirmation_words(t: dict | None, settings: dict) -> str:
    if t is None:
        return "not tested"
    verdict = t.get("verdict", "not tested")
    removal, transplant = t.get("removal") or {}, t.get("transplant") or {}
    parts = []
    if removal.get("calls_lost_share") is not None:
        parts.append(f"calls lost {pct(removal['calls_lost_share'])} (needs ≥ {pct(settings.get('min_calls_lost'))})")
    net = transplant.get("net_flip_rate", transplant.get("flip_rate"))
    if net is not None:
        parts.append(f"net flips {pct(net)} (needs ≥ {pct(settings.get('min_transplant_flips'))})")
    return verdict + (": " + ", ".join(parts) if parts else "")


def _where_words(c: dict, objects: bool) -> str:
    pl = c.get("placement") or {}
    words = []
    if pl.get("region"):
        words.append(f"{region_words(pl['region'])} {pct(pl.get('region_share'))} of the evidence "
                     f"({pl.get('region_concentration', 0):.1f}× its area)")
    if objects and pl.get("off_object") is not None:
        words.append(f"{pct(pl['off_object'])} off the annotated object")
    return "; ".join(words)


def cluster_vmax(content: ReportContent) -> float:
    maps = [a for n, a in content.arrays.items() if n.startswith("discovery/")]
    return max((float(np.max(a)) for a in maps if a.size), default=1.0) or 1.0


def cluster_card(content: ReportContent, c: dict, *, members: int, vmax: float, tested: dict | None,
                  conf_settings: dict, detail: bool) -> dict:
    key = c["key"]
    mean = content.arrays.get(f"discovery/{key}/mean")
    thumbs = []
    for k in range(members):
        img = picture(content, f"discovery/{key}/member/{k}", f"cluster {key}, member {k + 1}")
        if img is not None:
            thumbs.append(img)
    objects = has_objects(content.summary)
    class_size = c.get("size", 0) / c["share"] if c.get("share") else None
    return {
        "kind": "cluster", "key": key, "class": c.get("class", ""),
        "title": f"Cluster {key}",
        "size": (f"{c.get('size')} of {round(class_size)} {c.get('class')!r} images ({pct(c.get('share'))})"
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


# ----------------------------------------------------------------------------------------------- sections


def _gate_section(content: ReportContent) -> dict:
    verdict = verdict_of(content)
    blocks: list[dict] = [p(f"{verdict['headline']}. " + " ".join(verdict["detail"]))]
    checks = (content.gate or {}).get("checks") or []
    if checks:
        blocks.append(p(MEASURE_SENTENCES["gate"], "meaning"))
        blocks.append(table(["result", "scope", "policy key", "measured", "limit", "check"],
                            check_rows(checks, sentences=True), num=(3, 4), cls="checks",
                            widths=(8, 9, 23, 11, 11, 38)))
    return {"id": "gate", "title": "Gate checks", "blocks": blocks}


def _where_table(content: ReportContent) -> dict:
    s, k = content.summary, content.settings.flag_concentration
    areas = s.get("region_areas", {})
    flagged = {(f.get("class"), f.get("region")) for f in s.get("class_flags", [])}
    head = ["class", *(region_words(n) for n in REGIONS)]
    rows: list[list[Any]] = [["share of the area", *(pct(areas.get(n)) for n in REGIONS)]]
    for c, v in s.get("per_class", {}).items():
        row: list[Any] = [c]
        for n in REGIONS:
            share = v["regions"][n]["mean_share" if n != "centre" else "mean_share_all"]
            if share is None or not areas.get(n):
                row.append("n/a")
                continue
            if n == "centre":  # where the subject usually is: never flagged, so not shaded either
                row.append(pct(share))
                continue
            ratio = share / areas[n]
            bg, fg = shade(ratio, 2 * k)
            bold = ratio >= k or (c, n) in flagged
            row.append(cell(pct(share), cls="flag" if bold else "", style=f"background:{bg};color:{fg}"))
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
        on_object = [pct(v["object_share"]), pct(v["pointing_accuracy"]), pct(v["energy_pointing"])] \
            if objects else []
        rows.append([c, v["images"], pct(v["accuracy"]), *on_object, pct(v["regions"]["border"]["mean_share"]),
                     f"{pct(v['regions'][corner]['mean_share'])} ({region_words(corner)})",
                     pct(v["regions"]["centre"]["mean_share_all"]), v["no_evidence"]])
    all_objects = [pct(obj.get("object_share")), pct(obj.get("pointing_accuracy")),
                   pct(obj.get("energy_pointing"))] if objects else []
    rows.append([cell("all", "total"), s.get("done"), pct(s.get("accuracy")), *all_objects, "", "", "", ""])
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
    ranked = ranked_clusters(s)
    tested = tested_clusters(s)
    conf_settings = (s.get("confirmation") or {}).get("settings") or {}
    threshold = min_suspicion(content)
    blocks: list[dict] = [p(MEASURE_SENTENCES["discovery"].format(off=off), "meaning")]
    if disc.get("method"):
        blocks.append(p(f"Method: {disc['method']}; settings "
                        + ", ".join(f"{k} {v}" for k, v in (disc.get("settings") or {}).items()) + "."))
    rows = []
    for n, c in enumerate(ranked, start=1):
        t = tested.get(c["key"])
        rows.append([n, cell(c["key"], "mono"), c.get("class", ""), c.get("size"), pct(c.get("share")),
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
    vmax = cluster_vmax(content)
    shown = [c for c in ranked if c.get("suspicion", 0.0) >= threshold] or ranked[:1]
    if shown:
        blocks.append({"kind": "scale", "uri": scale_uri(), "lo": "0", "hi": f"{vmax:.1f}",
                       "label": "cluster mean maps on one scale; 1 = what an even spread puts everywhere"})
    for c in shown:
        blocks.append(cluster_card(content, c, members=6, vmax=vmax, tested=tested.get(c["key"]),
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
                            f"lost ≥ {pct(st.get('min_calls_lost'))}, net flips ≥ "
                            f"{pct(st.get('min_transplant_flips'))}.")]
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
                         f"({pct(removal.get('calls_lost_share'))}); mean p {removal.get('p_before', 0):.2f} → "
                         f"{removal.get('p_after', 0):.2f}; accuracy {pct(removal.get('accuracy_before'))} → "
                         f"{pct(removal.get('accuracy_after'))}",
                         f"calls lost ≥ {pct(st.get('min_calls_lost'))}"])
        if transplant:
            control = transplant.get("control") or {}
            rows.append(["transplant", transplant.get("how", ""),
                         f"{transplant.get('eligible', '?')} eligible ({transplant.get('tested', '?')} tested, "
                         f"{transplant.get('skipped', 0)} skipped)",
                         f"{transplant.get('flips', '?')} flips ({pct(transplant.get('flip_rate'))}); control "
                         f"{control.get('flips', '?')} ({pct(control.get('flip_rate'))}); net "
                         f"{pct(transplant.get('net_flip_rate'))}",
                         f"net flips ≥ {pct(st.get('min_transplant_flips'))}"])
        if rows:
            blocks.append(table(["test", "what was done", "images", "effect", "threshold"], rows,
                                widths=(12, 26, 18, 29, 15)))
        if region:
            blocks.append(p(f"Region: {region.get('words', region.get('kind', ''))}; box {region.get('box')}, "
                            f"{pct(region.get('area'))} of the image, from {region.get('from', '—')}.", "note"))
        pics = [i for i in (picture(content, f"confirm/{key}/before", f"{key} before", "before"),
                            picture(content, f"confirm/{key}/after", f"{key} after removal", "region filled"),
                            picture(content, f"confirm/{key}/patch", f"{key} transplanted patch", "transplanted part"),
                            picture(content, f"confirm/{key}/region", f"{key} region", "region")) if i]
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
                          p(f"{s.get('flagged_count', 0)} image(s) flagged ({pct(s.get('flagged_fraction'))} of "
                            "those audited), most suspect first; each picture is followed by its map, on its own "
                            f"scale. {MEASURE_SENTENCES['pictures']}")]
    items = []
    for f in flagged[:FLAGGED_PICTURES]:
        imgs = [i for i in (picture(content, f"flagged/{f['rel']}/image", f["rel"]),
                            picture(content, f"flagged/{f['rel']}/overlay", f"{f['rel']} with its map")) if i]
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
                pct(v["flip_rate"]), "n/a" if v.get("mean_shift") is None else f"{v['mean_shift']:+.3f}"]
               for c, v in inj["per_class"].items()], num=(1, 2, 3, 4, 5, 6, 7), caption="Per class"),
    ]
    patch = picture(content, "injection/patch", "the suspect patch", "the suspect patch")
    if patch:
        blocks.append(pictures([{"caption": "The suspect patch", "images": [patch]}]))
    ex = []
    for e in inj.get("examples", []):
        n = e.get("index")
        pair = [i for i in (picture(content, f"injection/example/{n}/before", f"{e['rel']} before", "before"),
                            picture(content, f"injection/example/{n}/after", f"{e['rel']} with the patch", "after"))
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
              p(f"{sw['tested']} image(s) with {sw['object_source']}: accuracy {pct(sw['accuracy_before'])} → "
                f"{pct(sw['accuracy_after'])} (change {sw['accuracy_change']:+.3f}); {sw['changed_predictions']} "
                "prediction(s) changed.")]
    ex = []
    for n in range(12):
        pair = [i for i in (picture(content, f"swap/example/{n}/before", f"example {n + 1} before", "before"),
                            picture(content, f"swap/example/{n}/after", f"example {n + 1} swapped", "swapped")) if i]
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
        visual = picture(content, f"gallery/visual/{c}", f"channel {c}, synthetic picture", "synthetic")
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


def evidence(content: ReportContent) -> list[dict]:
    """The evidence sections that apply to this run, in reading order."""
    return [sec for sec in (
        _gate_section(content), _measures_section(content), _discovery_section(content),
        _confirmation_section(content), _flagged_section(content), _injection_section(content),
        _swap_section(content), _gallery_section(content), _unreadable_section(content)) if sec]
