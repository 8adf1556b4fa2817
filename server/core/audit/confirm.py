"""Confirmation: does the model's call really hang on a suspicious cluster's evidence region?

Discovery (:mod:`pellucid.core.audit.discovery`) only says where a group of maps puts its evidence.
Two counterfactual tests then ask the model itself, on the picture it sees (after the spec's resize
and crop):

- **removal**: on the cluster's own images, take the region away and measure the drop in the
  class's probability and accuracy. A model that reads the region loses its call;
- **transplant**: put the region of the cluster's most typical images into the images of the other
  classes and count how many flip to the class, net of a control that does the same with neutral
  content (covering a place can flip an image by itself, for instance by hiding its own cue).

What "the region" is depends on where the evidence sits (:func:`region_kind`):

- a **spot** (half of the evidence within an eighth of the image, in one place): the fewest pixels
  holding half of the cluster's mean evidence. Removal fills it with the baseline (the colour the
  spec's normalisation maps to zero, its mean); transplant cuts it, with its exact shape, out of the
  most typical image and pastes it at the same place with the injection test
  (:func:`pellucid.core.audit.injection.injection_test`); the control pastes the baseline there;
- a **moving spot**: the same, with each image's own half-evidence pixels for the removal;
- **spread evidence off the object** (a tint, a texture, a frame; needs boxes or masks): there is
  no spot to cut, but the place is known: the background. Removal keeps each image's object and
  takes the background from images of other classes; transplant keeps the other classes' objects
  and gives them the background of the cluster's most typical images; the control gives them the
  background of other images of their own kind. A background is an image with its object painted
  out (biharmonic inpainting, scikit-image's ``inpaint_biharmonic``).

Verdict: "confirmed shortcut" only when both effects are large — taking the region away loses at
least ``min_calls_lost`` of the cluster's calls of the class (the images the model predicted as it;
the mean probability drop is reported beside it), and the net flip rate is at least
``min_transplant_flips`` (see
:class:`~pellucid.core.audit.settings.ConfirmSettings`; our own thresholds, and the numbers are
always shown). Both are needed: a region whose removal hurts may simply be the object, and a patch
that flips other images may be a real cue pasted whole. Even then the verdict is evidence about this
model on these images; whether the region is a shortcut or the legitimate cue is for the reviewer's
domain rules.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from pellucid.core.audit.discovery import Cluster, evidence_region
from pellucid.core.audit.injection import injection_test, tensor_from_display
from pellucid.core.audit.settings import ConfirmSettings, InjectionSpec
from pellucid.core.errors import BadParameterError, PellucidError
from pellucid.core.model.loading import LoadedModel
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.progress import CancelToken, ProgressFn
from pellucid.core.views.predict import check_finite, scores_from_logits

__all__ = ["CONFIRMED", "NOT_CONFIRMED", "REGION_KINDS", "SPOT_AREA", "Confirmation", "baseline_colour",
           "confirm_cluster", "region_kind"]

CONFIRMED, NOT_CONFIRMED = "confirmed shortcut", "not confirmed"
SPOT_AREA = 0.125  # evidence whose half lies in more than an eighth of the image is no spot (our choice)
PLATES = 5  # backgrounds taken from the most typical images (and for the control)
REGION_KINDS = {
    "spot": "the fewest pixels holding half of the cluster's mean evidence (a spot that stays in place)",
    "moving_spot": "each image's own fewest pixels holding half of its evidence (a spot that moves)",
    "off_object": "everything off the annotated object (evidence spread over the background)",
}
_BATCH = 32


@dataclass
class Confirmation:
    """The two tests on one cluster, and the verdict."""

    cluster: str  # "class/index"
    label: str
    verdict: str
    removal: dict
    transplant: dict | None
    region: dict
    sentence: str
    seconds: float
    pictures: dict[str, np.ndarray] = field(default_factory=dict, repr=False)

    @property
    def confirmed(self) -> bool:
        return self.verdict == CONFIRMED

    def to_dict(self) -> dict:
        return {"cluster": self.cluster, "class": self.label, "verdict": self.verdict, "confirmed": self.confirmed,
                "removal": self.removal, "transplant": self.transplant, "region": self.region,
                "sentence": self.sentence}


def baseline_colour(model: LoadedModel) -> np.ndarray:
    """(3,) uint8: the picture colour the spec's normalisation maps to zero (its mean)."""
    mean = np.asarray(model.spec.preprocess.mean, dtype=np.float64).reshape(-1)
    rgb = np.resize(mean, 3) if mean.size == 1 else mean[:3]
    return np.clip(np.rint(rgb * 255.0), 0, 255).astype(np.uint8)


