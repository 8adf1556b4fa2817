"""Server settings, injected into the app factory (tests pass their own)."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from pellucid.core.model.preprocess import MAX_IMAGE_BYTES, MAX_IMAGE_PIXELS

MIN_TOKEN_LENGTH = 16
MiB = 1024 * 1024


@dataclass(frozen=True)
class Settings:
    host: str = "127.0.0.1"
    port: int = 8000
    # Spec paths or bundled model names; the first is the default model.
    models: tuple[str, ...] = ("tilenet",)
    include_bundled: bool = True
    image_root: Path | None = None
    # A folder of model spec files (``--models``) the pages may add models from, by file name only.
    models_dir: Path | None = None
    # The store's folder (``--store``): audit runs, their artefacts, generated demo folders.
    data_dir: Path = field(default_factory=lambda: Path(".pellucid"))
    max_upload_bytes: int = MAX_IMAGE_BYTES
    max_pixels: int = MAX_IMAGE_PIXELS
    trust_pickled: bool = False
    # Interactive maps and audits run in separate thread pools (core/jobs.py lanes).
    job_workers: int = 2
    audit_workers: int = 1
    max_queued_jobs: int = 32  # interactive jobs waiting for a thread; more get 429 with Retry-After
    max_queued_audits: int = 4
    max_jobs_per_client: int = 8  # interactive jobs one client may have queued or running
    max_cached_results: int = 128
    # Decoded pixels held for uploaded and opened images, in bytes (least recently used evicted first);
    # the count is only a sanity bound on the list the pages show.
    max_image_memory: int = 512 * MiB
    max_images: int = 1024
    max_prepared_memory: int = 256 * MiB
    # Any request body other than an image upload (JSON), in bytes; larger bodies get 413.
    max_body_bytes: int = 2 * MiB
    # What one job may hold for its batches (estimated from the model's activation sizes), in bytes.
    max_job_memory: int = 2048 * MiB
    # Occlusion grids with more positions are refused; the estimate endpoint says how long one takes.
    max_occlusion_positions: int = 20_000
    # Access token; required (and generated when None) whenever host is not a loopback address.
    token: str | None = None
    # Extra names the Host header may carry on a loopback server without a token (e.g. an /etc/hosts alias).
    allowed_hosts: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.token is not None and len(self.token) < MIN_TOKEN_LENGTH:
            from pellucid.core.errors import BadParameterError

            raise BadParameterError(
                f"the access token must be at least {MIN_TOKEN_LENGTH} characters long (received "
                f"{len(self.token)}); choose a longer one, or leave --token out and Pellucid generates one"
            )
