"""The FastAPI app factory: pages, JSON API and jobs over one :class:`Workspace`."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates

from pellucid import __version__
from pellucid._resources import resource_dir
from pellucid.web.errors import install_error_handlers
from pellucid.web.security import AccessGuard, Exposure, SecurityMiddleware, is_loopback
from pellucid.web.settings import Settings
from pellucid.web.workspace import Workspace

TEMPLATES_DIR = resource_dir("templates")
STATIC_DIR = resource_dir("static")


def create_app(settings: Settings | None = None) -> FastAPI:
    settings = settings or Settings()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        workspace = Workspace(settings)
        app.state.workspace = workspace
        try:
            yield
        finally:
            workspace.close()

    app = FastAPI(
        title="Pellucid",
        version=__version__,
        description="See why an image classifier makes its calls: kernels, feature maps, attribution maps, audits.",
        lifespan=lifespan,
        docs_url=None,  # the stock pages load scripts from a CDN; routers/docs.py serves an offline one
        redoc_url=None,
    )
    app.state.settings = settings
    # Autoescape on for every template (Jinja2Templates enables it for .html).
    app.state.templates = Jinja2Templates(directory=str(TEMPLATES_DIR))
    app.mount("/static", StaticFiles(directory=str(STATIC_DIR)), name="static")
    install_error_handlers(app)
    # Off loopback every request needs the token; on loopback only when one was given explicitly.
    guard = AccessGuard.create(settings.token) if (settings.token or not is_loopback(settings.host)) else None
    app.state.guard = guard
    from pellucid.web.routers.images import UPLOAD_PATH

    exposure = Exposure.for_server(guard=guard, host=settings.host, extra_hosts=settings.allowed_hosts,
                                   max_body_bytes=settings.max_body_bytes, upload_paths=(UPLOAD_PATH,))
    app.state.exposure = exposure
    app.add_middleware(SecurityMiddleware, exposure=exposure)

    from pellucid.web.routers import docs, estimate, images, inspect, jobs, models, pages, status

    app.include_router(status.router)
    app.include_router(models.router)
    app.include_router(models.specs_router)
    app.include_router(images.router)
    app.include_router(inspect.router)
    app.include_router(jobs.router)
    app.include_router(estimate.router)
    app.include_router(pages.router)
    app.include_router(docs.router)
    from pellucid.web.routers import audits

    app.include_router(audits.router)
    return app
