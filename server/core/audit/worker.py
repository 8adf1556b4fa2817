"""The unit of audit work: explain and measure one shard of images.

:func:`process_shard` is a plain module-level function of picklable arguments, so the same code
runs inline, in a local process pool and as a Ray task. A worker process loads the model once
from its spec (checking the fingerprint) and keeps it for the following shards.

Every image's outcome is deterministic: the torch thread count is fixed by the settings while a
shard runs, because a different number of threads may sum floating-point values in another order.
"""

from __future__ import annotations

import hashlib
import threading
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
from PIL import Image

from pellucid.core.attribution import Normalization, compute_attribution
from pellucid.core.attribution.batched import BATCHED_METHODS, batched_maps
from pellucid.core.audit.measures import measure_map
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.errors import ModelLoadError, PellucidError
from pellucid.core.model.loading import LoadedModel, load_model
from pellucid.core.model.preprocess import prepare, read_image, resize_and_crop
from pellucid.core.model.spec import ModelSpec
from pellucid.core.progress import CancelToken
from pellucid.core.views.predict import check_finite, scores_from_logits

__all__ = ["ImageOutcome", "ShardTask", "audit_image", "audit_images", "object_mask", "process_shard", "worker_model"]

_MODELS: dict[tuple[str, str], LoadedModel] = {}


@dataclass(frozen=True)
class ShardTask:
    """A shard: the model to load, the settings, and the images (``DatasetItem.to_dict()`` + path)."""

    spec_path: str
    fingerprint: str
    trust_pickled: bool
    settings: dict
    items: tuple[dict, ...]
    index: int = 0


@dataclass
class ImageOutcome:
    item: int
    rel: str
    sha256: str
    label: str
    status: str  # "done" or "failed"
    data: dict
    map: np.ndarray | None = field(default=None, repr=False)


def worker_model(spec_path: str, fingerprint: str, *, trust_pickled: bool) -> LoadedModel:
    """The model for ``spec_path`` in this process, loaded once; its weights must match ``fingerprint``."""
    key = (spec_path, fingerprint)
    if key not in _MODELS:
        model = load_model(ModelSpec.from_toml(spec_path), trust_pickled=trust_pickled)
        if model.fingerprint != fingerprint:
            raise ModelLoadError(
                f"the weights of {spec_path!r} changed during the audit (fingerprint {model.fingerprint[:12]}… "
                f"instead of {fingerprint[:12]}…); start a new run"
            )
        _MODELS[key] = model
    return _MODELS[key]


def object_mask(spec: ModelSpec, size: tuple[int, int], *, box: list[int] | None = None,
                mask_path: str | None = None) -> np.ndarray | None:
    """The object as an (H, W) bool mask at the model's input resolution, or None.

    The box or mask is drawn at the image's own size and sent through the very resize and crop the
    image gets, so it lands where the object lands in what the model sees.
    """
    if mask_path:
        m = read_image(Path(mask_path)).pil.convert("L")
        arr = (np.asarray(m) > 0).astype(np.uint8) * 255
        picture = Image.fromarray(arr, mode="L")
        if picture.size != size:
            picture = picture.resize(size, Image.Resampling.NEAREST)
    elif box:
        x0, y0, x1, y1 = (int(v) for v in box)
        arr = np.zeros((size[1], size[0]), dtype=np.uint8)
        arr[max(0, y0):y1, max(0, x0):x1] = 255
        picture = Image.fromarray(arr, mode="L")
    else:
        return None
    seen = np.asarray(resize_and_crop(picture, spec, []), dtype=np.uint8) >= 128
    return seen if seen.any() else None


def _normalization(model: LoadedModel) -> Normalization:
    return Normalization.of(model.spec.preprocess.mean, model.spec.preprocess.std)


def _load(model: LoadedModel, item: dict) -> tuple[Any, Any] | str:
    """(image, prepared) for one dataset item, or the reason it cannot be used."""
    try:
        data = Path(item["path"]).read_bytes()
    except OSError as exc:
        return f"cannot be read any more ({exc.strerror or exc})"
    if hashlib.sha256(data).hexdigest() != item["sha256"]:
        return "the file changed after the dataset was read (its sha256 differs); start a new run"
    try:
        image = read_image(data, name=item["rel"])
        return image, prepare(model.spec, image)
    except PellucidError as exc:
        return str(exc)


def _target(model: LoadedModel, item: dict, predicted: int, settings: AuditSettings) -> int:
    return model.labels.index(item["label"]) if settings.target == "label" else predicted


