"""What a running server holds: the models it may serve, recent images, jobs and cached results."""

from __future__ import annotations

import threading
import time
from collections import OrderedDict
from collections.abc import Hashable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pellucid.core.attribution.budget import JobEstimate, JobLimits, check_job, estimate_job, in_flight_bytes
from pellucid.core.cache import ResultCache
from pellucid.core.confine import resolve_inside as _confined
from pellucid.core.errors import ModelLoadError, NotFoundError, PellucidError
from pellucid.core.jobs import BACKGROUND, INTERACTIVE, JobManager, Lane
from pellucid.core.model.bundled import bundled_specs
from pellucid.core.model.layers import LayerMap, layer_map
from pellucid.core.model.loading import LoadedModel, load_model
from pellucid.core.model.preprocess import IntakeImage, PreparedInput, prepare
from pellucid.core.model.spec import ModelSpec
from pellucid.web.image_cache import ByteBudgetLru, ImageCache, prepared_bytes
from pellucid.web.settings import Settings

IMAGE_SUFFIXES = (".png", ".jpg", ".jpeg", ".gif", ".bmp", ".tif", ".tiff", ".webp")


@dataclass
class ResultRecord:
    """A finished attribution map with what produced it (the cache holds these by result id).

    ``amap`` is the core's AttributionMap; ``display`` is the (H, W, 3) uint8 picture the model saw.
    """

    id: str
    model: str
    fingerprint: str
    image: str
    image_name: str
    method: str
    title: str
    target: int
    target_label: str
    amap: Any
    display: np.ndarray
    created: float = field(default_factory=time.time)
    faithfulness: dict | None = None  # deletion / insertion curves and AUCs, once scored
    sanity: dict | None = None  # cascading-randomisation verdict and steps, once checked


class _Lru:
    """A small thread-safe LRU map (prepared inputs, layer maps)."""

    def __init__(self, limit: int) -> None:
        self._data: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()
        self.limit = limit

    def get(self, key: Hashable) -> Any | None:
        with self._lock:
            if key in self._data:
                self._data.move_to_end(key)
                return self._data[key]
            return None

    def put(self, key: Hashable, value: Any) -> None:
        with self._lock:
            self._data[key] = value
            self._data.move_to_end(key)
            while len(self._data) > self.limit:
                self._data.popitem(last=False)


def resolve_inside(root: Path, relative: str) -> Path:
    """``relative`` under ``root`` by the one confinement rule (``core/confine.py``)."""
    return _confined(root, relative, what="the image folder")


