"""What a map will cost before it starts: forwards, seconds on this machine, memory, and the limits."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Depends
from pydantic import BaseModel, ConfigDict, Field

from pellucid.core.attribution import get_method
from pellucid.core.errors import BadParameterError
from pellucid.web.deps import get_workspace
from pellucid.web.workspace import Workspace

router = APIRouter(prefix="/api", tags=["attribution"])


class EstimateRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    model: str | None = Field(None, description="model name; default: the server's first model")
    method: str = Field(description="attribution method, as listed by GET /api/methods")
    params: dict[str, Any] = Field(default_factory=dict)


class EstimateResponse(BaseModel):
    model: str
    method: str
    params: dict[str, Any]
    forwards: float = Field(description="work in forward-pass equivalents (a backward pass counts as two)")
    seconds: float | None = Field(description="forwards × one measured forward on this server; an upper "
                                              "bound for occlusion, whose faster engines skip work")
    positions: int | None = Field(description="occlusion only: patch positions on the model's input")
    batch: int
    peak_bytes: int = Field(description="memory the job's batches need, estimated from the layer map")
    rough: bool = Field(description="true when the model allows no hooks, so memory is a rough guess")
    allowed: bool
    refusal: str | None = Field(description="why the server would refuse this job, with the limit")
    limits: dict[str, int]


@router.post("/estimate", response_model=EstimateResponse,
             summary="Estimate a map's time and memory before starting it, and whether this server allows it")
def post_estimate(body: EstimateRequest, ws: Workspace = Depends(get_workspace)) -> EstimateResponse:
    lm = ws.model(body.model)
    method = get_method(body.method)
    params = method.schema.validate(body.params, method=method.name)
    estimate = ws.job_estimate(lm, method.name, params)
    refusal = None
    try:
        ws.check_job(lm, method.name, params)
    except BadParameterError as exc:
        refusal = str(exc)
    return EstimateResponse(
        model=lm.name, method=method.name, params=params, forwards=estimate.forwards, seconds=estimate.seconds,
        positions=estimate.positions, batch=estimate.batch, peak_bytes=estimate.peak_bytes, rough=estimate.rough,
        allowed=refusal is None, refusal=refusal,
        limits={"max_job_bytes": ws.settings.max_job_memory,
                "max_occlusion_positions": ws.settings.max_occlusion_positions},
    )
