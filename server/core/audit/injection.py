"""Counterfactual tests: paste a suspect patch onto other classes; swap the background of objects.

Artifact injection. A patch the reviewer suspects (a stamp, a tag, a ruler end) is pasted at one
place (or, with ``at = "random"``, at a seeded random place per image) onto images whose true
class is *not* the suspect class. If the model learned the patch as a cue, predictions flip to
the suspect class. The counts are kept honest:

- an image where the paste changes nothing is *skipped* and counted: the mean absolute change
  under the pasted pixels, in levels of 0–255 as the model's channels see them, is at most
  :data:`SAME_PATCH_LEVELS` (8, about 3% of the range; Pellucid's own threshold, with room for
  the few levels that JPEG re-encoding or resizing move a patch that is already there);
- the flip rate is flips / eligible, where eligible images are the tested images the model did
  not already call the suspect class;
- the mean shift of the suspect class's probability is taken over every tested image.

Reported with the rate, always: considered, skipped, tested and eligible counts, per class too;
the images that moved most; with random places, every image's place.

Background swap. For images with an object mask (or, failing that, a box), the object is kept and
everything else is replaced by another image's background (the donor's own object painted over
with its background's mean colour). A model that reads the object keeps its accuracy; one that
reads the background loses it.

Both work on the picture the model sees (after the spec's resize and crop), so a location is in
model-input pixels, and the tensors are built with exactly the spec's arithmetic.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from pellucid.core.audit.sentences import injection_sentence
from pellucid.core.audit.settings import InjectionSpec
from pellucid.core.audit.worker import object_mask
from pellucid.core.errors import BadParameterError
from pellucid.core.model.loading import LoadedModel
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.progress import CancelToken, ProgressFn, step
from pellucid.core.views.predict import check_finite, scores_from_logits

__all__ = [
    "SAME_PATCH_LEVELS",
    "InjectionResult",
    "SwapResult",
    "background_swap_test",
    "check_patch_fits",
    "crop_patch",
    "injection_sentence",
    "injection_test",
    "paste",
    "tensor_from_display",
]

_BATCH = 32
_EXAMPLES = 6
SAME_PATCH_LEVELS = 8.0  # mean |change| under the paste (0–255) at or below which an image already has the patch


def tensor_from_display(model: LoadedModel, display: np.ndarray) -> torch.Tensor:
    """(H, W, 3) uint8 picture at input size → (1, C, H, W) tensor, with the spec's arithmetic."""
    arr = display.astype(np.float32) / 255.0
    if model.spec.input.channels == 1:
        # ITU-R 601-2 luma, the conversion Pillow's convert("L") applies (then rounded to 8 bits).
        luma = np.rint(display[..., 0] * 0.299 + display[..., 1] * 0.587 + display[..., 2] * 0.114)
        arr = (np.clip(luma, 0, 255).astype(np.float32) / 255.0)[..., None]
    mean = np.asarray(model.spec.preprocess.mean, dtype=np.float32)
    std = np.asarray(model.spec.preprocess.std, dtype=np.float32)
    return torch.from_numpy(((arr - mean) / std).transpose(2, 0, 1).copy()).unsqueeze(0)


def paste(display: np.ndarray, patch: np.ndarray, at: tuple[int, int], mask: np.ndarray | None = None) -> np.ndarray:
    """A copy of ``display`` (H, W, 3) with ``patch`` (h, w, 3) pasted with its top-left at (x, y), clipped.

    ``mask`` (h, w) bool: paste only those pixels of the patch.
    """
    out = display.copy()
    h, w = display.shape[:2]
    x, y = int(at[0]), int(at[1])
    ph, pw = patch.shape[:2]
    x0, y0, x1, y1 = max(0, x), max(0, y), min(w, x + pw), min(h, y + ph)
    if x1 <= x0 or y1 <= y0:
        raise BadParameterError(
            f"a {pw}×{ph} patch at ({x}, {y}) lies entirely outside the {w}×{h} model input; give a location "
            "inside it"
        )
    piece = patch[y0 - y:y1 - y, x0 - x:x1 - x]
    if mask is None:
        out[y0:y1, x0:x1] = piece
    else:
        keep = mask[y0 - y:y1 - y, x0 - x:x1 - x]
        out[y0:y1, x0:x1][keep] = piece[keep]
    return out


