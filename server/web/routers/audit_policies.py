"""Policies and suspect patches over HTTP: list, open for editing, check, save, download, upload.

Thin: the library is :class:`pellucid.core.audit.policy_library.PolicyLibrary` on the server's data
folder, and every policy is checked by the parser ``pellucid audit --policy`` uses, so a bad value is
a 422 with that parser's one sentence. A downloaded policy names its patch by absolute path, so the
file works with ``pellucid audit --policy FILE`` wherever it is saved on this machine.
"""

from __future__ import annotations

import base64
import binascii
from typing import Any

from fastapi import APIRouter, Depends
from fastapi.responses import Response
from pydantic import BaseModel, ConfigDict, Field

from pellucid.core.audit.policy import Policy, policy_keys
from pellucid.core.audit.policy_library import MAX_PATCH_SIDE, PatchInfo, PolicyEntry, PolicyLibrary
from pellucid.core.audit.policy_toml import policy_toml
from pellucid.core.errors import BadParameterError, PellucidError
from pellucid.core.model.bundled import demo_models_dir
from pellucid.web.deps import get_settings
from pellucid.web.routers._media import data_url
from pellucid.web.settings import Settings

api = APIRouter(prefix="/api/audits", tags=["audit policies"])


def library(settings: Settings) -> PolicyLibrary:
    """Saved policies and patches in the data folder, beside the bundled policies."""
    root = demo_models_dir()
    bundled = {p.stem: p for p in sorted(root.glob("*.toml"))} if root.is_dir() else {}
    return PolicyLibrary(settings.data_dir, bundled=bundled)


def get_library(settings: Settings = Depends(get_settings)) -> PolicyLibrary:
    return library(settings)


# -- the editor's form: the TOML tables, with the patch named by its id in the library -----------------


class InjectionForm(BaseModel):
    model_config = ConfigDict(extra="forbid")

    patch_id: str | None = Field(None, description="a stored patch (POST /api/audits/patches)")
    suspect_class: Any = None
    at: Any = None
    seed: Any = None
    limit: Any = None


class AuditForm(BaseModel):
    model_config = ConfigDict(extra="forbid")

    method: Any = None
    params: dict[str, Any] = Field(default_factory=dict)
    target: Any = None


class PolicyForm(BaseModel):
    """A policy as the editor holds it; values are checked by the policy parser, not here."""

    model_config = ConfigDict(extra="forbid")

    name: Any = Field(None, description="the policy's name inside the file (shown with every verdict)")
    description: Any = ""
    thresholds: dict[str, Any] = Field(default_factory=dict)
    classes: dict[str, dict[str, Any]] = Field(default_factory=dict)
    injection: InjectionForm | None = None
    audit: AuditForm | None = None


def _table(form: PolicyForm) -> tuple[dict, str | None]:
    """The TOML-shaped table (no empty values: TOML has no null) and the injection's patch id."""
    data: dict[str, Any] = {}
    if form.name not in (None, ""):
        data["name"] = form.name
    if form.description not in (None, ""):
        data["description"] = form.description
    data["thresholds"] = {k: v for k, v in form.thresholds.items() if v is not None}
    classes = {c: {k: v for k, v in t.items() if v is not None} for c, t in form.classes.items()}
    if any(classes.values()):
        data["classes"] = {c: t for c, t in classes.items() if t}
    patch_id = None
    if form.injection is not None:
        inj = form.injection.model_dump(exclude={"patch_id"})
        data["injection"] = {k: v for k, v in inj.items() if v is not None}
        patch_id = form.injection.patch_id
    if form.audit is not None:
        audit = form.audit.model_dump()
        audit["params"] = {k: v for k, v in audit["params"].items() if v is not None}
        audit = {k: v for k, v in audit.items() if v not in (None, {})}
        if audit:
            data["audit"] = audit
    return data, patch_id


def _form_of(lib: PolicyLibrary, policy: Policy) -> dict:
    """A stored policy as the editor's form; its patch is copied into the library so the form can name it."""
    inj = policy.injection
    patch = lib.adopt_patch(inj.patch) if inj is not None else None
    return {
        "name": policy.name, "description": policy.description, "thresholds": dict(policy.thresholds),
        "classes": {c: dict(t) for c, t in policy.classes.items()},
        "injection": None if inj is None else {
            "patch_id": patch.id, "suspect_class": inj.suspect_class,
            "at": inj.at if isinstance(inj.at, str) else list(inj.at),
            "seed": inj.seed if inj.at == "random" else None, "limit": inj.limit},
        "audit": None if policy.method is None and not policy.params and policy.target is None else {
            "method": policy.method, "params": dict(policy.params), "target": policy.target},
    }, patch


