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

import numpy as np
import torch
from PIL import Image

from pellucid.core.attribution import Normalization, compute_attribution
from pellucid.core.audit.measures import measure_map
from pellucid.core.audit.settings import AuditSettings
from pellucid.core.errors import ModelLoadError, PellucidError
from pellucid.core.model.loading import LoadedModel, load_model
from pellucid.core.model.preprocess import prepare, read_image, resize_and_crop
from pellucid.core.model.spec import ModelSpec
from pellucid.core.progress import CancelToken
from pellucid.core.views.predict import check_finite, scores_from_logits

__all__ = ["ImageOutcome", "ShardTask", "audit_image", "object_mask", "process_shard", "worker_model"]

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


def audit_image(model: LoadedModel, item: dict, settings: AuditSettings) -> ImageOutcome:
    """Predict, explain and measure one image; a bad file becomes a 'failed' outcome, not an error."""
    rel, label, sha = item["rel"], item["label"], item["sha256"]

    def failed(reason: str) -> ImageOutcome:
        return ImageOutcome(item["index"], rel, sha, label, "failed", {"reason": reason})

    try:
        data = Path(item["path"]).read_bytes()
    except OSError as exc:
        return failed(f"cannot be read any more ({exc.strerror or exc})")
    if hashlib.sha256(data).hexdigest() != sha:
        return failed("the file changed after the dataset was read (its sha256 differs); start a new run")
    try:
        image = read_image(data, name=rel)
        prepared = prepare(model.spec, image)
        x = prepared.tensor
        with torch.inference_mode():
            logits = model.module(x)
        check_finite(logits)
        probs = scores_from_logits(logits.float(), model.output_kind)[0]
        predicted = int(torch.argmax(probs))
        label_index = model.labels.index(label)
        target = label_index if settings.target == "label" else predicted
        amap = compute_attribution(
            settings.method, model.module, x, target=target, params=settings.params,
            output_kind=model.output_kind, normalization=_normalization(model),
        )
        mask = object_mask(model.spec, image.pil.size, box=item.get("box"), mask_path=item.get("mask"))
    except PellucidError as exc:
        return failed(str(exc))
    measures = measure_map(amap.map, object_mask=mask, layout=settings.regions, tolerance=settings.tolerance)
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
        "signed": bool(amap.signed),
        "map_params": {k: v for k, v in amap.params.items()},
        "map_warning": amap.warning,
        "notes": list(prepared.notes),
    }
    return ImageOutcome(item["index"], rel, sha, label, "done", result, amap.map.astype(np.float32))


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
        out: list[ImageOutcome] = []
        for item in task.items:
            if cancel is not None:
                cancel.raise_if_cancelled()
            out.append(audit_image(model, item, settings))
        return out
    finally:
        if own_process:
            torch.set_num_threads(threads)

