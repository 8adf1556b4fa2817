"""Server status: version, models on offer, which are loaded, job counts."""

from __future__ import annotations

import platform

import torch
from fastapi import APIRouter, Depends
from pydantic import BaseModel, Field

from pellucid import __version__
from pellucid.web.deps import get_workspace
from pellucid.web.workspace import Workspace

router = APIRouter(prefix="/api", tags=["status"])


class ModelEntry(BaseModel):
    name: str
    description: str
    spec_path: str | None
    loaded: bool
    fingerprint: str | None


class StatusResponse(BaseModel):
    version: str
    python: str
    torch: str
    threads: int
    default_model: str | None
    models: list[ModelEntry]
    spec_errors: dict[str, str]
    jobs_running: int
    cached_results: int
    job_lanes: dict[str, dict[str, int]] = Field(
        description="per lane (interactive, background): jobs queued and running, workers and limits")
    image_memory: dict[str, int] = Field(description="bytes of decoded images held now, and the budget")


def status_payload(ws: Workspace) -> StatusResponse:
    loaded = ws.loaded()
    return StatusResponse(
        version=__version__,
        python=platform.python_version(),
        torch=torch.__version__,
        threads=torch.get_num_threads(),
        default_model=next(iter(ws.specs), None),
        models=[
            ModelEntry(
                name=name,
                description=spec.description,
                spec_path=str(spec.path) if spec.path else None,
                loaded=name in loaded,
                fingerprint=loaded[name].fingerprint if name in loaded else None,
            )
            for name, spec in ws.specs.items()
        ],
        spec_errors=ws.spec_errors,
        jobs_running=sum(1 for j in ws.jobs.list() if j.state == "running"),
        cached_results=len(ws.cache),
        job_lanes=ws.jobs.counts(),
        image_memory={"used": ws.image_cache.bytes_used, "budget": ws.image_cache.budget_bytes},
    )


@router.get("/status", response_model=StatusResponse, summary="Server status and the models on offer")
def get_status(ws: Workspace = Depends(get_workspace)) -> StatusResponse:
    return status_payload(ws)
