"""Server settings, injected into the app factory (tests pass their own)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from pellucid.core.model.preprocess import MAX_IMAGE_BYTES, MAX_IMAGE_PIXELS


@dataclass(frozen=True)
class Settings:
    host: str = "127.0.0.1"
    port: int = 8000
    # Spec paths or bundled model names; the first is the default model.
    models: tuple[str, ...] = ("tilenet",)
    include_bundled: bool = True
    image_root: Path | None = None
    data_dir: Path = field(default_factory=lambda: Path(".pellucid"))
    max_upload_bytes: int = MAX_IMAGE_BYTES
    max_pixels: int = MAX_IMAGE_PIXELS
    trust_pickled: bool = False
    job_workers: int = 2
    max_cached_results: int = 128
    max_images: int = 64
    # Access token; required (and generated when None) whenever host is not a loopback address.
    token: str | None = None
