"""The audit's discovery and confirmation phases over a run's stored maps.

1. ``discovery``: per explained class, the stored maps (with each image's object mask, when the
   dataset gives boxes or masks) are clustered (:mod:`pellucid.core.audit.discovery`); every
   cluster keeps its mean map and the pictures of its most typical members;
2. ``confirmation``: the most suspicious clusters (see :class:`~pellucid.core.audit.settings.ConfirmSettings`)
   are tested by removal and transplant (:mod:`pellucid.core.audit.confirm`), and their channels
   at one layer are ranked by how much more they fire in the cluster (:mod:`pellucid.core.audit.channels`).

Everything is a function of the stored results, the settings and the model, so a resumed run ends
with the same clusters and verdicts as one that never stopped.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import numpy as np

from pellucid.core.audit.caution import CAUTION
from pellucid.core.audit.confirm import CONFIRMED, confirm_cluster
from pellucid.core.audit.discovery import Cluster, Discovery, MapEntry, discover_class
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.audit.store import ResultRow, Store
from pellucid.core.audit.worker import object_mask
from pellucid.core.errors import BadParameterError, PellucidError
from pellucid.core.model.loading import LoadedModel
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.render import encode_png

__all__ = ["CLUSTER_CAUTION", "THUMBNAILS", "discovery_lines", "run_confirmation", "run_discovery"]

THUMBNAILS = 6  # member pictures kept per cluster
CLUSTER_CAUTION = (
    "A cluster groups images whose evidence looks alike; a suspicious cluster and even a confirmed one are "
    "evidence about this model on these images, not proof of a shortcut: a real cue can be small and off-centre "
    "too. The reviewer's domain rules decide."
)


def _mask_for(model: LoadedModel, item: dict) -> np.ndarray | None:
    if not item.get("box") and not item.get("mask"):
        return None
    try:
        return object_mask(model.spec, tuple(item["size"]), box=item.get("box"), mask_path=item.get("mask"))
    except PellucidError:
        return None


def run_discovery(model: LoadedModel, store: Store, rows: list[ResultRow], items: list[dict], settings: AuditSettings,
                  *, progress: ProgressFn | None = None,
                  cancel: CancelToken | None = None) -> tuple[Discovery, dict[str, str]]:
    """Cluster every explained class's maps; returns the discovery and its artefacts (mean maps, thumbnails)."""
    from pellucid.core.model.preprocess import prepare, read_image

    assert settings.discovery is not None
    by_rel = {i["rel"]: i for i in items}
    done = sorted((r for r in rows if r.status == "done" and r.map_hash), key=lambda r: (r.item, r.rel))
    classes = [c for c in model.labels if any(r.data.get("target_label") == c for r in done)]
    out = []
    artefacts: dict[str, str] = {}
    for n, label in enumerate(classes):
        step(n, len(classes), progress=progress, cancel=cancel)
        mine = [r for r in done if r.data.get("target_label") == label]
        entries = [MapEntry(r.rel, label, store.get_array(r.map_hash), _mask_for(model, by_rel.get(r.rel, {})))
                   for r in mine]
        cd = discover_class(entries, label=label, settings=settings.discovery)
        del entries
        for c in cd.clusters:
            artefacts[f"discovery/{c.key}/mean"] = store.put_array(c.mean_map)
            for k, rel in enumerate(c.members[:THUMBNAILS]):
                item = by_rel.get(rel)
                if item is None:
                    continue
                try:
                    display = prepare(model.spec, read_image(Path(item["path"]))).display
                except PellucidError:
                    continue
                artefacts[f"discovery/{c.key}/member/{k}"] = store.put_bytes(encode_png(display), "png")
        out.append(cd)
    step(len(classes), len(classes), progress=progress, cancel=cancel)
    return Discovery(settings=settings.discovery, classes=out), artefacts


def _candidates(discovery: Discovery, settings: AuditSettings) -> list[Cluster]:
    s = settings.confirmation
    assert s is not None
    return [c for c in discovery.ranked() if c.suspicion >= s.min_suspicion and c.size >= s.min_size][:s.max_clusters]


def _channels(model: LoadedModel, cluster: Cluster, items: list[dict], rows: list[ResultRow], layer: str,
              cache: dict[str, tuple[np.ndarray, list[str]]], cancel: CancelToken | None) -> dict:
    from pellucid.core.audit.channels import MIN_REST, channel_means, rank_channels

    members = set(cluster.members)
    explained = {r.rel: r.data.get("target_label") for r in rows if r.status == "done"}
    key = f"class:{cluster.label}"
    if key not in cache:
        mine = [i for i in items if explained.get(i["rel"]) == cluster.label]
        cache[key] = channel_means(model, mine, layer=layer, cancel=cancel)
    acts, rels = cache[key]
    inside = np.array([r in members for r in rels], dtype=bool)
    group = acts[inside]
    rest, compared = acts[~inside], "the rest of the class"
    if len(rest) < MIN_REST:
        if "others" not in cache:
            others = [i for i in items if explained.get(i["rel"]) not in (None, cluster.label)][:400]
            cache["others"] = channel_means(model, others, layer=layer, cancel=cancel)
        rest, compared = cache["others"][0], "the images of the other classes"
    if len(group) < 2 or len(rest) < 2:
        return {"layer": layer, "note": "too few images to compare channels", "channels": []}
    return {"layer": layer, "compared_with": compared, "cluster_images": len(group),
            "rest_images": len(rest), "measure": "Cohen's d of the channel's spatial mean activation",
            "channels": rank_channels(group, rest, top=8)}


