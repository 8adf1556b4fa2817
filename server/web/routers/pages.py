"""HTML pages. Each page is a shell filled by static/*.js from the same JSON API."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.responses import HTMLResponse

from pellucid import __version__
from pellucid.web.deps import get_workspace
from pellucid.web.routers.status import status_payload
from pellucid.web.schemas import CAUTION
from pellucid.web.workspace import Workspace

router = APIRouter(tags=["pages"], include_in_schema=False)


def _page(request: Request, template: str, page: str, ws: Workspace, **extra) -> HTMLResponse:
    context = {
        "page": page,
        "version": __version__,
        "caution": CAUTION,
        "models": list(ws.specs),
        "default_model": next(iter(ws.specs), None),
        "selected_model": request.query_params.get("model") or next(iter(ws.specs), None),
        "has_folder": ws.settings.image_root is not None,
        **extra,
    }
    return request.app.state.templates.TemplateResponse(request, template, context)


@router.get("/", response_class=HTMLResponse)
def status_page(request: Request, ws: Workspace = Depends(get_workspace)) -> HTMLResponse:
    return _page(request, "status.html", "status", ws, status=status_payload(ws))


@router.get("/model", response_class=HTMLResponse)
def model_page(request: Request, ws: Workspace = Depends(get_workspace)) -> HTMLResponse:
    return _page(request, "model.html", "model", ws)


@router.get("/image", response_class=HTMLResponse)
def image_page(request: Request, ws: Workspace = Depends(get_workspace)) -> HTMLResponse:
    return _page(request, "image.html", "image", ws)


@router.get("/compare", response_class=HTMLResponse)
def compare_page(request: Request, ws: Workspace = Depends(get_workspace)) -> HTMLResponse:
    return _page(request, "compare.html", "compare", ws)