def crop_patch(model: LoadedModel, image_path: str | Path, box: tuple[int, int, int, int]) -> np.ndarray:
    """Cut ``box`` (x0, y0, x1, y1, model-input pixels) from an image as the model sees it."""
    display = prepare(model.spec, read_image(Path(image_path))).display
    h, w = display.shape[:2]
    x0, y0, x1, y1 = (int(v) for v in box)
    if not (0 <= x0 < x1 <= w and 0 <= y0 < y1 <= h):
        raise BadParameterError(
            f"the patch box {list(box)} does not fit inside the {w}×{h} model input; expected 0 <= x0 < x1 <= {w} "
            f"and 0 <= y0 < y1 <= {h}"
        )
    return display[y0:y1, x0:x1].copy()


def _probabilities(model: LoadedModel, tensors: list[torch.Tensor]) -> np.ndarray:
    with torch.inference_mode():
        logits = model.module(torch.cat(tensors, dim=0))
    check_finite(logits)
    return scores_from_logits(logits.float(), model.output_kind).numpy().astype(np.float64)


@dataclass
class InjectionResult:
    """What pasting the patch did, with every count the rate depends on.

    ``considered``: readable images of the other classes. ``skipped``: those where the paste
    changes nothing (they already carry the patch there). ``tested`` = considered − skipped.
    ``eligible``: tested images not already predicted as the suspect class; ``flips`` among them
    turn into it. ``mean_shift``: mean change of the suspect class's probability over the tested
    images. ``examples`` are the images whose suspect probability rose most.
    """

    spec: dict
    suspect_index: int
    considered: int
    skipped: int
    tested: int
    eligible: int
    already_suspect: int
    flips: int
    flip_rate: float | None
    mean_shift: float | None
    per_class: dict
    examples: list[dict]
    failed: list[dict]
    skipped_images: list[dict]
    positions: dict[str, list[int]] | None
    seconds: float
    pictures: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict, repr=False)

    def to_dict(self) -> dict:
        return {
            "settings": self.spec, "suspect_index": self.suspect_index, "considered": self.considered,
            "skipped": self.skipped, "tested": self.tested, "eligible": self.eligible,
            "already_suspect": self.already_suspect, "flips": self.flips, "flip_rate": self.flip_rate,
            "mean_shift": self.mean_shift, "per_class": self.per_class, "examples": self.examples,
            "failed": self.failed, "skipped_images": self.skipped_images, "positions": self.positions,
            "same_patch_levels": SAME_PATCH_LEVELS,
        }


def _displays(model: LoadedModel, items: list[dict], *, progress: ProgressFn | None,
              cancel: CancelToken | None, offset: int, total: int):
    """Yield (item, display picture, intake size) in order; unreadable files yield a reason instead."""
    for n, item in enumerate(items):
        step(offset + n, total, progress=progress, cancel=cancel)
        try:
            image = read_image(Path(item["path"]))
        except Exception as exc:  # noqa: BLE001 - a file that vanished or broke is listed, not fatal
            yield item, None, str(exc)
            continue
        yield item, prepare(model.spec, image).display, image.pil.size


