"""Core errors → HTTP responses with a plain sentence, never a traceback."""

from __future__ import annotations

import logging

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from pellucid.core import errors as E

log = logging.getLogger("pellucid.web")

_STATUS: list[tuple[type[E.PellucidError], int]] = [
    (E.ImageTooLargeError, 413),
    (E.ImageDecodeError, 415),
    (E.UnsupportedLayerError, 404),
    (E.BadParameterError, 422),
    (E.SpecError, 422),
    (E.ModelLoadError, 422),
    (E.ModelOutputError, 422),
    (E.DataError, 422),
    (E.StoreError, 503),
    (E.ReportError, 503),
    (E.NotFoundError, 404),
    (E.ConflictError, 409),
    (E.BusyError, 429),
    (E.Cancelled, 409),
]


def status_for(exc: E.PellucidError) -> int:
    for kind, status in _STATUS:
        if isinstance(exc, kind):
            return status
    return 400


def _plain_validation_message(exc: RequestValidationError) -> str:
    parts = []
    for err in exc.errors()[:5]:
        loc = ".".join(str(p) for p in err.get("loc", ()) if p not in ("body", "query", "path"))
        parts.append(f"{loc or 'request'}: {err.get('msg', 'invalid value')}")
    return "invalid request — " + "; ".join(parts)


# What every 4xx body looks like; the OpenAPI schema says so instead of FastAPI's default list of
# validation items (which no response of this app has), so clients and fuzzers read the truth.
ERROR_BODY_SCHEMA = {
    "title": "ErrorBody",
    "type": "object",
    "required": ["detail", "error"],
    "properties": {
        "detail": {"type": "string", "description": "a plain sentence: what was received, what was expected"},
        "error": {"type": "string", "description": "the kind of error, e.g. BadParameterError"},
    },
}


def _document_error_bodies(app: FastAPI) -> None:
    build = app.openapi

    def openapi() -> dict:
        if app.openapi_schema is not None:
            return app.openapi_schema
        schema = build()
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        components["HTTPValidationError"] = ERROR_BODY_SCHEMA
        components["ErrorBody"] = ERROR_BODY_SCHEMA
        components.pop("ValidationError", None)
        ref = {"$ref": "#/components/schemas/ErrorBody"}
        for item in schema.get("paths", {}).values():
            for operation in item.values():
                if isinstance(operation, dict) and "responses" in operation:
                    operation["responses"].setdefault(
                        "4XX", {"description": "Bad input, or nothing found",
                                "content": {"application/json": {"schema": ref}}}
                    )
        return schema

    app.openapi = openapi  # type: ignore[method-assign]


_METHODS = ("GET", "HEAD", "POST", "PUT", "PATCH", "DELETE")


def _allowed_methods(request: Request) -> str:
    """Every method some route fully matches on this path (Starlette names only the first route's)."""
    from starlette.routing import Match

    allowed = []
    for method in _METHODS:
        scope = {**request.scope, "method": method}
        if any(route.matches(scope)[0] == Match.FULL for route in request.app.router.routes):
            allowed.append(method)
    return ", ".join(allowed)


def install_error_handlers(app: FastAPI) -> None:
    _document_error_bodies(app)

    @app.exception_handler(E.PellucidError)
    async def _pellucid(_request: Request, exc: E.PellucidError) -> JSONResponse:
        headers = {"Retry-After": str(exc.retry_after)} if isinstance(exc, E.BusyError) else None
        return JSONResponse({"detail": str(exc), "error": type(exc).__name__}, status_code=status_for(exc),
                            headers=headers)

    @app.exception_handler(RequestValidationError)
    async def _validation(_request: Request, exc: RequestValidationError) -> JSONResponse:
        return JSONResponse({"detail": _plain_validation_message(exc), "error": "ValidationError"}, status_code=422)

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        # Keep the exception's own headers: a 405 must say which methods the path allows (RFC 9110 §15.5.6).
        detail, headers = str(exc.detail), dict(exc.headers or {})
        if exc.status_code == 405:
            allowed = _allowed_methods(request) or headers.get("Allow", "")
            headers["Allow"] = allowed
            detail = f"{request.method} is not allowed on {request.url.path}; use {allowed}"
        return JSONResponse({"detail": detail, "error": "HTTPError"}, status_code=exc.status_code,
                            headers=headers or None)

    @app.exception_handler(Exception)
    async def _unexpected(_request: Request, exc: Exception) -> JSONResponse:
        log.exception("unexpected error")
        return JSONResponse(
            {"detail": f"internal error ({type(exc).__name__}); the server keeps running — see its log",
             "error": "InternalError"},
            status_code=500,
        )