def run_confirmation(model: LoadedModel, store: Store, rows: list[ResultRow], items: list[dict],
                     discovery: Discovery, settings: AuditSettings, *, progress: ProgressFn | None = None,
                     cancel: CancelToken | None = None,
                     on_phase: Callable[[str], None] | None = None) -> tuple[dict, dict[str, str]]:
    """Test the most suspicious clusters; returns the summary's ``confirmation`` part and its artefacts."""
    s = settings.confirmation
    assert s is not None
    by_rel = {i["rel"]: i for i in items}
    maps = {r.rel: r.map_hash for r in rows if r.status == "done" and r.map_hash}
    chosen = _candidates(discovery, settings)
    tested: list[dict] = []
    artefacts: dict[str, str] = {}
    layer = None
    layer_note = None
    if model.supports_hooks:
        try:
            from pellucid.core.audit.channels import resolve_layer

            layer = resolve_layer(model, settings.channel_layer)
        except PellucidError as exc:
            layer_note = str(exc)
        if layer is None and layer_note is None:
            layer_note = "no 4-D feature map feeds this model's head, so no channels are ranked"
    else:
        layer_note = "this model allows no forward hooks, so its channels cannot be read"
    cache: dict = {}
    masks = {i["rel"]: _mask_for(model, i) for i in items} if chosen else {}
    for n, cluster in enumerate(chosen):
        step(n, len(chosen), progress=progress, cancel=cancel)
        if on_phase is not None:
            on_phase(f"confirmation {n + 1}/{len(chosen)}")
        members = [m for m in cluster.members if m in maps and m in by_rel][: s.limit]
        try:
            conf = confirm_cluster(model, cluster, member_maps=[store.get_array(maps[m]) for m in members],
                                   member_items=[by_rel[m] for m in members], items=items, settings=s,
                                   member_masks=[masks.get(m) for m in members], object_masks=masks,
                                   cancel=cancel)
        except BadParameterError as exc:
            tested.append({"cluster": cluster.key, "class": cluster.label, "verdict": "not tested",
                           "confirmed": False, "sentence": f"Cluster {cluster.key} could not be tested: {exc}."})
            continue
        entry = conf.to_dict()
        for name, picture in conf.pictures.items():
            pic = picture if picture.ndim == 3 else np.repeat(picture[..., None], 3, axis=2)
            artefacts[f"confirm/{cluster.key}/{name}"] = store.put_bytes(encode_png(np.ascontiguousarray(pic)), "png")
        tested.append(entry)
        if layer is not None:
            try:
                cluster.channels = _channels(model, cluster, items, rows, layer, cache, cancel)
            except PellucidError as exc:
                cluster.channels = {"layer": layer, "note": str(exc), "channels": []}
    step(len(chosen), len(chosen), progress=progress, cancel=cancel)
    confirmed = [t for t in tested if t.get("verdict") == CONFIRMED]
    return {
        "settings": s.to_dict(),
        "tested": tested,
        "candidates": len(chosen),
        "confirmed": len(confirmed),
        "confirmed_clusters": [t["cluster"] for t in confirmed],
        "channel_layer": layer,
        "channel_note": layer_note,
        "caution": CLUSTER_CAUTION,
        "general_caution": CAUTION,
    }, artefacts


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.0f}%"


def discovery_lines(summary: dict) -> list[str]:
    """Short lines for a terminal: what discovery found and what confirmation concluded."""
    d = summary.get("discovery")
    if not d:
        return []
    clusters = {c["key"]: c for cd in d["classes"] for c in cd["clusters"]}
    ranked = [clusters[k] for k in d.get("ranking", []) if k in clusters]
    line = f"discovery: {len(clusters)} cluster(s) in {len(d['classes'])} class(es)"
    if ranked and ranked[0]["suspicion"] > 0:
        top = ranked[0]
        line += f"; most suspicious: {top['key']} ({top['size']} image(s), suspicion {top['suspicion']:.2f})"
    else:
        annotated = any(c.get("placement", {}).get("with_object") for c in clusters.values())
        line += "; none sits in a small spot" + (" or off the annotated object" if annotated else " set apart")
    lines = [line]
    conf = summary.get("confirmation")
    if conf:
        for t in conf["tested"]:
            if t.get("confirmed"):
                r, tr = t["removal"], t["transplant"] or {}
                lines.append(
                    f"confirmed shortcut: cluster {t['cluster']} ({r['images']} image(s)) — taking its region away "
                    f"loses {_pct(r['calls_lost_share'])} of its {t['class']!r} calls; putting it into "
                    f"{tr.get('eligible', 0)} other image(s) flips {_pct(tr.get('flip_rate'))} (control "
                    f"{_pct((tr.get('control') or {}).get('flip_rate'))})")
        lines.append(f"confirmation: {conf['confirmed']} of {len(conf['tested'])} tested cluster(s) confirmed; "
                     "a confirmed cluster is evidence, not proof — the reviewer's domain rules decide")
    return lines