def _paste_box(shape: tuple[int, int], patch: np.ndarray, at: tuple[int, int],
               mask: np.ndarray | None) -> np.ndarray:
    """(H, W) bool: the input pixels the paste writes."""
    h, w = shape
    ph, pw = patch.shape[:2]
    x, y = int(at[0]), int(at[1])
    region = np.zeros((h, w), dtype=bool)
    x0, y0, x1, y1 = max(0, x), max(0, y), min(w, x + pw), min(h, y + ph)
    if x1 > x0 and y1 > y0:
        region[y0:y1, x0:x1] = True if mask is None else mask[y0 - y:y1 - y, x0 - x:x1 - x]
    return region


def check_patch_fits(model: LoadedModel, spec: InjectionSpec) -> None:
    """A patch larger than the model's input cannot be pasted whole: one sentence, before any work."""
    h, w = model.spec.input.height, model.spec.input.width
    ph, pw = spec.patch.shape[:2]
    if ph > h or pw > w:
        raise BadParameterError(
            f"the suspect patch is {pw}×{ph} px, larger than the model's {w}×{h} input; cut a smaller patch "
            f"(at most {w}×{h} px, in model-input pixels)"
        )
    if not spec.random:
        x, y = int(spec.at[0]), int(spec.at[1])
        if x >= w or y >= h or x + pw <= 0 or y + ph <= 0:
            raise BadParameterError(
                f"a {pw}×{ph} patch at ({x}, {y}) lies entirely outside the {w}×{h} model input; give a location "
                "inside it"
            )


def _position(spec: InjectionSpec, item: dict, n: int, shape: tuple[int, int]) -> tuple[int, int]:
    if not spec.random:
        return int(spec.at[0]), int(spec.at[1])
    h, w = shape
    ph, pw = spec.patch.shape[:2]
    # Seeded by the image's own index, so its place does not depend on which other files could be read.
    rng = np.random.default_rng([spec.seed, int(item.get("index", n))])
    return int(rng.integers(0, w - pw + 1)), int(rng.integers(0, h - ph + 1))


def _change_levels(model: LoadedModel, before: torch.Tensor, after: torch.Tensor, region: np.ndarray) -> float:
    """Mean absolute change under the paste, in levels of 0–255, as the model's channels see it."""
    std = torch.as_tensor(model.spec.preprocess.std, dtype=before.dtype).view(1, -1, 1, 1)
    delta = ((after - before).abs() * std * 255.0)[0].numpy()  # (C, H, W)
    return float(delta[:, region].mean()) if region.any() else 0.0


