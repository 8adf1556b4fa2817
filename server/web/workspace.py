"""What a running server holds: the models it may serve, recent images, jobs and cached results."""

from __future__ import annotations

import threading
from collections import OrderedDict
from pathlib import Path

from ..core.bundled import bundled_specs
from ..core.cache import ResultCache
from ..core.errors import ModelLoadError, NotFoundError, PellucidError
from ..core.jobs import JobManager
from ..core.models import LoadedModel, load_model
from ..core.preprocess import IntakeImage
from ..core.spec import ModelSpec
from .settings import Settings


class Workspace:
    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.specs: OrderedDict[str, ModelSpec] = OrderedDict()
        self.spec_errors: dict[str, str] = {}
        self._models: dict[str, LoadedModel] = {}
        self._model_lock = threading.Lock()
        self._images: OrderedDict[str, IntakeImage] = OrderedDict()
        self._image_lock = threading.Lock()
        self.jobs = JobManager(workers=settings.job_workers)
        self.cache = ResultCache(max_entries=settings.max_cached_results)
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
        with self._image_lock:
            self._images[image.sha256] = image
            self._images.move_to_end(image.sha256)
            while len(self._images) > self.settings.max_images:
                self._images.popitem(last=False)
        return image.sha256

    def image(self, sha256: str) -> IntakeImage:
        with self._image_lock:
            img = self._images.get(sha256)
        if img is None:
            raise NotFoundError(
                f"no image with id {sha256[:16]!r} on this server (it may have expired); upload it again"
            )
        return img

    def close(self) -> None:
        self.jobs.shutdown()