def _outcome(model: LoadedModel, item: dict, settings: AuditSettings, image: Any, prepared: Any,
             probs: torch.Tensor, target: int, amap: np.ndarray, *, signed: bool, params: dict,
             warning: str | None) -> ImageOutcome:
    rel, label, sha = item["rel"], item["label"], item["sha256"]
    try:
        mask = object_mask(model.spec, image.pil.size, box=item.get("box"), mask_path=item.get("mask"))
    except PellucidError as exc:
        return ImageOutcome(item["index"], rel, sha, label, "failed", {"reason": str(exc)})
    predicted = int(torch.argmax(probs))
    label_index = model.labels.index(label)
    measures = measure_map(amap, object_mask=mask, layout=settings.regions, tolerance=settings.tolerance)
    result = {
        "label_index": label_index,
        "predicted": predicted,
        "predicted_label": model.labels[predicted],
        "correct": predicted == label_index,
        "probabilities": [float(p) for p in probs],
        "target": target,
        "target_label": model.labels[target],
        "has_object": mask is not None,
        "object_pixels": int(mask.sum()) if mask is not None else 0,
        "measures": measures.to_dict(),
        "signed": bool(signed),
        "map_params": dict(params),
        "map_warning": warning,
        "notes": list(prepared.notes),
    }
    return ImageOutcome(item["index"], rel, sha, label, "done", result, amap.astype(np.float32))


def audit_image(model: LoadedModel, item: dict, settings: AuditSettings) -> ImageOutcome:
    """Predict, explain and measure one image; a bad file becomes a 'failed' outcome, not an error."""
    loaded = _load(model, item)
    if isinstance(loaded, str):
        return ImageOutcome(item["index"], item["rel"], item["sha256"], item["label"], "failed", {"reason": loaded})
    image, prepared = loaded
    return _audit_prepared(model, item, settings, image, prepared)


def _audit_prepared(model: LoadedModel, item: dict, settings: AuditSettings, image: Any,
                    prepared: Any) -> ImageOutcome:
    try:
        x = prepared.tensor
        with torch.inference_mode():
            logits = model.module(x)
        check_finite(logits)
        probs = scores_from_logits(logits.float(), model.output_kind)[0]
        target = _target(model, item, int(torch.argmax(probs)), settings)
        amap = compute_attribution(
            settings.method, model.module, x, target=target, params=settings.params,
            output_kind=model.output_kind, normalization=_normalization(model),
        )
    except PellucidError as exc:
        return ImageOutcome(item["index"], item["rel"], item["sha256"], item["label"], "failed", {"reason": str(exc)})
    return _outcome(model, item, settings, image, prepared, probs, target, amap.map, signed=amap.signed,
                    params=amap.params, warning=amap.warning)


def audit_images(model: LoadedModel, items: list[dict], settings: AuditSettings,
                 cancel: CancelToken | None = None) -> list[ImageOutcome]:
    """Audit several images; for Grad-CAM, gradient saliency and gradient × input, the images that
    load run as one batch: one forward gives the predictions and targets, one backward the maps
    (see :mod:`pellucid.core.attribution.batched`). Any problem with the batch (a non-finite output,
    a layer that cannot serve) sends its images down the one-image path, which reports per image."""
    out: dict[int, ImageOutcome] = {}
    ready: list[tuple[int, dict, Any, Any]] = []
    for k, item in enumerate(items):
        loaded = _load(model, item)
        if isinstance(loaded, str):
            out[k] = ImageOutcome(item["index"], item["rel"], item["sha256"], item["label"], "failed",
                                  {"reason": loaded})
        else:
            ready.append((k, item, *loaded))
    batch = None
    if settings.method in BATCHED_METHODS and len(ready) > 1:
        if cancel is not None:
            cancel.raise_if_cancelled()
        xb = torch.cat([prepared.tensor for _, _, _, prepared in ready])

        def targets(logits: torch.Tensor) -> list[int]:
            return [_target(model, item, int(torch.argmax(row)), settings) for (_, item, _, _), row in
                    zip(ready, logits)]

        try:
            batch = batched_maps(settings.method, model.module, xb, choose_targets=targets, params=settings.params)
        except PellucidError:
            batch = None  # the one-image path below says which image and why
    for n, (k, item, image, prepared) in enumerate(ready):
        if cancel is not None:
            cancel.raise_if_cancelled()
        if batch is None:
            out[k] = _audit_prepared(model, item, settings, image, prepared)
            continue
        probs = scores_from_logits(batch.logits[n : n + 1].float(), model.output_kind)[0]
        out[k] = _outcome(model, item, settings, image, prepared, probs, batch.targets[n], batch.maps[n],
                          signed=batch.signed, params=batch.params, warning=batch.warnings[n])
    return [out[k] for k in range(len(items))]


def process_shard(task: ShardTask, *, model: LoadedModel | None = None,
                  cancel: CancelToken | None = None) -> list[ImageOutcome]:
    """Audit every image of ``task``; ``model`` skips loading when the caller already holds it."""
    settings = AuditSettings.from_dict(task.settings)
    # Thread count is process-wide: set it only on a process's main thread (a pool or Ray worker,
    # or the CLI), never from a job thread of the dashboard, whose other requests share the process.
    own_process = threading.current_thread() is threading.main_thread()
    if model is None:
        model = worker_model(task.spec_path, task.fingerprint, trust_pickled=task.trust_pickled)
    threads = torch.get_num_threads()
    if own_process:
        torch.set_num_threads(settings.threads)
    try:
        return audit_images(model, list(task.items), settings, cancel=cancel)
    finally:
        if own_process:
            torch.set_num_threads(threads)