def injection_test(model: LoadedModel, items: list[dict], spec: InjectionSpec, *,
                   progress: ProgressFn | None = None, cancel: CancelToken | None = None) -> InjectionResult:
    """Paste ``spec.patch`` onto every item whose label is not the suspect class, and count honestly.

    ``items`` are ``DatasetItem.to_dict()`` records with a ``path``. An image is skipped (and
    counted) when the paste changes it by at most :data:`SAME_PATCH_LEVELS` on average under the
    pasted pixels: it already carries the patch there, so it cannot show what the patch does.
    Raises BadParameterError when the patch is larger than the input or no image is left to test.
    """
    start = time.perf_counter()
    suspect = model.class_index(spec.suspect_class)
    check_patch_fits(model, spec)
    name = model.labels[suspect]
    others = [i for i in items if i["label"] != name]
    if spec.limit is not None:
        others = others[: spec.limit]
    if not others:
        raise BadParameterError(
            f"the injection test needs images of classes other than {name!r}; the dataset has none"
        )
    shape = (model.spec.input.height, model.spec.input.width)
    before: list[np.ndarray] = []
    after: list[np.ndarray] = []
    kept: list[dict] = []
    failed: list[dict] = []
    skipped: list[dict] = []
    considered: list[dict] = []
    positions: dict[str, list[int]] = {}
    at_of: dict[str, tuple[int, int]] = {}
    batch_b: list[torch.Tensor] = []
    batch_a: list[torch.Tensor] = []

    def flush() -> None:
        if batch_b:
            before.append(_probabilities(model, batch_b))
            after.append(_probabilities(model, batch_a))
            batch_b.clear()
            batch_a.clear()

    for n, (item, display, info) in enumerate(_displays(model, others, progress=progress, cancel=cancel, offset=0,
                                                        total=len(others))):
        if display is None:
            failed.append({"rel": item["rel"], "reason": info})
            continue
        considered.append(item)
        at = _position(spec, item, n, shape)
        at_of[item["rel"]] = at
        if spec.random:
            positions[item["rel"]] = [at[0], at[1]]
        pasted = paste(display, spec.patch, at, spec.mask)
        tb, ta = tensor_from_display(model, display), tensor_from_display(model, pasted)
        change = _change_levels(model, tb, ta, _paste_box(shape, spec.patch, at, spec.mask))
        if change <= SAME_PATCH_LEVELS:
            skipped.append({"rel": item["rel"], "label": item["label"], "change": change,
                            "reason": f"already carries the patch there (mean change {change:.1f} of 255 under it)"})
            continue
        batch_b.append(tb)
        batch_a.append(ta)
        kept.append(item)
        if len(batch_b) >= _BATCH:
            flush()
    flush()
    step(len(others), len(others), progress=progress, cancel=cancel)
    if not considered:
        raise BadParameterError("none of the images for the injection test could be read")
    if not kept:
        raise BadParameterError(
            f"pasting the patch changes none of the {len(considered)} image(s) of other classes (each already "
            "carries it where it is pasted), so the injection test has nothing to measure; paste it elsewhere "
            "or use at = \"random\""
        )
    pb, pa = np.concatenate(before), np.concatenate(after)
    pred_b, pred_a = pb.argmax(axis=1), pa.argmax(axis=1)
    shift = pa[:, suspect] - pb[:, suspect]
    eligible = pred_b != suspect
    flips = eligible & (pred_a == suspect)
    per_class: dict[str, dict] = {}
    for c in sorted({i["label"] for i in considered}, key=model.labels.index):
        sel = np.array([i["label"] == c for i in kept], dtype=bool)
        el = int((sel & eligible).sum())
        per_class[c] = {"considered": sum(1 for i in considered if i["label"] == c),
                        "skipped": sum(1 for i in skipped if i["label"] == c),
                        "tested": int(sel.sum()), "eligible": el, "flips": int((sel & flips).sum()),
                        "flip_rate": (float((sel & flips).sum()) / el) if el else None,
                        "mean_shift": float(shift[sel].mean()) if sel.any() else None}
    order = sorted(range(len(kept)), key=lambda n: (-shift[n], n))[:_EXAMPLES]
    examples = []
    pics: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for n in order:
        rel = kept[n]["rel"]
        examples.append({
            "rel": rel, "label": kept[n]["label"], "at": list(at_of[rel]),
            "before": model.labels[int(pred_b[n])], "after": model.labels[int(pred_a[n])],
            "p_suspect_before": float(pb[n, suspect]), "p_suspect_after": float(pa[n, suspect]),
            "flipped": bool(flips[n]),
        })
        display = prepare(model.spec, read_image(Path(kept[n]["path"]))).display
        pics[rel] = (display, paste(display, spec.patch, at_of[rel], spec.mask))
    n_el = int(eligible.sum())
    return InjectionResult(
        spec=spec.to_dict(), suspect_index=suspect, considered=len(considered), skipped=len(skipped),
        tested=len(kept), eligible=n_el, already_suspect=len(kept) - n_el, flips=int(flips.sum()),
        flip_rate=(float(flips.sum()) / n_el) if n_el else None, mean_shift=float(shift.mean()),
        per_class=per_class, examples=examples, failed=failed, skipped_images=skipped,
        positions=positions if spec.random else None, seconds=time.perf_counter() - start, pictures=pics,
    )


