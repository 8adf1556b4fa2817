"""From stored per-image results to the audit's summary: accuracy, confusion, shares, flags.

The summary is a pure function of the stored results (sorted by item), so a run that was
interrupted and resumed ends with exactly the summary of a run that was never interrupted.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from pellucid.core.audit.measures import CORNERS, REGIONS, positive_part, region_areas
from pellucid.core.audit.sentences import off_object
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.audit.store import ResultRow

__all__ = ["FLAGGABLE_REGIONS", "REGION_WORDS", "class_mean_maps", "summarise"]

# The centre is where the object usually is; evidence there is not a shortcut sign.
FLAGGABLE_REGIONS = ("border", *CORNERS)
REGION_WORDS = {
    "border": "the border band",
    "top_left": "the top-left corner",
    "top_right": "the top-right corner",
    "bottom_left": "the bottom-left corner",
    "bottom_right": "the bottom-right corner",
    "centre": "the centre",
}
MAX_FLAGGED_LISTED = 100


def _mean(values: list[float]) -> float | None:
    return float(np.mean(values)) if values else None


def _pct(value: float) -> str:
    return f"{100 * value:.0f}%"


def summarise(rows: list[ResultRow], *, labels: list[str], settings: AuditSettings,
              shape: tuple[int, int]) -> dict:
    """The run summary (JSON-able) from its result rows; ``shape`` is the model's (H, W)."""
    rows = sorted(rows, key=lambda r: (r.item, r.rel))
    done = [r for r in rows if r.status == "done"]
    failed = [{"rel": r.rel, "label": r.label, "reason": r.data.get("reason", "")} for r in rows if r.status != "done"]
    areas = region_areas(shape, settings.regions)
    k = len(labels)
    confusion = np.zeros((k, k), dtype=np.int64)
    for r in done:
        confusion[r.data["label_index"], r.data["predicted"]] += 1

    present = [c for c in labels if any(r.label == c for r in done)]
    per_class: dict[str, dict] = {}
    class_flags: list[dict] = []
    for c in present:
        mine = [r for r in done if r.label == c]
        correct = sum(1 for r in mine if r.data["correct"])
        where = off_object(any(r.data["has_object"] for r in mine))
        regions: dict[str, dict] = {}
        for name in REGIONS:
            values = [r.data["measures"]["regions"][name] for r in mine]
            defined = [v for v in values if v is not None]
            off = [r.data["measures"]["regions_off_object"][name] for r in mine]
            off_defined = [v for v in off if v is not None]
            plain = _mean(defined)
            mean = _mean(off_defined)
            concentration = (mean / areas[name]) if mean is not None and areas[name] > 0 else None
            flagged = bool(name in FLAGGABLE_REGIONS and concentration is not None
                           and concentration >= settings.flag_concentration)
            regions[name] = {"mean_share": mean, "mean_share_all": plain, "images": len(defined),
                             "undefined": len(values) - len(defined), "area": areas[name],
                             "concentration": concentration, "flagged": flagged}
            if flagged:
                assert mean is not None and concentration is not None
                class_flags.append({
                    "class": c, "region": name, "mean_share": mean, "area": areas[name],
                    "concentration": concentration,
                    "sentence": (f"For class {c!r}, {_pct(mean)} of the positive evidence sits in "
                                 f"{REGION_WORDS[name]}{where}; that region covers "
                                 f"{_pct(areas[name])} of the image ({concentration:.1f}× its share of the area): "
                                 f"a possible shortcut."),
                })
        with_object = [r for r in mine if r.data["has_object"]]
        hits = [r.data["measures"]["pointing_hit"] for r in with_object]
        decided = [h for h in hits if h is not None]
        obj_shares = [r.data["measures"]["object_share"] for r in with_object
                      if r.data["measures"]["object_share"] is not None]
        energy = [r.data["measures"]["energy_pointing"] for r in with_object
                  if r.data["measures"]["energy_pointing"] is not None]
        per_class[c] = {
            "images": len(mine),
            "correct": correct,
            "accuracy": correct / len(mine) if mine else None,
            "regions": regions,
            "with_object": len(with_object),
            "object_share": _mean(obj_shares),
            "energy_pointing": _mean(energy),
            "pointing_hits": sum(1 for h in decided if h),
            "pointing_misses": sum(1 for h in decided if not h),
            "pointing_accuracy": (sum(1 for h in decided if h) / len(decided)) if decided else None,
            "no_evidence": sum(1 for r in mine if r.data["measures"]["positive_mass"] <= 0.0),
        }

    flagged_images = _flag_images(done, settings=settings, areas=areas)
    all_with_object = [r for r in done if r.data["has_object"]]
    all_hits = [r.data["measures"]["pointing_hit"] for r in all_with_object
                if r.data["measures"]["pointing_hit"] is not None]
    all_obj = [r.data["measures"]["object_share"] for r in all_with_object
               if r.data["measures"]["object_share"] is not None]
    all_energy = [r.data["measures"]["energy_pointing"] for r in all_with_object
                  if r.data["measures"]["energy_pointing"] is not None]
    correct_total = sum(1 for r in done if r.data["correct"])
    return {
        "labels": list(labels),
        "images": len(rows),
        "done": len(done),
        "failed": failed,
        "accuracy": correct_total / len(done) if done else None,
        "confusion": {"labels": list(labels), "rows": "true label", "columns": "predicted label",
                      "matrix": confusion.tolist()},
        "region_areas": areas,
        "per_class": per_class,
        "class_flags": class_flags,
        "object": {
            "images": len(all_with_object),
            "object_share": _mean(all_obj),
            "energy_pointing": _mean(all_energy),
            "pointing_hits": sum(1 for h in all_hits if h),
            "pointing_misses": sum(1 for h in all_hits if not h),
            "pointing_accuracy": (sum(1 for h in all_hits if h) / len(all_hits)) if all_hits else None,
        },
        "flagged_images": flagged_images[:MAX_FLAGGED_LISTED],
        "flagged_count": len(flagged_images),
        "flagged_fraction": (len(flagged_images) / len(done)) if done else None,
    }


