"""HTML pages. Each page is a template filled from the same core calls the JSON API makes."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.responses import HTMLResponse

from ..deps import get_workspace
from ..workspace import Workspace
from .status import status_payload

router = APIRouter(tags=["pages"], include_in_schema=False)


@router.get("/", response_class=HTMLResponse)
def status_page(request: Request, ws: Workspace = Depends(get_workspace)) -> HTMLResponse:
    return request.app.state.templates.TemplateResponse(
        request, "status.html", {"status": status_payload(ws), "page": "status"}
    )
