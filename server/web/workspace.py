"""What a running server holds: the models it may serve, images, jobs and results.

Images and finished maps are durable: they are kept in the store (``--store``, the same data
folder as the audit runs, through ``core/workbench/``), so a link to an image or a map still works
after a restart. Decoded pixels and results are also held in memory, within a byte budget, for
speed; what memory lets go of is read back from the store on the next use.
"""

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
from pellucid.core.audit.store import Store
from pellucid.core.cache import ResultCache
from pellucid.core.confine import resolve_inside as _confined
from pellucid.core.errors import ConflictError, ModelLoadError, NotFoundError, PellucidError
from pellucid.core.jobs import BACKGROUND, INTERACTIVE, JobManager, Lane
from pellucid.core.model.bundled import bundled_specs
from pellucid.core.model.layers import LayerMap, layer_map
from pellucid.core.model.loading import LoadedModel, load_model
from pellucid.core.model.preprocess import IntakeImage, PreparedInput, prepare, read_image
from pellucid.core.model.spec import ModelSpec
from pellucid.core.workbench import StoredImage, StoredMap, Workbench
from pellucid.web.image_cache import ByteBudgetLru, ImageCache, prepared_bytes
from pellucid.web.run_access import RunClaims
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
        self._spec_lock = threading.Lock()
        self._store: Store | None = None
        self._store_lock = threading.Lock()
        # Audit jobs: phase and run id of each (by job id), and the runs a job is resuming now.
        self.audit_live: dict[str, dict] = {}
        self.audit_claims = RunClaims()
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

    def add_spec(self, path: Path) -> ModelSpec:
        """Serve one more model from a spec file (the caller has confined ``path``); 409 for a name in use."""
        spec = ModelSpec.from_toml(path)
        with self._spec_lock:
            if spec.name in self.specs:
                same = self.specs[spec.name].path and Path(self.specs[spec.name].path).resolve() == path.resolve()
                if same:
                    return self.specs[spec.name]
                raise ConflictError(f"a model named {spec.name!r} is already served (from another spec file); "
                                    "give the new spec another name")
            self.specs[spec.name] = spec
        return spec

    @property
    def store(self) -> Store:
        """The data folder's store, opened on first use (StoreError → 503 with its reason)."""
        with self._store_lock:
            if self._store is None:
                self._store = Store(self.settings.data_dir)
            return self._store

    @property
    def workbench(self) -> Workbench:
        return Workbench(self.store)

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

    def add_image(self, image: IntakeImage, data: bytes) -> StoredImage:
        """Keep an image: its file bytes in the store, its decoded pixels in memory within the budget
        (ImageTooLargeError when it alone is over the budget; then nothing is stored)."""
        self._hold(image)
        return self.workbench.put_image(data, image)

    def _hold(self, image: IntakeImage) -> None:
        evicted = self.image_cache.add(image)
        if evicted:
            gone = set(evicted)
            self._prepared.discard_where(lambda key: key[2] in gone)

    def images(self, *, limit: int = 48) -> list[StoredImage]:
        """Stored images, most recently used first."""
        return self.workbench.recent_images(limit=limit)

    def stored_image(self, sha256: str) -> StoredImage:
        found = self.workbench.image(sha256)
        if found is None:
            raise NotFoundError(f"no image with id {sha256[:16]!r} on this server; upload it again")
        return found

    def image(self, sha256: str) -> IntakeImage:
        """The decoded image: from memory, else read back from the store (and held again)."""
        img = self.image_cache.get(sha256)
        if img is not None:
            return img
        stored = self.stored_image(sha256)
        with self.decode_slots:
            img = read_image(self.workbench.image_bytes(stored.sha256), name=stored.name,
                             max_bytes=max(self.settings.max_upload_bytes, 1), max_pixels=self.settings.max_pixels)
        self._hold(img)
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
        """A finished map: from memory, else read back from the store."""
        record = self.cache.get(result_id)
        if record is not None:
            return record
        stored = self.workbench.get_map(result_id)
        if stored is None:
            raise NotFoundError(f"no map with id {result_id[:24]!r} on this server; compute it again")
        record = self._record_of(stored)
        self.cache.put(result_id, record)
        return record

    def has_result(self, result_id: str) -> bool:
        return self.cache.get(result_id) is not None or self.workbench.get_map(result_id) is not None

    def _record_of(self, stored: StoredMap) -> ResultRecord:
        values, display = self.workbench.arrays(stored)
        return ResultRecord(
            id=stored.id, model=stored.model_name, fingerprint=stored.model_fingerprint, image=stored.image,
            image_name=stored.image_name, method=stored.method, title=stored.title, target=stored.target,
            target_label=stored.target_label, amap=stored.attribution_map(values), display=display,
            created=stored.created, faithfulness=stored.checks.get("faithfulness"),
            sanity=stored.checks.get("sanity"))

    def keep_result(self, record: ResultRecord, *, thumbnail: np.ndarray | None = None) -> None:
        """A finished map into the store (durable) and the memory cache."""
        self.workbench.put_map(map_id=record.id, image=record.image, model_name=record.model,
                               model_fingerprint=record.fingerprint, title=record.title,
                               target_label=record.target_label, amap=record.amap, display=record.display,
                               thumbnail=thumbnail)
        self.cache.put(record.id, record)

    def keep_check(self, record: ResultRecord, kind: str, value: dict) -> None:
        """A map's faithfulness or sanity result, with the map in the store and in memory."""
        setattr(record, kind, value)
        self.workbench.set_check(record.id, kind, value)

    def close(self) -> None:
        self.jobs.shutdown()
        with self._store_lock:
            if self._store is not None:
                self._store.close()