def _flag_images(done: list[ResultRow], *, settings: AuditSettings, areas: dict[str, float]) -> list[dict]:
    """Images whose evidence lies mostly outside their object or piles up in a corner or the border."""
    flagged: list[dict] = []
    for r in done:
        m = r.data["measures"]
        reasons: list[str] = []
        score = 0.0
        share = m["object_share"]
        if r.data["has_object"] and share is not None and (1.0 - share) > settings.flag_outside:
            reasons.append(f"{_pct(1.0 - share)} of the evidence lies outside the object")
            score = max(score, 1.0 - share)
        where = ", off the object" if r.data["has_object"] else ""
        for name in FLAGGABLE_REGIONS:
            value = m["regions_off_object"][name]
            if value is not None and areas[name] > 0 and value / areas[name] >= settings.flag_concentration:
                reasons.append(f"{_pct(value)} of the evidence sits in {REGION_WORDS[name]}{where}")
                score = max(score, value)
        if reasons:
            flagged.append({
                "rel": r.rel, "item": r.item, "label": r.label, "predicted_label": r.data["predicted_label"],
                "correct": r.data["correct"], "target_label": r.data["target_label"],
                "score": score, "reasons": reasons, "object_share": share,
                "regions": dict(m["regions_off_object"]),
            })
    flagged.sort(key=lambda f: (-f["score"], f["item"], f["rel"]))
    return flagged


def class_mean_maps(rows: list[ResultRow], *, labels: list[str],
                    load_map: Callable[[str], np.ndarray]) -> dict[str, np.ndarray]:
    """Per true class, the mean of the images' positive evidence, each map scaled to sum to H·W.

    Scaling first gives every image the same weight; a value of 1 means "as much as a uniform map".
    """
    sums: dict[str, np.ndarray] = {}
    counts: dict[str, int] = {}
    for r in sorted(rows, key=lambda r: (r.item, r.rel)):
        if r.status != "done" or not r.map_hash:
            continue
        mass = positive_part(load_map(r.map_hash))
        total = float(mass.sum())
        if total <= 0.0 or not math.isfinite(total):
            continue
        scaled = mass * (mass.size / total)
        if r.label in sums:
            sums[r.label] += scaled
        else:
            sums[r.label] = scaled.copy()
        counts[r.label] = counts.get(r.label, 0) + 1
    return {c: (sums[c] / counts[c]).astype(np.float32) for c in labels if c in sums}