def policy_entry(lib: PolicyLibrary, entry: PolicyEntry) -> dict:
    """One line of the policy list: what the policy checks and what it adds to a run."""
    try:
        p = lib.load(entry.name)
    except PellucidError as exc:
        return {"name": entry.name, "origin": entry.origin, "error": str(exc)}
    inj = p.injection
    return {"name": entry.name, "origin": entry.origin, "title": p.name, "description": p.description,
            "method": p.method, "params": p.params, "target": p.target, "thresholds": p.thresholds,
            "classes": p.classes, "sha256": p.sha256,
            "injection": None if inj is None else {
                "suspect_class": inj.suspect_class, "at": inj.at if isinstance(inj.at, str) else list(inj.at),
                "seed": inj.seed, "limit": inj.limit, "patch": inj.patch.name}}


def _patch_view(lib: PolicyLibrary, patch: PatchInfo) -> dict:
    return {**patch.to_dict(), "png": data_url(patch.path.read_bytes()),
            "url": f"/api/audits/patches/{patch.id}.png"}


def _toml_response(text: str, filename: str) -> Response:
    return Response(text, media_type="application/toml; charset=utf-8",
                    headers={"Content-Disposition": f'attachment; filename="{filename}"'})


# -- endpoints ----------------------------------------------------------------------------------------


@api.get("/policies", summary="Bundled and saved policies, and every key a policy may hold with its meaning")
def list_policies(lib: PolicyLibrary = Depends(get_library)) -> dict:
    return {"policies": [policy_entry(lib, e) for e in lib.entries()], "keys": policy_keys()}


@api.get("/policies/{name}", summary="A policy as the editor's form (its patch copied into the library)")
def open_policy(name: str, lib: PolicyLibrary = Depends(get_library)) -> dict:
    entry = lib.entry(name)
    form, patch = _form_of(lib, lib.load(name))
    return {"name": entry.name, "origin": entry.origin, "form": form,
            "patch": _patch_view(lib, patch) if patch else None}


@api.post("/policies/check", summary="Check a policy with the parser `pellucid audit --policy` uses; its TOML")
def check_policy(form: PolicyForm, lib: PolicyLibrary = Depends(get_library)) -> dict:
    data, patch_id = _table(form)
    policy = lib.validate(data, patch_id=patch_id)
    text = policy_toml(policy, patch=str(policy.injection.patch.resolve()) if policy.injection else None)
    return {"policy": policy.to_dict(), "toml": text}


@api.put("/policies/{name}", summary="Save a policy to the data folder as NAME.toml (checked first)")
def save_policy(name: str, form: PolicyForm, lib: PolicyLibrary = Depends(get_library)) -> dict:
    data, patch_id = _table(form)
    policy = lib.save(name, data, patch_id=patch_id)
    return {"name": name, "origin": "saved", "path": str(policy.path), "sha256": policy.sha256,
            "entry": policy_entry(lib, lib.entry(name))}


@api.delete("/policies/{name}", summary="Delete a saved policy (bundled ones stay)")
def delete_policy(name: str, lib: PolicyLibrary = Depends(get_library)) -> dict:
    lib.delete(name)
    return {"deleted": name}


@api.get("/policies/{name}/download", summary="Download a policy as TOML for `pellucid audit --policy FILE`")
def download_policy(name: str, lib: PolicyLibrary = Depends(get_library)) -> Response:
    return _toml_response(lib.download(name), f"{lib.entry(name).name}.toml")


class PatchUpload(BaseModel):
    model_config = ConfigDict(extra="forbid")

    png: str = Field(description="the picture as base64 or a data: URL (PNG, JPEG or another format Pillow reads)")
    name: str = Field("patch", max_length=200, description="the file's name, for messages")


@api.post("/patches", summary=f"Store a suspect patch (at most {MAX_PATCH_SIDE} px a side) for injection tests")
def upload_patch(body: PatchUpload, lib: PolicyLibrary = Depends(get_library),
                 settings: Settings = Depends(get_settings)) -> dict:
    raw = body.png.split(",", 1)[1] if body.png.startswith("data:") else body.png
    try:
        data = base64.b64decode(raw, validate=True)
    except (binascii.Error, ValueError):
        raise BadParameterError("the patch must be sent as base64 or a data: URL of a picture file") from None
    name = body.name.replace("\\", "/").rsplit("/", 1)[-1][:120] or "patch"
    return _patch_view(lib, lib.put_patch(data, name=name, max_bytes=settings.max_upload_bytes))


@api.get("/patches", summary="Stored suspect patches, newest first")
def list_patches(lib: PolicyLibrary = Depends(get_library)) -> dict:
    return {"patches": [_patch_view(lib, p) for p in lib.patches()[:48]]}


@api.get("/patches/{patch_id}.png", summary="A stored suspect patch")
def patch_png(patch_id: str, lib: PolicyLibrary = Depends(get_library)) -> Response:
    return Response(lib.patch(patch_id).path.read_bytes(), media_type="image/png")

