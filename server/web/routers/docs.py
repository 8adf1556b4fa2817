"""The JSON API described from its own OpenAPI schema, as a plain offline page at /docs.

FastAPI's stock documentation pages load their scripts from a CDN, which this local tool must not
do; the machine-readable schema stays at /openapi.json.
"""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse

from pellucid import __version__

router = APIRouter(include_in_schema=False)


def _schema_name(ref: dict | None) -> str:
    if not ref:
        return ""
    if "$ref" in ref:
        return ref["$ref"].rsplit("/", 1)[-1]
    if ref.get("type") == "array":
        return "list of " + _schema_name(ref.get("items"))
    return ref.get("type", "")


@router.get("/docs", response_class=HTMLResponse)
def api_docs(request: Request) -> HTMLResponse:
    schema = request.app.openapi()
    operations = []
    for path, item in schema.get("paths", {}).items():
        for verb, op in item.items():
            body = op.get("requestBody", {}).get("content", {})
            body_desc = ", ".join(
                f"{ctype}: {_schema_name(c.get('schema')) or 'object'}" for ctype, c in body.items()
            )
            ok = next((r for code, r in op.get("responses", {}).items() if code.startswith("2")), {})
            ok_schema = ok.get("content", {}).get("application/json", {}).get("schema")
            operations.append({
                "verb": verb.upper(), "path": path, "summary": op.get("summary", ""),
                "tag": (op.get("tags") or [""])[0],
                "params": [
                    {"name": p["name"], "where": p["in"], "required": p.get("required", False),
                     "type": _schema_name(p.get("schema")) or "", "description": p.get("description", "")}
                    for p in op.get("parameters", [])
                ],
                "body": body_desc, "returns": _schema_name(ok_schema),
            })
    components = schema.get("components", {}).get("schemas", {})
    return request.app.state.templates.TemplateResponse(
        request, "api_docs.html",
        {"page": "docs", "version": __version__, "operations": operations, "components": components},
    )