def region_kind(cluster: Cluster, *, annotated: bool) -> str:
    """Which region the tests use: a spot (fixed or moving) or, for spread evidence, the background.

    Spread evidence has no spot to cut out, but with boxes or masks its place is still known: off
    the object, where a tint, a texture or a frame lives.
    """
    p = cluster.placement
    area = p.spot_area if p.fixed else p.member_spot_area
    if area > SPOT_AREA and annotated:
        return "off_object"
    return "spot" if p.fixed else "moving_spot"


def _scores(model: LoadedModel, pictures: Sequence[np.ndarray]) -> np.ndarray:
    out = []
    for i in range(0, len(pictures), _BATCH):
        x = torch.cat([tensor_from_display(model, p) for p in pictures[i:i + _BATCH]], dim=0)
        with torch.inference_mode():
            logits = model.module(x)
        check_finite(logits)
        out.append(scores_from_logits(logits.float(), model.output_kind).numpy().astype(np.float64))
    return np.concatenate(out) if out else np.zeros((0, len(model.labels)))


def _box(mask: np.ndarray) -> tuple[int, int, int, int]:
    ys, xs = np.nonzero(mask)
    return int(xs.min()), int(ys.min()), int(xs.max()) + 1, int(ys.max()) + 1


def _display(model: LoadedModel, item: dict) -> np.ndarray | None:
    try:
        return prepare(model.spec, read_image(Path(item["path"]))).display
    except PellucidError:
        return None


def _plate(display: np.ndarray, obj: np.ndarray | None) -> np.ndarray:
    """The picture with its object painted out from the surrounding background (biharmonic)."""
    if obj is None or not obj.any():
        return display
    from skimage.restoration import inpaint_biharmonic

    filled = inpaint_biharmonic(display.astype(np.float64) / 255.0, obj, channel_axis=-1)
    return np.clip(np.rint(filled * 255.0), 0, 255).astype(np.uint8)


def _compose(picture: np.ndarray, obj: np.ndarray | None, plate: np.ndarray) -> np.ndarray:
    """``picture``'s object over ``plate`` (the whole plate when the picture has no object)."""
    if obj is None:
        return plate.copy()
    return np.where(obj[..., None], picture, plate)


def _removal(k: int, before: np.ndarray, after: np.ndarray, regions: list[np.ndarray],
             how: str) -> dict:
    drop = before[:, k] - after[:, k]
    acc_b = float((before.argmax(1) == k).mean())
    acc_a = float((after.argmax(1) == k).mean())
    called = before.argmax(1) == k
    lost = called & (after.argmax(1) != k)
    return {"images": len(before), "how": how, "mean_drop": float(drop.mean()), "median_drop": float(np.median(drop)),
            "p_before": float(before[:, k].mean()), "p_after": float(after[:, k].mean()),
            "accuracy_before": acc_b, "accuracy_after": acc_a, "accuracy_drop": acc_b - acc_a,
            "calls": int(called.sum()), "calls_lost": int(lost.sum()),
            "calls_lost_share": float(lost.sum() / called.sum()) if called.any() else None,
            "region_area": float(np.mean([r.mean() for r in regions]))}


def _net(result: dict, control: dict) -> dict:
    result["control"] = control
    result["net_flip_rate"] = (None if result.get("flip_rate") is None
                               else result["flip_rate"] - (control.get("flip_rate") or 0.0))
    result["net_shift"] = (None if result.get("mean_shift") is None
                           else result["mean_shift"] - (control.get("mean_shift") or 0.0))
    return result