class Workspace:
    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.specs: OrderedDict[str, ModelSpec] = OrderedDict()
        self.spec_errors: dict[str, str] = {}
        self._models: dict[str, LoadedModel] = {}
        self._model_lock = threading.Lock()
        self.image_cache = ImageCache(budget_bytes=settings.max_image_memory, max_images=settings.max_images)
        # Decoding holds a whole picture in memory before the budget can judge it: a few at a time.
        self.decode_slots = threading.BoundedSemaphore(2)
        self.jobs = JobManager(lanes=(
            Lane(INTERACTIVE, workers=settings.job_workers, max_queued=settings.max_queued_jobs,
                 max_per_client=settings.max_jobs_per_client),
            # Audits run beside interactive maps, never in front of them, and at a lower priority.
            Lane(BACKGROUND, workers=settings.audit_workers, max_queued=settings.max_queued_audits, nice=10),
        ))
        self.cache = ResultCache(max_entries=settings.max_cached_results)
        self._prepared = ByteBudgetLru(budget_bytes=settings.max_prepared_memory,
                                       max_entries=max(8, settings.max_images), size=prepared_bytes,
                                       what="prepared input")
        self._layer_maps = _Lru(limit=16)
        self._forward_seconds = _Lru(limit=16)
        self._collect_specs()

    def _collect_specs(self) -> None:
        bundled = bundled_specs()
        wanted: list[tuple[str, Path]] = []
        for ref in self.settings.models:
            if ref in bundled:
                wanted.append((ref, bundled[ref]))
            else:
                wanted.append((ref, Path(ref)))
        if self.settings.include_bundled:
            wanted += [(name, path) for name, path in bundled.items()]
        for ref, path in wanted:
            try:
                spec = ModelSpec.from_toml(path)
            except PellucidError as exc:
                self.spec_errors[ref] = str(exc)
                continue
            self.specs.setdefault(spec.name, spec)

    @property
    def default_model(self) -> str:
        if not self.specs:
            raise ModelLoadError("no model spec could be read; start the server with --model SPEC")
        return next(iter(self.specs))

    def model(self, name: str | None = None) -> LoadedModel:
        """The loaded model called ``name`` (default: the first); loads it on first use."""
        name = name or self.default_model
        if name not in self.specs:
            known = ", ".join(self.specs) or "none"
            raise NotFoundError(f"no model named {name!r} on this server; models: {known}")
        with self._model_lock:
            if name not in self._models:
                self._models[name] = load_model(self.specs[name], trust_pickled=self.settings.trust_pickled)
            return self._models[name]

    def loaded(self) -> dict[str, LoadedModel]:
        with self._model_lock:
            return dict(self._models)

    def add_image(self, image: IntakeImage) -> str:
        """Keep a decoded image within the memory budget (raises ImageTooLargeError when it alone is over)."""
        evicted = self.image_cache.add(image)
        if evicted:
            gone = set(evicted)
            self._prepared.discard_where(lambda key: key[2] in gone)
        return image.sha256

    def images(self) -> list[IntakeImage]:
        return self.image_cache.list()

    def image(self, sha256: str) -> IntakeImage:
        img = self.image_cache.get(sha256)
        if img is None:
            raise NotFoundError(
                f"no image with id {sha256[:16]!r} on this server (it may have expired); upload it again"
            )
        return img

    def prepared(self, model: LoadedModel, image_id: str) -> PreparedInput:
        """The image as ``model`` sees it (preprocessed once per model and image)."""
        key = (model.name, model.fingerprint, image_id)
        image = self.image(image_id)  # also a use of the image: it stays among the recently used
        hit = self._prepared.get(key)
        if hit is None:
            hit = prepare(model.spec, image)
            self._prepared.put(key, hit)
        return hit

    def layer_map(self, model: LoadedModel) -> LayerMap:
        """The model's layer map (one dry run per model, then cached)."""
        key = (model.name, model.fingerprint)
        hit = self._layer_maps.get(key)
        if hit is None:
            hit = layer_map(model.module, input_shape=model.input_shape)
            self._layer_maps.put(key, hit)
        return hit

    def forward_seconds(self, model: LoadedModel) -> float:
        """Seconds of one forward pass of ``model`` on this machine (measured once: a batch of 4, best of 3)."""
        key = (model.name, model.fingerprint)
        hit = self._forward_seconds.get(key)
        if hit is None:
            import torch

            x = torch.zeros((4, *model.input_shape))
            best = float("inf")
            with torch.inference_mode():
                model.module(x)  # the first pass pays one-off set-up costs
                for _ in range(3):
                    t0 = time.perf_counter()
                    model.module(x)
                    best = min(best, time.perf_counter() - t0)
            hit = best / 4
            self._forward_seconds.put(key, hit)
        return hit

    def job_estimate(self, model: LoadedModel, method: str, params: dict) -> JobEstimate:
        """Forwards, seconds, memory and positions of a job before it runs (``core/attribution/budget.py``)."""
        lmap = self.layer_map(model) if model.supports_hooks else None
        return estimate_job(method, params, input_shape=model.input_shape,
                            in_flight=in_flight_bytes(lmap, model.input_shape),
                            seconds_per_forward=self.forward_seconds(model))

    def check_job(self, model: LoadedModel, method: str, params: dict) -> JobEstimate:
        """The estimate, or BadParameterError when the job is over this server's limits."""
        estimate = self.job_estimate(model, method, params)
        check_job(estimate, params, JobLimits(max_job_bytes=self.settings.max_job_memory,
                                              max_occlusion_positions=self.settings.max_occlusion_positions))
        return estimate

    def samples_dir(self, name: str) -> Path | None:
        """The demo samples folder shipped beside a model's spec, if it has one."""
        if name not in self.specs:
            known = ", ".join(self.specs) or "none"
            raise NotFoundError(f"no model named {name!r} on this server; models: {known}")
        folder = self.specs[name].base_dir / "samples"
        return folder if folder.is_dir() else None

    def result(self, result_id: str) -> ResultRecord:
        record = self.cache.get(result_id)
        if record is None:
            raise NotFoundError(
                f"no result with id {result_id[:24]!r} on this server (it may have expired); run the method again"
            )
        return record

    def close(self) -> None:
        self.jobs.shutdown()