@dataclass
class SwapResult:
    """Accuracy on the images with an object, before and after their background was replaced."""

    tested: int
    object_source: str  # "masks", "boxes" or "masks and boxes"
    accuracy_before: float
    accuracy_after: float
    accuracy_change: float
    changed_predictions: int
    examples: list[dict]
    seconds: float
    pictures: dict[str, tuple[np.ndarray, np.ndarray]] = field(default_factory=dict, repr=False)

    def to_dict(self) -> dict:
        return {"tested": self.tested, "object_source": self.object_source, "accuracy_before": self.accuracy_before,
                "accuracy_after": self.accuracy_after, "accuracy_change": self.accuracy_change,
                "changed_predictions": self.changed_predictions, "examples": self.examples}


def background_swap_test(model: LoadedModel, items: list[dict], *, progress: ProgressFn | None = None,
                         cancel: CancelToken | None = None) -> SwapResult | None:
    """Keep each object, take the background from the next image of another class (in item order).

    Returns None when fewer than two images carry a mask or box. Donors are chosen without
    randomness, so the test is reproducible.
    """
    start = time.perf_counter()
    candidates = [i for i in items if i.get("mask") or i.get("box")]
    if len(candidates) < 2:
        return None
    prepared: list[tuple[dict, np.ndarray, np.ndarray]] = []
    for item, display, size in _displays(model, candidates, progress=progress, cancel=cancel, offset=0,
                                         total=2 * len(candidates)):
        if display is None:
            continue
        mask = object_mask(model.spec, size, box=item.get("box"), mask_path=item.get("mask"))
        if mask is not None:
            prepared.append((item, display, mask))
    if len(prepared) < 2:
        return None
    labels = [p[0]["label"] for p in prepared]
    truth = np.array([model.labels.index(c) for c in labels])
    composites: list[np.ndarray] = []
    for n, (_, display, mask) in enumerate(prepared):
        donor_n = next((m % len(prepared) for m in range(n + 1, n + len(prepared))
                        if labels[m % len(prepared)] != labels[n]), (n + 1) % len(prepared))
        _, donor, donor_mask = prepared[donor_n]
        background = donor.copy()
        outside = ~donor_mask
        fill = donor[outside].mean(axis=0) if outside.any() else donor.reshape(-1, 3).mean(axis=0)
        background[donor_mask] = np.rint(fill).astype(np.uint8)
        composites.append(np.where(mask[..., None], display, background))
        step(len(candidates) + n, 2 * len(candidates), progress=progress, cancel=cancel)
    pb = np.concatenate([_probabilities(model, [tensor_from_display(model, d) for _, d, _ in prepared[i:i + _BATCH]])
                         for i in range(0, len(prepared), _BATCH)])
    pa = np.concatenate([_probabilities(model, [tensor_from_display(model, d) for d in composites[i:i + _BATCH]])
                         for i in range(0, len(composites), _BATCH)])
    step(2 * len(candidates), 2 * len(candidates), progress=progress, cancel=cancel)
    before, after = pb.argmax(axis=1), pa.argmax(axis=1)
    acc_b, acc_a = float((before == truth).mean()), float((after == truth).mean())
    changed = np.flatnonzero(before != after)
    examples = []
    pics: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    for n in list(changed[:_EXAMPLES]):
        rel = prepared[n][0]["rel"]
        examples.append({"rel": rel, "label": labels[n], "before": model.labels[int(before[n])],
                         "after": model.labels[int(after[n])]})
        pics[rel] = (prepared[n][1], composites[n])
    has_mask = any(p[0].get("mask") for p in prepared)
    has_box_only = any(not p[0].get("mask") for p in prepared)
    source = "masks and boxes" if has_mask and has_box_only else ("masks" if has_mask else "boxes")
    return SwapResult(tested=len(prepared), object_source=source, accuracy_before=acc_b, accuracy_after=acc_a,
                      accuracy_change=acc_a - acc_b, changed_predictions=len(changed), examples=examples,
                      seconds=time.perf_counter() - start, pictures=pics)