def confirm_cluster(
    model: LoadedModel,
    cluster: Cluster,
    *,
    member_maps: Sequence[np.ndarray],
    member_items: Sequence[dict],
    items: Sequence[dict],
    member_masks: Sequence[np.ndarray | None] | None = None,
    object_masks: dict[str, np.ndarray | None] | None = None,
    settings: ConfirmSettings | None = None,
    progress: ProgressFn | None = None,
    cancel: CancelToken | None = None,
) -> Confirmation:
    """Run removal and transplant for ``cluster``.

    ``member_maps`` / ``member_items`` / ``member_masks``: the members' (H, W) maps, item records
    and object masks ((H, W) bool or None), most typical first. ``items``: every item of the dataset
    (``DatasetItem.to_dict()`` + ``path``), from which the transplant takes the other classes'
    images; ``object_masks``: their object masks by rel path (needed for spread evidence).
    """
    s = (settings or ConfirmSettings()).validated()
    start = time.perf_counter()
    k = model.class_index(cluster.label)
    masks = list(member_masks) if member_masks is not None else [None] * len(member_items)
    kind = region_kind(cluster, annotated=any(m is not None for m in masks))
    others = [i for i in items if i["label"] != cluster.label][: s.limit]
    if kind == "off_object":
        removal, transplant, region, pictures = _background_tests(
            model, k, cluster, list(member_items), masks, others, object_masks or {}, s, cancel)
    else:
        removal, transplant, region, pictures = _spot_tests(
            model, k, cluster, kind, list(member_items), list(member_maps), others, s, progress, cancel)
    flips = transplant.get("net_flip_rate") if transplant else None
    lost = removal["calls_lost_share"]
    big_removal = lost is not None and lost >= s.min_calls_lost
    big_transplant = flips is not None and flips >= s.min_transplant_flips
    verdict = CONFIRMED if big_removal and big_transplant else NOT_CONFIRMED
    region.update(kind=kind, words=REGION_KINDS[kind], mass=s.region_mass)
    return Confirmation(cluster=cluster.key, label=cluster.label, verdict=verdict, removal=removal,
                        transplant=transplant, region=region, sentence=_sentence(cluster, removal, transplant,
                                                                                 verdict, kind, s),
                        seconds=time.perf_counter() - start, pictures=pictures)


def _spot_tests(model: LoadedModel, k: int, cluster: Cluster, kind: str, member_items: list[dict],
                member_maps: list[np.ndarray], others: list[dict], s: ConfirmSettings,
                progress: ProgressFn | None, cancel: CancelToken | None):
    shared = evidence_region(cluster.mean_map, mass=s.region_mass) if kind == "spot" else None
    fill = baseline_colour(model)
    displays: list[np.ndarray] = []
    regions: list[np.ndarray] = []
    used: list[dict] = []
    for item, amap in zip(member_items[: s.limit], member_maps[: s.limit]):
        if cancel is not None:
            cancel.raise_if_cancelled()
        display = _display(model, item)
        region = shared if shared is not None else evidence_region(amap, mass=s.region_mass)
        if display is None or not region.any() or region.shape != display.shape[:2]:
            continue
        displays.append(display)
        regions.append(region)
        used.append(item)
    if not displays:
        raise BadParameterError(f"none of the images of cluster {cluster.key} could be read again")
    filled = []
    for display, region in zip(displays, regions):
        f = display.copy()
        f[region] = fill
        filled.append(f)
    removal = _removal(k, _scores(model, displays), _scores(model, filled), regions,
                       f"the region filled with the baseline colour {[int(v) for v in fill]}")

    # The candidate patch: the region of the most typical member, with the region's own shape.
    x0, y0, x1, y1 = _box(regions[0])
    patch = displays[0][y0:y1, x0:x1].copy()
    mask = regions[0][y0:y1, x0:x1].copy()
    transplant = None
    if others:
        source = f"evidence region of {used[0]['rel']} (cluster {cluster.key})"
        spec = InjectionSpec(patch=patch, suspect_class=cluster.label, at=(x0, y0), mask=mask, source=source)
        res = injection_test(model, others, spec, progress=progress, cancel=cancel)
        plain = np.broadcast_to(fill, patch.shape).copy()
        control = injection_test(model, others, InjectionSpec(
            patch=plain, suspect_class=cluster.label, at=(x0, y0), mask=mask, source="baseline control"),
            progress=progress, cancel=cancel)
        transplant = _net({key: v for key, v in res.to_dict().items() if key not in ("per_class", "skipped_images")},
                          {"flips": control.flips, "flip_rate": control.flip_rate, "mean_shift": control.mean_shift,
                           "eligible": control.eligible, "what": "the baseline colour pasted in the same shape"})
        transplant["how"] = "the region cut from the most typical image, pasted at the same place"
    pictures = {"patch": patch, "region": (regions[0] * 255).astype(np.uint8), "before": displays[0],
                "after": filled[0]}
    return removal, transplant, {"box": [x0, y0, x1, y1], "area": removal["region_area"], "from": used[0]["rel"]}, \
        pictures


