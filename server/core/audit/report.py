"""The reviewer's report for a stored audit run: one self-contained HTML file and its PDF.

The HTML carries every picture inline (data URIs) and its own styles, so it can be mailed or
archived as one file. The PDF is made with matplotlib's PdfPages from the same content: text
pages and figure pages, no external tool. Both name everything needed to re-run the audit:
model fingerprint, spec, dataset hash, settings, tool version and the exact command.
"""

from __future__ import annotations

import base64
import html
import io
import json
import textwrap
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import matplotlib

matplotlib.use("Agg")

import numpy as np
from matplotlib import colormaps
from matplotlib.backends.backend_pdf import PdfPages
from matplotlib.figure import Figure
from PIL import Image

from pellucid.core.audit.caution import CAUTION
from pellucid.core.audit.measures import CORNERS, region_masks
from pellucid.core.audit.policy import THRESHOLDS, Policy, evaluate_policy, failed_first, gate_of
from pellucid.core.audit.sentences import has_objects, injection_sentence, unreadable_images
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.audit.store import DONE, RunRecord, Store
from pellucid.core.errors import BadParameterError, StoreError
from pellucid.core.provenance import provenance_line

__all__ = ["MEASURE_SENTENCES", "ReportContent", "build_report", "write_report"]

MEASURE_SENTENCES: dict[str, str] = {
    "accuracy": "The share of images whose top-1 class is their true label.",
    "confusion": "Rows are true labels, columns the model's calls; off-diagonal cells are the mistakes.",
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
    "flags": "A corner or the border is flagged for a class when its share of the evidence is at least "
             "{k:g}× its share of the image area.",
    "flagged_images": "Images where a corner or the border holds {k:g}× its share of the area{off}.",
    "flagged_images_objects": "Images where more than {o:.0%} of the evidence lies off the annotated object, or "
                              "where a corner or the border holds {k:g}× its share of the area.",
    "mean_maps": "Each class's maps, scaled so every image weighs the same, averaged at input resolution; "
                 "1 = as much evidence as a uniform map would put there.",
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
}

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,Arial,sans-serif;color:#1f2a2e;background:#f6f4ef;
margin:0;padding:1.5rem 2rem;max-width:1100px}
h1{font-size:1.5rem}h2{font-size:1.15rem;border-bottom:2px solid #23575b;padding-bottom:.2rem;margin-top:2rem}
h3{font-size:1rem}.caution{background:#fbf0dc;border-left:4px solid #b86e00;padding:.6rem .9rem}
table{border-collapse:collapse;font-size:.9rem;margin:.5rem 0}th,td{border-bottom:1px solid #d9d4c7;
padding:.25rem .5rem;text-align:left;vertical-align:top}th{color:#5b6a6f}td.num{text-align:right;
font-variant-numeric:tabular-nums}.mono,pre{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.82rem}
pre{background:#fffdf8;border:1px solid #d9d4c7;padding:.6rem;white-space:pre-wrap;word-break:break-all}
.pass{color:#23575b;font-weight:700}.fail{color:#a2361f;font-weight:700}.na{color:#5b6a6f}
figure{margin:.6rem 0}figcaption{font-size:.85rem;color:#5b6a6f}.grid{display:flex;flex-wrap:wrap;gap:.8rem}
.grid figure{width:200px}.grid img{width:96px;image-rendering:pixelated}.meaning{color:#5b6a6f;font-size:.88rem}
img.fig{max-width:100%}
"""


def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode("ascii")


def _fig_png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    return buf.getvalue()


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _png_array(png: bytes) -> np.ndarray:
    return np.asarray(Image.open(io.BytesIO(png)).convert("RGB"))


@dataclass
class ReportContent:
    """Everything a report shows, gathered once for both the HTML and the PDF."""

    run: RunRecord
    summary: dict
    settings: AuditSettings
    gate: dict | None  # PolicyResult.to_dict(): stored with the run, or judged now under a given policy
    figures: dict[str, Figure]
    pictures: dict[str, bytes]  # name → PNG bytes
    generated: float
    gate_source: str = "stored"  # "stored" (judged when the audit ran) or "given" (judged now, --policy)
    stored_gate: dict | None = None


def _confusion_figure(summary: dict) -> Figure:
    labels = summary["confusion"]["labels"]
    m = np.asarray(summary["confusion"]["matrix"], dtype=float)
    fig = Figure(figsize=(4.6, 3.8))
    ax = fig.add_subplot()
    ax.imshow(m, cmap=colormaps["cividis"])
    ax.set_xticks(range(len(labels)), labels, rotation=30, ha="right")
    ax.set_yticks(range(len(labels)), labels)
    ax.set_xlabel("predicted")
    ax.set_ylabel("true label")
    top = m.max() if m.size else 0
    for i in range(m.shape[0]):
        for j in range(m.shape[1]):
            ax.text(j, i, f"{int(m[i, j])}", ha="center", va="center", fontsize=9,
                    color="black" if m[i, j] > top / 2 else "white")
    ax.set_title("Confusion matrix")
    return fig


def _mean_maps_figure(store: Store, summary: dict, settings: AuditSettings) -> Figure | None:
    maps = {c: store.get_array(h) for c, h in summary.get("mean_maps", {}).items()}
    if not maps:
        return None
    vmax = max(float(m.max()) for m in maps.values()) or 1.0
    fig = Figure(figsize=(2.3 * len(maps) + 0.8, 2.8))
    axes = fig.subplots(1, len(maps), squeeze=False)[0]
    im = None
    for ax, (c, m) in zip(axes, maps.items()):
        im = ax.imshow(m, cmap=colormaps["cividis"], vmin=0.0, vmax=vmax)
        regions = region_masks(m.shape, settings.regions)
        for name in CORNERS:
            ys, xs = np.nonzero(regions[name])
            ax.add_patch(matplotlib.patches.Rectangle((xs.min() - 0.5, ys.min() - 0.5), xs.max() - xs.min() + 1,
                                                      ys.max() - ys.min() + 1, fill=False, lw=0.6, ec="white",
                                                      ls="--"))
        ax.set_title(c, fontsize=10)
        ax.set_xticks([])
        ax.set_yticks([])
    if im is not None:
        fig.colorbar(im, ax=list(axes), shrink=0.8, label="evidence (1 = uniform)")
    fig.suptitle("Mean positive evidence per true class (corner boxes dashed; one shared scale)", fontsize=10)
    return fig


def _regions_figure(summary: dict) -> Figure:
    classes = list(summary["per_class"])
    names = ["border", *CORNERS, "centre"]
    fig = Figure(figsize=(7.0, 3.2))
    ax = fig.add_subplot()
    width = 0.8 / max(1, len(classes))
    x = np.arange(len(names))
    for k, c in enumerate(classes):
        vals = [summary["per_class"][c]["regions"][n]["mean_share"] or 0.0 for n in names]
        ax.bar(x + k * width - 0.4 + width / 2, vals, width, label=c,
               color=colormaps["viridis"](k / max(1, len(classes))))
    areas = [summary["region_areas"][n] for n in names]
    ax.scatter(x, areas, marker="_", s=400, color="black", label="area share", zorder=3)
    ax.set_xticks(x, [n.replace("_", "-") for n in names])
    ax.set_ylabel("share of evidence off the object" if has_objects(summary) else "share of positive evidence")
    ax.set_ylim(0, 1)
    ax.legend(fontsize=8, ncol=3)
    ax.set_title("Where the evidence sits, per true class")
    return fig


def build_report(store: Store, run_id: str, *, policy: Policy | None = None) -> ReportContent:
    run = store.get_run(run_id)
    if run.status != DONE or not run.summary:
        raise BadParameterError(
            f"run {run.id} is {run.status}; only finished runs have a report. Resume it with the command it was "
            f"started with{': ' + run.command if run.command else ''}"
        )
    summary = run.summary
    settings = AuditSettings.from_dict(run.settings["audit"])
    stored_gate = gate_of(run)
    # A given policy re-judges the stored measures (nothing is re-run); else the stored verdict is shown.
    gate = evaluate_policy(policy, summary, labels=summary["labels"]).to_dict() if policy else stored_gate
    figures: dict[str, Figure] = {"confusion": _confusion_figure(summary), "regions": _regions_figure(summary)}
    mm = _mean_maps_figure(store, summary, settings)
    if mm is not None:
        figures["mean_maps"] = mm
    pictures: dict[str, bytes] = {}
    for name, digest in store.run_artefacts(run.id).items():
        if name.startswith(("flagged/", "injection/", "swap/", "gallery/visual/")):
            pictures[name] = store.get_bytes(digest)
    artefacts = store.run_artefacts(run.id)
    if "gallery/patches" in artefacts and summary.get("gallery"):
        figures["gallery"] = _gallery_figure(store.get_array(artefacts["gallery/patches"]), summary["gallery"],
                                             pictures)
    return ReportContent(run=run, summary=summary, settings=settings, gate=gate, figures=figures,
                         pictures=pictures, generated=time.time(), gate_source="given" if policy else "stored",
                         stored_gate=stored_gate)


def _gallery_figure(patches: np.ndarray, gallery: dict, pictures: dict[str, bytes]) -> Figure:
    chosen = gallery["most_selective"][:4]
    top = patches.shape[1]
    cols = top + 2
    fig = Figure(figsize=(1.0 * cols + 1.5, 1.25 * len(chosen) + 0.6))
    axes = fig.subplots(len(chosen), cols, squeeze=False)
    for r, c in enumerate(chosen):
        visual = pictures.get(f"gallery/visual/{c}")
        ax = axes[r][0]
        if visual is not None:
            ax.imshow(_png_array(visual))
        ax.set_title("synthetic" if r == 0 else "", fontsize=7)
        ax.set_ylabel(f"ch {c}\n{gallery['preferred_class'][c]}\nsel {gallery['selectivity'][c]:.2f}", fontsize=7)
        for n in range(top):
            axes[r][n + 1].imshow(patches[c, n])
            if r == 0 and n == 0:
                axes[r][n + 1].set_title("top patches →", fontsize=7)
        means = np.asarray(gallery["class_means"][c])
        axb = axes[r][cols - 1]
        axb.barh(range(len(means)), means, color="#23575b")
        axb.set_yticks(range(len(means)), gallery["classes"], fontsize=6)
        axb.tick_params(axis="x", labelsize=6)
        if r == 0:
            axb.set_title("mean per class", fontsize=7)
        for ax in axes[r][:-1]:
            ax.set_xticks([])
            ax.set_yticks([])
    fig.suptitle(f"Channel response gallery, layer {gallery['layer']} (most class-selective channels)", fontsize=9)
    return fig


# ---------------------------------------------------------------------------------------------- HTML


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _table(head: list[str], rows: list[list[Any]], num: set[int] = frozenset()) -> str:
    th = "".join(f"<th scope='col'>{_e(h)}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td class='{'num' if i in num else ''}'>{_e(v)}</td>"
                                    for i, v in enumerate(r)) + "</tr>" for r in rows)
    return f"<table><thead><tr>{th}</tr></thead><tbody>{body}</tbody></table>"


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


def _gate_blocks(content: ReportContent) -> list[tuple[str, Any]]:
    """The gate's verdict and every check, failed first, with value and limit."""
    g = content.gate or {}
    policy = g.get("policy") or {}
    checks = failed_first(g.get("checks") or [])
    failed = sum(1 for c in checks if c.get("status") == "fail")
    how = ("judged now from the stored measures (the audit was not re-run)" if content.gate_source == "given"
           else "judged when the audit ran and stored with the run")
    blocks: list[tuple[str, Any]] = [("text", (
        f"Gate: {'PASS' if g.get('passed') else 'FAIL'} under policy {policy.get('name')!r} "
        f"({failed} of {len(checks)} checks failed; policy file {policy.get('path') or '—'}, sha256 "
        f"{policy.get('sha256') or '—'}); {how}."))]
    stored = content.stored_gate
    if content.gate_source == "given" and stored:
        sp = stored.get("policy") or {}
        blocks.append(("text", (f"Stored with the run: {'PASS' if stored.get('passed') else 'FAIL'} under policy "
                                f"{sp.get('name')!r} (sha256 {sp.get('sha256') or '—'}).")))
    blocks.append(("meaning", MEASURE_SENTENCES["gate"]))
    blocks.append(("checks", [(c["status"], c["scope"], c["key"], _value(c["key"], c.get("measured")),
                               f"{c.get('comparison', '')} {_value(c['key'], c.get('threshold'))}", c["sentence"])
                              for c in checks]))
    return blocks


def _sections(content: ReportContent) -> list[tuple[str, list[tuple[str, Any]]]]:
    """The report as (title, [(kind, payload)]) with kinds text, pre, table, figure, pictures."""
    run, s, st = content.run, content.summary, content.settings
    model = s.get("model", {})
    ds = s.get("dataset", {})
    out: list[tuple[str, list[tuple[str, Any]]]] = []
    k, o = st.flag_concentration, st.flag_outside

    objects = has_objects(s)
    off = " (only evidence off the annotated object counts)" if objects else ""
    verdict: list[tuple[str, Any]] = [("caution", CAUTION)]
    if content.gate is not None:
        verdict += _gate_blocks(content)
    else:
        verdict.append(("text", "No policy judged this run, so this report shows the measures without a pass/fail "
                                f"verdict; 'pellucid report {run.id} --policy FILE' judges the stored measures "
                                "against a policy without re-running the audit."))
    flags = s.get("class_flags", [])
    verdict.append(("text", (f"Accuracy {_pct(s.get('accuracy'))} over {s.get('done')} audited images; "
                            f"{len(flags)} class/region flag(s); {s.get('flagged_count')} flagged image(s).")))
    for f in flags:
        verdict.append(("text", f["sentence"]))
    if s.get("injection"):
        verdict.append(("text", "Injection test: " + injection_sentence(s["injection"])))
    unreadable = unreadable_images(ds, s)
    if unreadable:
        verdict.append(("text", f"{len(unreadable)} image(s) could not be used; they are named, with the reason, "
                                "under 'Images that could not be used'."))
    out.append(("Verdict", verdict))

    rerun = [
        ("text", "Everything needed to re-run this audit:"),
        ("table", (["what", "value"], [
            ["run id", run.id], ["status", run.status], ["started", _when(run.created)],
            ["finished", _when(run.finished)], ["tool version", f"pellucid {run.tool_version}"],
            ["model", run.model_name], ["model fingerprint (sha256)", run.model_fingerprint],
            ["model spec", run.model_spec or "—"], ["dataset", run.dataset_root],
            ["dataset hash", run.dataset_hash], ["manifest sha256", ds.get("manifest_sha256") or "—"],
            ["method", run.method],
            ["environment", provenance_line(s["provenance"]) if s.get("provenance") else "not recorded"],
        ])),
        ("text", "Exact command:"),
        ("pre", run.command or "(not recorded: the run was started from the dashboard or a notebook)"),
        ("text", "Settings (JSON, as stored with the run):"),
        ("pre", json.dumps(run.settings, indent=2, sort_keys=True)),
    ]
    out.append(("Re-running this audit", rerun))

    mod: list[tuple[str, Any]] = [("table", (["what", "value"], [
        ["name", model.get("name", run.model_name)], ["description", model.get("description", "")],
        ["fingerprint", model.get("fingerprint", run.model_fingerprint)],
        ["input (C, H, W)", model.get("input_shape")], ["output", model.get("output_kind")],
        ["classes", ", ".join(s.get("labels", []))],
    ]))]
    if model.get("spec_text"):
        mod += [("text", "Model spec:"), ("pre", model["spec_text"])]
    if model.get("card_text"):
        mod += [("text", "Model card:"), ("pre", model["card_text"])]
    out.append(("Model", mod))

    data_rows = [[c, n] for c, n in ds.get("per_class", {}).items()]
    annotated = (f"{ds.get('with_box')} with an object box, {ds.get('with_mask')} with a mask"
                 if ds.get("with_box") or ds.get("with_mask") else "no boxes or masks given")
    dsec: list[tuple[str, Any]] = [
        ("text", (f"{ds.get('images')} readable image(s) from {ds.get('source')} at {ds.get('root')}; "
                 f"{annotated}; {len(ds.get('skipped', []))} skipped at intake; {len(s.get('failed', []))} failed "
                 "in the audit.")),
        ("table", (["class", "images"], data_rows)),
    ]
    for note in ds.get("notes", []):
        dsec.append(("text", f"Note: {note}"))
    out.append(("Dataset", dsec))
    if unreadable:
        out.append(("Images that could not be used", [
            ("meaning", MEASURE_SENTENCES["unreadable"]),
            ("table", (["image", "stage", "reason"], [[u["rel"], u["stage"], u["reason"]] for u in unreadable])),
        ]))

    meas: list[tuple[str, Any]] = [("meaning", MEASURE_SENTENCES["accuracy"])]
    if objects:  # the object measures exist only where boxes or masks were given
        meas += [("meaning", MEASURE_SENTENCES["object_share"]), ("meaning", MEASURE_SENTENCES["pointing_accuracy"]),
                 ("meaning", MEASURE_SENTENCES["energy_pointing"])]
    meas += [("meaning", MEASURE_SENTENCES["regions"].format(off=off)),
             ("meaning", MEASURE_SENTENCES["flags"].format(k=k))]
    rows = []
    obj = s.get("object", {})
    for c, v in s.get("per_class", {}).items():
        corner = max(CORNERS, key=lambda n: v["regions"][n]["mean_share"] or 0.0)
        on_object = [_pct(v["object_share"]), _pct(v["pointing_accuracy"]), _pct(v["energy_pointing"])] \
            if objects else []
        rows.append([c, v["images"], _pct(v["accuracy"]), *on_object, _pct(v["regions"]["border"]["mean_share"]),
                     f"{_pct(v['regions'][corner]['mean_share'])} ({corner.replace('_', '-')})",
                     _pct(v["regions"]["centre"]["mean_share_all"]), v["no_evidence"]])
    all_objects = [_pct(obj.get("object_share")), _pct(obj.get("pointing_accuracy")),
                   _pct(obj.get("energy_pointing"))] if objects else []
    rows.append(["all", s.get("done"), _pct(s.get("accuracy")), *all_objects, "", "", "", ""])
    object_heads = ["on object", "pointing game", "energy pointing"] if objects else []
    meas.append(("table", (["class", "images", "accuracy", *object_heads, "border", "largest corner", "centre",
                            "maps without evidence"], rows)))
    meas.append(("meaning", MEASURE_SENTENCES["confusion"]))
    meas.append(("figure", "confusion"))
    meas.append(("figure", "regions"))
    if "mean_maps" in content.figures:
        meas.append(("meaning", MEASURE_SENTENCES["mean_maps"]))
        meas.append(("figure", "mean_maps"))
    out.append(("Measures", meas))

    flagged = s.get("flagged_images", [])
    flag_rule = (MEASURE_SENTENCES["flagged_images_objects"].format(o=o, k=k) if objects
                 else MEASURE_SENTENCES["flagged_images"].format(k=k, off=""))
    fsec: list[tuple[str, Any]] = [("meaning", flag_rule),
                                   ("text", (f"{s.get('flagged_count', 0)} image(s) flagged "
                                             f"({_pct(s.get('flagged_fraction'))} of those audited), "
                                             "most suspect first."))]
    pics = []
    for f in flagged[:24]:
        img = content.pictures.get(f"flagged/{f['rel']}/image")
        ov = content.pictures.get(f"flagged/{f['rel']}/overlay")
        pics.append((f"{f['rel']} — true {f['label']}, called {f['predicted_label']}; " + "; ".join(f["reasons"]),
                     [p for p in (img, ov) if p is not None]))
    fsec.append(("pictures", pics))
    if len(flagged) > 24:
        fsec.append(("table", (["more flagged images", "true", "called", "why"],
                               [[f["rel"], f["label"], f["predicted_label"], "; ".join(f["reasons"])]
                                for f in flagged[24:]])))
    out.append(("Flagged images", fsec))

    if s.get("injection"):
        inj = s["injection"]
        st_inj = inj["settings"]
        levels = inj.get("same_patch_levels", 8.0)
        isec: list[tuple[str, Any]] = [
            ("meaning", MEASURE_SENTENCES["injection"].format(levels=levels)),
            ("text", (f"Suspect class {st_inj['suspect_class']!r}; patch {st_inj['patch_size'][0]}×"
                     f"{st_inj['patch_size'][1]} px ({st_inj['source']}, sha256 {st_inj['patch_sha256'][:16]}…)"
                     + (f"; random places drawn from seed {st_inj.get('seed', 0)}" if st_inj.get("at") == "random"
                        else "") + ".")),
            ("text", injection_sentence(inj)),
            ("table", (["class", "other-class images", "skipped (already carry the patch)", "tested", "eligible",
                        "flips", "flip rate", "mean shift"],
                       [[c, v.get("considered", v["tested"]), v.get("skipped", "—"), v["tested"], v["eligible"],
                         v["flips"], _pct(v["flip_rate"]),
                         "n/a" if v.get("mean_shift") is None else f"{v['mean_shift']:+.3f}"]
                        for c, v in inj["per_class"].items()])),
        ]
        if inj.get("skipped_images"):
            isec.append(("table", (["skipped image", "why"],
                                   [[x["rel"], x["reason"]] for x in inj["skipped_images"][:200]])))
        patch = content.pictures.get("injection/patch")
        if patch:
            isec.append(("pictures", [("the suspect patch", [patch])]))
        ex = []
        for e in inj["examples"]:
            n = e.get("index")
            pair = [content.pictures.get(f"injection/example/{n}/before"),
                    content.pictures.get(f"injection/example/{n}/after")]
            ex.append(((f"{e['rel']}: {e['before']} → {e['after']}, p({inj['settings']['suspect_class']}) "
                       f"{e['p_suspect_before']:.2f} → {e['p_suspect_after']:.2f}"), [p for p in pair if p]))
        isec.append(("pictures", ex))
        out.append(("Injection test", isec))
    if s.get("background_swap"):
        sw = s["background_swap"]
        out.append(("Background swap", [
            ("meaning", MEASURE_SENTENCES["background_swap"]),
            ("text", (f"{sw['tested']} image(s) with {sw['object_source']}: accuracy {_pct(sw['accuracy_before'])} → "
                     f"{_pct(sw['accuracy_after'])} (change {sw['accuracy_change']:+.3f}); "
                     f"{sw['changed_predictions']} prediction(s) changed.")),
        ]))
    if s.get("gallery") and "gallery" in content.figures:
        g = s["gallery"]
        out.append(("Channel response gallery", [
            ("meaning", MEASURE_SENTENCES["gallery"]),
            ("text", (f"Layer {g['layer']} ({g['output_shape'][0]} channels), top {g['top']} units per channel over "
                     f"{g['images']} image(s); receptive field {g['rf_size']} px, jump {g['rf_jump']}.")),
            ("figure", "gallery"),
        ]))
    out.append(("Caution", [("caution", CAUTION), (
        "text", ("This report describes one model on one folder of images with one attribution method. A map "
                "that looks right can still be wrong for other images, and the measures are only as good as the "
                "boxes, masks and labels they use. The decision to deploy rests with the reviewers named by the "
                "domain's own procedures."))]))
    return out


def render_html(content: ReportContent) -> str:
    run = content.run
    parts = [
        "<!doctype html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>Audit report · {_e(run.model_name)} · {_e(run.id)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<h1>Folder audit report: {_e(run.model_name)}</h1>",
        (f"<p class='mono'>run {_e(run.id)} · model sha256 {_e(run.model_fingerprint)} · dataset hash "
        f"{_e(run.dataset_hash)} · method {_e(run.method)} · generated {_e(_when(content.generated))} by pellucid "
        f"{_e(run.tool_version)}</p>"),
    ]
    for title, blocks in _sections(content):
        parts.append(f"<section><h2>{_e(title)}</h2>")
        for kind, payload in blocks:
            if kind == "caution":
                parts.append(f"<p class='caution'><strong>Caution.</strong> {_e(payload)}</p>")
            elif kind == "text":
                parts.append(f"<p>{_e(payload)}</p>")
            elif kind == "meaning":
                parts.append(f"<p class='meaning'>{_e(payload)}</p>")
            elif kind == "pre":
                parts.append(f"<pre>{_e(payload)}</pre>")
            elif kind == "table":
                head, rows = payload
                parts.append(_table(head, rows))
            elif kind == "checks":
                rows = "".join(
                    f"<tr><td class='{ 'na' if st == 'n/a' else st }'>{_e(st.upper())}</td>"
                    f"<td>{_e(scope)}</td><td class='mono'>{_e(key)}</td><td class='num'>{_e(value)}</td>"
                    f"<td class='num'>{_e(limit)}</td><td>{_e(sentence)}</td></tr>"
                    for st, scope, key, value, limit, sentence in payload)
                parts.append("<table class='checks'><thead><tr><th scope='col'>result</th><th scope='col'>scope</th>"
                             "<th scope='col'>policy key</th><th scope='col'>value</th><th scope='col'>limit</th>"
                             f"<th scope='col'>check</th></tr></thead><tbody>{rows}</tbody></table>")
            elif kind == "figure":
                png = _fig_png(content.figures[payload])
                parts.append(f"<figure><img class='fig' alt='{_e(payload)} figure' src='{_data_uri(png)}'></figure>")
            elif kind == "pictures":
                items = []
                for caption, pngs in payload:
                    imgs = "".join(f"<img alt='{_e(caption)}' src='{_data_uri(p)}'>" for p in pngs)
                    items.append(f"<figure>{imgs}<figcaption>{_e(caption)}</figcaption></figure>")
                parts.append(f"<div class='grid'>{''.join(items)}</div>")
        parts.append("</section>")
    parts.append("</body></html>")
    return "\n".join(parts)


# ----------------------------------------------------------------------------------------------- PDF

_PAGE = (8.27, 11.69)  # A4 portrait, inches
_CHARS = 96
_LINES = 62


def _text_pages(lines: list[tuple[str, str]]) -> list[Figure]:
    """Lay out (style, text) lines on A4 pages; styles: h (heading), p (text), m (monospace)."""
    wrapped: list[tuple[str, str]] = []
    for style, text in lines:
        width = _CHARS if style != "m" else _CHARS + 4
        for para in (text.splitlines() or [""]):
            chunks = textwrap.wrap(para, width=width, break_long_words=True, replace_whitespace=False) or [""]
            wrapped += [(style, chunk) for chunk in chunks]
    pages: list[Figure] = []
    for start in range(0, max(1, len(wrapped)), _LINES):
        fig = Figure(figsize=_PAGE)
        y = 0.96
        for style, text in wrapped[start:start + _LINES]:
            kw: dict[str, Any] = {"fontsize": 8.5, "family": "sans-serif"}
            if style == "h":
                kw.update(fontsize=11, weight="bold")
            elif style == "m":
                kw.update(fontsize=7.2, family="monospace")
            elif style == "c":
                kw.update(color="#8a5200", weight="bold")
            fig.text(0.06, y, text, va="top", ha="left", **kw)
            y -= 0.0148 if style != "h" else 0.02
        pages.append(fig)
    return pages


def _picture_page(title: str, pictures: list[tuple[str, list[bytes]]]) -> Figure | None:
    pictures = [(c, p) for c, p in pictures if p][:12]
    if not pictures:
        return None
    fig = Figure(figsize=_PAGE)
    fig.suptitle(title, fontsize=11, y=0.98)
    rows = len(pictures)
    cols = max(len(p) for _, p in pictures)
    for r, (caption, pngs) in enumerate(pictures):
        for c, png in enumerate(pngs):
            ax = fig.add_axes((0.05 + c * 0.16, 0.93 - (r + 1) * (0.9 / max(rows, 6)), 0.14, 0.9 / max(rows, 6) - 0.01))
            ax.imshow(_png_array(png), interpolation="nearest")
            ax.set_xticks([])
            ax.set_yticks([])
        fig.text(0.06 + cols * 0.16, 0.93 - (r + 0.5) * (0.9 / max(rows, 6)),
                 "\n".join(textwrap.wrap(caption, 60)), fontsize=7, va="center")
    return fig


def render_pdf(content: ReportContent, path: Path) -> int:
    """Write the PDF; returns its page count."""
    lines: list[tuple[str, str]] = [("h", f"Folder audit report: {content.run.model_name}"),
                                    ("m", f"run {content.run.id}"),
                                    ("m", f"model sha256 {content.run.model_fingerprint}"),
                                    ("m", f"dataset hash {content.run.dataset_hash}"), ("p", "")]
    figure_pages: list[Figure] = []
    for title, blocks in _sections(content):
        lines.append(("h", title))
        for kind, payload in blocks:
            if kind == "caution":
                lines.append(("c", f"Caution. {payload}"))
            elif kind in ("text", "meaning"):
                lines.append(("p", str(payload)))
            elif kind == "pre":
                lines.append(("m", str(payload)))
            elif kind == "table":
                head, rows = payload
                lines.append(("m", " | ".join(map(str, head))))
                lines += [("m", " | ".join(map(str, r))) for r in rows]
            elif kind == "checks":
                lines += [("p", f"[{st.upper()}] {key} ({value}, limit {limit}): {sentence}")
                          for st, _scope, key, value, limit, sentence in payload]
            elif kind == "figure":
                lines.append(("p", f"(figure: {payload}, on a page of its own)"))
                figure_pages.append(content.figures[payload])
            elif kind == "pictures":
                page = _picture_page(title, payload)
                if page is not None:
                    lines.append(("p", f"(pictures: {title}, on a page of their own)"))
                    figure_pages.append(page)
        lines.append(("p", ""))
    pages = _text_pages(lines) + figure_pages
    meta = {"Title": f"Pellucid folder audit {content.run.id}", "Author": "pellucid",
            "Subject": f"model sha256 {content.run.model_fingerprint}; dataset {content.run.dataset_hash}",
            "Keywords": json.dumps(content.run.settings["audit"], sort_keys=True)}
    # Uncompressed, with embedded TrueType text: fingerprints stay searchable in the file.
    with matplotlib.rc_context({"pdf.compression": 0, "pdf.fonttype": 42}), PdfPages(str(path), metadata=meta) as pdf:
        for fig in pages:
            pdf.savefig(fig)
    return len(pages)


def write_report(store: Store, run_id: str, out_dir: str | Path, *, policy: Policy | None = None,
                 pdf: bool = True) -> list[Path]:
    """Write ``report.html`` (and ``report.pdf``) for a finished run into ``out_dir``."""
    out = Path(out_dir)
    content = build_report(store, run_id, policy=policy)
    try:
        out.mkdir(parents=True, exist_ok=True)
        html_path = out / "report.html"
        html_path.write_text(render_html(content), encoding="utf-8")
        files = [html_path]
        if pdf:
            pdf_path = out / "report.pdf"
            render_pdf(content, pdf_path)
            files.append(pdf_path)
    except OSError as exc:
        raise StoreError(f"cannot write the report into {str(out)!r}: {exc.strerror or exc}") from None
    return files