def _background_tests(model: LoadedModel, k: int, cluster: Cluster, member_items: list[dict],
                      masks: list[np.ndarray | None], others: list[dict], object_masks: dict[str, np.ndarray | None],
                      s: ConfirmSettings, cancel: CancelToken | None):
    members: list[tuple[dict, np.ndarray, np.ndarray]] = []
    for item, obj in zip(member_items[: s.limit], masks[: s.limit]):
        if cancel is not None:
            cancel.raise_if_cancelled()
        display = _display(model, item) if obj is not None else None
        if display is not None and obj is not None and obj.shape == display.shape[:2]:
            members.append((item, display, obj))
    receivers: list[tuple[dict, np.ndarray, np.ndarray | None]] = []
    for item in others:
        if cancel is not None:
            cancel.raise_if_cancelled()
        display = _display(model, item)
        obj = object_masks.get(item["rel"])
        if display is not None and (obj is None or obj.shape == display.shape[:2]):
            receivers.append((item, display, obj))
    if not members or not receivers:
        raise BadParameterError(f"cluster {cluster.key} needs readable images with objects and images of other "
                                "classes to swap backgrounds")
    ours = [_plate(d, o) for _, d, o in members[:PLATES]]
    theirs = [_plate(d, o) for _, d, o in receivers[:PLATES]]
    # Removal: each member keeps its object and gets a background of another class.
    swapped = [_compose(d, o, theirs[n % len(theirs)]) for n, (_, d, o) in enumerate(members)]
    removal = _removal(k, _scores(model, [d for _, d, _ in members]), _scores(model, swapped),
                       [~o for _, _, o in members], "each image keeps its object and gets another class's background")
    # Transplant: the other classes keep their objects and get the cluster's backgrounds; the
    # control gives them backgrounds of their own kind (never their own), so the compositing is alike.
    before = _scores(model, [d for _, d, _ in receivers])
    after = _scores(model, [_compose(d, o, ours[n % len(ours)]) for n, (_, d, o) in enumerate(receivers)])
    control = _scores(model, [_compose(d, o, theirs[(n + 1) % len(theirs)]) for n, (_, d, o) in
                              enumerate(receivers)])
    eligible = before.argmax(1) != k

    def flips(p: np.ndarray) -> dict:
        n = int((eligible & (p.argmax(1) == k)).sum())
        return {"flips": n, "flip_rate": n / int(eligible.sum()) if eligible.any() else None,
                "mean_shift": float((p[:, k] - before[:, k]).mean()), "eligible": int(eligible.sum())}

    transplant = _net({"tested": len(receivers), "already_suspect": int((~eligible).sum()), **flips(after),
                       "how": f"other classes keep their objects and get the backgrounds of the cluster's {len(ours)} "
                              "most typical images"},
                      {**flips(control), "what": "backgrounds of other images of the other classes"})
    first_item, first, first_obj = members[0]
    pictures = {"patch": ours[0], "region": ((~first_obj) * 255).astype(np.uint8), "before": first,
                "after": swapped[0]}
    h, w = first_obj.shape
    return removal, transplant, {"box": [0, 0, int(w), int(h)], "area": removal["region_area"],
                                 "from": first_item["rel"]}, pictures


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.0f}%"


def _sentence(cluster: Cluster, removal: dict, transplant: dict | None, verdict: str, kind: str,
              s: ConfirmSettings) -> str:
    c = cluster.label
    taking = ("Swapping the background of" if kind == "off_object" else "Filling the evidence region of")
    if removal["calls"]:
        parts = [f"{taking} cluster {cluster.key} ({cluster.size} image(s)) loses "
                 f"{_pct(removal['calls_lost_share'])} of the model's {removal['calls']} call(s) of {c!r} (mean "
                 f"p({c}) {removal['p_before']:.2f} → {removal['p_after']:.2f})"]
    else:
        parts = [f"the model calls none of the {cluster.size} image(s) of cluster {cluster.key} {c!r}, so taking "
                 f"their region away has no call to lose (mean p({c}) {removal['p_before']:.2f} → "
                 f"{removal['p_after']:.2f})"]
    if transplant is None:
        parts.append("no image of another class could receive the region")
    else:
        giving = "giving" if kind == "off_object" else "pasting"
        what = "its background to" if kind == "off_object" else "the region onto"
        parts.append(f"{giving} {what} {transplant.get('eligible', 0)} image(s) of other classes flips "
                     f"{_pct(transplant.get('flip_rate'))} of them to {c!r} (control "
                     f"{_pct(transplant['control'].get('flip_rate'))}, net {_pct(transplant.get('net_flip_rate'))})")
    need = (f"both effects must reach the thresholds (calls lost ≥ {_pct(s.min_calls_lost)}, net flips ≥ "
            f"{_pct(s.min_transplant_flips)})")
    parts[0] = parts[0][0].upper() + parts[0][1:]
    if verdict == CONFIRMED:
        return "; ".join(parts) + f": {verdict} — {need}, and they do. The reviewer decides whether the region is " \
                                  "a shortcut or the legitimate cue."
    return "; ".join(parts) + f": {verdict} — {need}."
