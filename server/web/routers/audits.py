"""Folder audits over HTTP: plan one (what it will do, what it will cost), start it as a job, follow
and cancel it, and read the stored runs.

Thin: every computation is :func:`pellucid.core.audit.run_audit` and the store's own queries. The
store is the workspace's (the server's data folder, ``--store``), opened on first use; a data
folder that cannot be used answers 503 with the store's message. Policies and suspect patches are
files in the same data folder (``core/audit/policy_library.py``; their routes are in
``routers/audit_policies.py``).

Datasets come from two places only: the demo tile generator (written into the data folder) or a
folder inside the server's image root, and they are read confined to their folder, so a request
cannot make the server read arbitrary paths; runs whose folder lies elsewhere keep their pictures
to themselves (``web/run_access.py``).
"""

from __future__ import annotations

import base64
import binascii
import os
import tempfile
import threading
import time
from collections import OrderedDict
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import numpy as np
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import HTMLResponse, Response
from pydantic import BaseModel, Field

from pellucid import __version__
from pellucid.core.audit import CAUTION, AuditSettings, GallerySpec, InjectionSpec, crop_patch, load_dataset, run_audit
from pellucid.core.audit.command import audit_command, param_items
from pellucid.core.audit.compare import compare_runs
from pellucid.core.audit.cost import audit_cost
from pellucid.core.audit.dataset import Dataset
from pellucid.core.audit.discovery_phase import CLUSTER_CAUTION, THUMBNAILS
from pellucid.core.audit.phases import phase_unit, phase_words
from pellucid.core.audit.policy import Policy, evaluate_policy, failed_first, gate_of, gate_sentence
from pellucid.core.audit.policy_library import PolicyLibrary
from pellucid.core.audit.preflight import check_audit_inputs
from pellucid.core.audit.runner import stored_inputs
from pellucid.core.audit.sentences import injection_sentence, unreadable_images
from pellucid.core.audit.settings import ConfirmSettings, DiscoverySettings, default_method
from pellucid.core.audit.store import RESUMABLE, RUNNING, Store
from pellucid.core.errors import (
    BadParameterError,
    ConflictError,
    DataError,
    NotFoundError,
    PellucidError,
    StoreError,
)
from pellucid.core.jobs import BACKGROUND
from pellucid.core.model.bundled import bundled_specs, demo_models_dir
from pellucid.core.model.layers import conv_layer_names
from pellucid.core.model.loading import load_model, spec_labels
from pellucid.core.model.preprocess import prepare, read_image
from pellucid.core.model.spec import ModelSpec
from pellucid.core.views import render
from pellucid.web.deps import get_settings, get_workspace
from pellucid.web.routers._media import data_url
from pellucid.web.routers.audit_policies import api as policy_api
from pellucid.web.routers.audit_policies import library, policy_entry
from pellucid.web.run_access import (
    RunClaims,
    demo_folder,
    pictures_refusal,
    require_pictures,
    restore_demo_folder,
)
from pellucid.web.settings import Settings
from pellucid.web.workspace import Workspace, resolve_inside

api = APIRouter(prefix="/api/audits", tags=["audits"])
pages = APIRouter(tags=["pages"], include_in_schema=False)

DEMO_SPLITS = ("clean", "train", "untainted")
DEMO_TAG = "policy-demo-tag.png"
# The folder a re-run command writes summary.json into (any folder will do; this one is named).
RERUN_OUT = "audit-out"
# Above this estimate the page asks before it starts an audit (the same rule as the image page's maps).
CONFIRM_ABOVE_SECONDS = 30.0

# What each phase of the runner counts, so progress reads "12 of 40 images", not "12 of 40".


def get_store(ws: Workspace = Depends(get_workspace)) -> Store:
    """The workspace's store, opened once (StoreError → 503 with the reason)."""
    return ws.store


# -- requests ---------------------------------------------------------------------------------------


class DemoSource(BaseModel):
    kind: Literal["demo"] = "demo"
    split: Literal["clean", "train", "untainted"] = Field("clean", description="which demo split to generate")
    # Generated inside the request (about 3 s for 50 per class on a busy 2-core machine); larger demo
    # folders: `pellucid demo tiles` into the --images folder.
    per_class: int = Field(10, ge=1, le=50, description="tiles per class (larger folders: `pellucid demo tiles` "
                                                        "into the image folder)")
    seed: int = Field(0, ge=0, le=2_147_483_647)


class FolderSource(BaseModel):
    kind: Literal["folder"] = "folder"
    path: str = Field("", description="folder inside the server's image root (class subfolders or manifest.csv)")


class InjectionRequest(BaseModel):
    kind: Literal["demo_tag", "crop", "upload"] = Field(
        description="demo_tag: the demo policy's orange tag; crop: cut from an image of the dataset; upload: a "
                    "patch stored with POST /api/audits/patches (patch_id) or sent inline (patch_png)")
    suspect_class: str
    at: list[int] | Literal["random"] | None = Field(
        None, description="top-left [x, y] in model-input pixels, or \"random\" (a seeded place per image); "
                          "default: the crop's own place")
    seed: int = Field(0, ge=0, le=2_147_483_647, description="with at = \"random\": the places are drawn from it")
    image: str | None = Field(None, description="for crop: the image's path relative to the dataset root")
    box: list[int] | None = Field(None, min_length=4, max_length=4, description="for crop: x0, y0, x1, y1")
    patch_id: str | None = Field(None, description="for upload: a stored patch's id (POST /api/audits/patches)")
    patch_png: str | None = Field(None, description="for upload: the PNG as base64 or a data: URL")
    limit: int | None = Field(None, ge=1, le=100_000)


class AuditRequest(BaseModel):
    model: str | None = None
    source: DemoSource | FolderSource = Field(discriminator="kind")
    method: str | None = Field(None, description="attribution method; default: the policy's [audit] method, else "
                                                 "the audit's default (Grad-CAM, or occlusion for a model without "
                                                 "forward hooks)")
    params: dict[str, Any] = Field(default_factory=dict)
    target: Literal["label", "predicted"] | None = Field(None, description="default: the policy's, else label")
    discovery: bool = Field(True, description="cluster each class's maps and rank the clusters by suspicion")
    confirmation: bool = Field(True, description="test the most suspicious clusters by removal and transplant")
    channel_layer: str | None = Field(None, description="layer whose channels are ranked for suspicious clusters; "
                                                        "default: Grad-CAM's layer")
    injection: InjectionRequest | None = Field(None, description="default: the policy's [injection], if any")
    background_swap: bool = False
    gallery_layer: str | None = None
    gallery_top: int = Field(8, ge=1, le=64)
    policy: str | None = Field(None, description="name of a bundled or saved policy (GET /api/audits/policies)")


# -- planning: one place resolves what a request will do, for the estimate and the start -----------


@dataclass
class _Plan:
    model_name: str
    settings: AuditSettings
    policy: Policy | None
    dataset_path: Path
    dataset: Dataset
    injection: InjectionSpec | None
    gallery: GallerySpec | None
    background_swap: bool
    command: str
    method_source: str  # "request", "policy" or "default"


def _decode_png(text: str) -> bytes:
    raw = text.split(",", 1)[1] if text.startswith("data:") else text
    try:
        return base64.b64decode(raw, validate=True)
    except (binascii.Error, ValueError):
        raise BadParameterError("patch_png must be base64 (or a data: URL) of a PNG picture") from None


def _rgb(path_or_bytes: Path | bytes, name: str | None = None) -> np.ndarray:
    return np.asarray(read_image(path_or_bytes, name=name).pil.convert("RGB"), dtype=np.uint8).copy()


def _at_text(at: Any) -> str | None:
    if at is None:
        return None
    return "random" if at == "random" else f"{int(at[0])},{int(at[1])}"


def _injection(req: InjectionRequest | None, model: Any, dataset_root: Path, policy: Policy | None,
               lib: PolicyLibrary) -> tuple[InjectionSpec | None, dict]:
    """The injection test and the command-line options that give the same one (the same ``source``
    words as ``pellucid audit`` too: they are part of the settings a resumed run must match)."""
    if req is None:
        if policy is None or policy.injection is None:
            return None, {}
        inj = policy.injection  # as `pellucid audit --policy` does when no --inject-… option is given
        if not inj.patch.is_file():
            raise BadParameterError(f"the policy's injection patch {inj.patch.name!r} does not exist")
        return InjectionSpec(patch=_rgb(inj.patch), suspect_class=inj.suspect_class, at=inj.at,
                             source=f"policy patch {inj.patch.name}", limit=inj.limit, seed=inj.seed), {}
    if isinstance(req.at, list) and len(req.at) != 2:
        raise BadParameterError(f"'at' must be two whole numbers [x, y] or \"random\"; received {req.at!r}")
    if req.seed and req.at != "random":
        raise BadParameterError("the injection seed only applies with at = \"random\"")
    at: Any = req.at if req.at == "random" else (tuple(req.at) if req.at else None)
    cli = {"inject_class": req.suspect_class, "inject_limit": req.limit, "inject_seed": req.seed}
    if req.kind == "demo_tag":
        tag = demo_models_dir() / DEMO_TAG
        if not tag.is_file():
            raise NotFoundError(f"the demo tag picture is not installed (demo_models/{DEMO_TAG})")
        at = at or (78, 78)
        spec = InjectionSpec(patch=_rgb(tag), suspect_class=req.suspect_class, at=at,
                             source=f"file {tag.resolve()}", limit=req.limit, seed=req.seed)
        return spec, {**cli, "inject_patch": str(tag.resolve()), "inject_at": _at_text(at)}
    if req.kind == "crop":
        if not req.image or not req.box:
            raise BadParameterError("a cropped patch needs 'image' (path in the dataset) and 'box' [x0, y0, x1, y1]")
        path = resolve_inside(dataset_root, req.image)
        patch = crop_patch(model, path, tuple(req.box))
        spec = InjectionSpec(patch=patch, suspect_class=req.suspect_class, at=at or (req.box[0], req.box[1]),
                             source=f"cut from {path} box {list(req.box)}", limit=req.limit, seed=req.seed)
        return spec, {**cli, "inject_from": str(path), "inject_box": ",".join(str(v) for v in req.box),
                      "inject_at": _at_text(req.at)}
    if req.patch_id:
        stored = lib.patch(req.patch_id)
    elif req.patch_png:  # kept in the library too, so the re-run command can name a file
        stored = lib.put_patch(_decode_png(req.patch_png), name="uploaded patch")
    else:
        raise BadParameterError("an uploaded patch needs 'patch_id' (POST /api/audits/patches) or 'patch_png'")
    if at is None:
        raise BadParameterError("an uploaded patch needs 'at' [x, y] or \"random\": where to paste it")
    spec = InjectionSpec(patch=_rgb(stored.path), suspect_class=req.suspect_class, at=at,
                         source=f"file {stored.path.resolve()}", limit=req.limit, seed=req.seed)
    return spec, {**cli, "inject_patch": str(stored.path.resolve()), "inject_at": _at_text(at)}


def _dataset_path(ws: Workspace, settings: Settings, source: DemoSource | FolderSource) -> Path:
    if isinstance(source, DemoSource):
        return demo_folder(settings, split=source.split, per_class=source.per_class, seed=source.seed,
                           in_use=_in_use(ws))
    if settings.image_root is None:
        raise BadParameterError("this server has no image folder; start it with --images DIR to audit a folder, "
                                "or audit the demo tiles")
    path = resolve_inside(settings.image_root, source.path)
    if not path.is_dir():
        raise BadParameterError(f"{source.path!r} is not a folder inside the image folder")
    return path


# The page plans an audit on every change of its form; reading a folder hashes every file (about 2 s
# per 1,000 images here), so a folder is read again only when a file in it changed.
_DATASETS: OrderedDict[tuple[str, tuple], Dataset] = OrderedDict()
_DATASETS_LOCK = threading.Lock()


def _folder_signature(path: Path) -> tuple:
    """Every file's relative path, size and modification time: what a fresh read could find changed."""
    found = []
    for folder, _, names in os.walk(path):
        for name in names:
            full = os.path.join(folder, name)
            try:
                st = os.stat(full)
            except OSError:
                continue
            found.append((os.path.relpath(full, path), st.st_size, st.st_mtime_ns))
    return tuple(sorted(found))


def _read_folder(path: Path) -> Dataset:
    key = (str(path.resolve()), _folder_signature(path))
    with _DATASETS_LOCK:
        if key in _DATASETS:
            _DATASETS.move_to_end(key)
            return _DATASETS[key]
    dataset = load_dataset(path, confine=True)
    with _DATASETS_LOCK:
        _DATASETS[key] = dataset
        while len(_DATASETS) > 4:
            _DATASETS.popitem(last=False)
    return dataset


def _model_ref(ws: Workspace, name: str) -> str:
    """How the command line names a served model: a bundled name, else the spec file's path."""
    spec = ws.specs[name]
    bundled = bundled_specs().get(name)
    if spec.path is None or (bundled is not None and Path(bundled).resolve() == Path(spec.path).resolve()):
        return name
    return str(Path(spec.path).resolve())


def _plan(body: AuditRequest, ws: Workspace, settings: Settings) -> _Plan:
    """Resolve and check a request as ``pellucid audit`` would; bad input is a 4xx here, before a job or run."""
    name = body.model or ws.default_model
    if name not in ws.specs:
        raise NotFoundError(f"no model named {name!r} on this server; models: {', '.join(ws.specs)}")
    lib = library(settings)
    entry = lib.entry(body.policy) if body.policy else None
    policy = lib.load(body.policy) if body.policy else None
    lm = ws.model(name)
    # The method: the request's, else the policy's [audit] table (with its params), else the default.
    params = dict(body.params)
    if body.method:
        method, source = body.method, "request"
    elif policy is not None and policy.method:
        method, source = policy.method, "policy"
        params = params or dict(policy.params)
    else:
        method, source = default_method(supports_hooks=lm.supports_hooks), "default"
    target = body.target or (policy.target if policy is not None and policy.target else None) or "label"
    audit_settings = AuditSettings(
        method=method, params=params, target=target,
        discovery=DiscoverySettings() if body.discovery else None,
        confirmation=ConfirmSettings() if body.discovery and body.confirmation else None,
        channel_layer=body.channel_layer).validated()
    ws.check_job(lm, audit_settings.method, audit_settings.params)  # per-image memory limits
    dataset_path = _dataset_path(ws, settings, body.source)
    gallery = GallerySpec(layer=body.gallery_layer, top=body.gallery_top) if body.gallery_layer else None
    # Bad input (one class, a class with one image, a patch larger than the input, an unknown suspect
    # class, a layer Grad-CAM cannot use) is a 4xx here, before a job or a stored run exists.
    dataset = _read_folder(dataset_path)
    injection, inject_cli = _injection(body.injection, lm, dataset.root, policy, lib)
    check_audit_inputs(lm, dataset, audit_settings, injection=injection)
    if audit_settings.channel_layer and audit_settings.confirmation is not None:
        from pellucid.core.audit.channels import resolve_layer

        resolve_layer(lm, audit_settings.channel_layer)
    command = audit_command(
        model=_model_ref(ws, name), images=str(Path(dataset.root).resolve()), out=RERUN_OUT,
        policy=str(entry.path.resolve()) if entry else None, method=method, params=param_items(params),
        target=target, store=str(Path(settings.data_dir).resolve()), gallery_layer=body.gallery_layer,
        gallery_top=body.gallery_top, background_swap=body.background_swap, channel_layer=body.channel_layer,
        discovery=body.discovery, confirmation=body.confirmation, **inject_cli)
    return _Plan(model_name=name, settings=audit_settings, policy=policy, dataset_path=dataset_path, dataset=dataset,
                 injection=injection, gallery=gallery, background_swap=body.background_swap, command=command,
                 method_source=source)


def _cost(ws: Workspace, plan: _Plan) -> dict:
    lm = ws.model(plan.model_name)
    per_image = ws.job_estimate(lm, plan.settings.method, plan.settings.params)
    images = len(plan.dataset.items)
    inj = plan.injection
    injected = None
    if inj is not None:
        others = sum(1 for i in plan.dataset.items if i.label != inj.suspect_class)
        injected = min(others, inj.limit) if inj.limit else others
    conf = plan.settings.confirmation
    cost = audit_cost(images=images, forwards_per_image=per_image.forwards,
                      seconds_per_forward=ws.forward_seconds(lm),
                      injection_images=injected,
                      background_swap=plan.background_swap, gallery=plan.gallery is not None,
                      confirm_clusters=conf.max_clusters if conf else 0, confirm_limit=conf.limit if conf else 0)
    return {**cost.to_dict(), "confirm_above": CONFIRM_ABOVE_SECONDS,
            "needs_confirmation": cost.seconds_max > CONFIRM_ABOVE_SECONDS}


def _plan_view(plan: _Plan) -> dict:
    """What the run will do, in the words the page shows."""
    inj = plan.injection
    return {
        "model": plan.model_name, "method": plan.settings.method, "method_source": plan.method_source,
        "params": plan.settings.params, "target": plan.settings.target,
        "images": len(plan.dataset.items), "classes": sorted({i.label for i in plan.dataset.items}),
        "skipped": [{"rel": s.rel, "reason": s.reason} for s in plan.dataset.skipped],
        "folder": str(plan.dataset.root),
        "policy": plan.policy.name if plan.policy else None,
        "injection": {**inj.to_dict(), "from_policy": inj.source.startswith("policy patch")} if inj else None,
        "discovery": plan.settings.discovery is not None, "confirmation": plan.settings.confirmation is not None,
        "background_swap": plan.background_swap, "gallery_layer": plan.gallery.layer if plan.gallery else None,
        "command": plan.command,
    }


# -- jobs -------------------------------------------------------------------------------------------


def _in_use(ws: Workspace) -> set[Path]:
    """Dataset folders of audit jobs still queued or running (never pruned under them)."""
    return {Path(v["root"]) for v in ws.audit_live.values() if v.get("root") and v.get("phase") != "finished"}


def audit_job_view(ws: Workspace, job_id: str) -> dict:
    """An audit job as this page shows it: phase, its unit, time left (the jobs panel lists it the same way)."""
    return _job_view(ws, job_id)


def _job_view(ws: Workspace, job_id: str) -> dict:
    job = ws.jobs.get(job_id)
    live = ws.audit_live.get(job_id)
    if job is None or live is None:
        raise NotFoundError(f"no audit job {job_id!r} on this server (it may have finished long ago)")
    d = job.to_dict()
    d.pop("meta", None)
    phase = live.get("phase") or "queued"
    words, unit = phase_words(phase), phase_unit(phase)
    out = {**d, "phase": phase, "phase_words": words, "unit": unit, "run_id": live.get("run_id"),
           "phase_elapsed": None, "seconds_left": None, "phase_seconds_left": None,
           "phase_number": live.get("phase_number"), "phases_planned": list(live.get("planned", []))}
    # Time left from this phase's own rate (each phase counts its own units); before its first
    # unit is done, from the estimate made when the audit was planned.
    if job.state == "running" and live.get("phase_started"):
        elapsed = time.time() - live["phase_started"]
        out["phase_elapsed"] = elapsed
        estimate = (live.get("estimates") or {}).get(phase)
        if d["total"] and 0 < d["done"]:
            left = elapsed / d["done"] * max(0, d["total"] - d["done"])
        elif estimate is not None and estimate > elapsed:  # past the estimate, "0 s left" would mislead
            left = estimate - elapsed
        else:
            left = None
        out["phase_seconds_left"] = left
        later = live.get("planned", [])[live.get("phase_number") or 0:]
        rest = sum((live.get("estimates") or {}).get(p, 0.0) for p in later)
        out["seconds_left"] = None if left is None else left + rest
    return out


def _run_list_entry(run: Any, settings: Settings, jobs_by_run: dict[str, str]) -> dict:
    s = run.summary or {}
    gate = gate_of(run)
    return {**run.to_dict(with_summary=False), "accuracy": s.get("accuracy"),
            # The same count the run view calls "flagged images" (not the class-region flags).
            "flagged_count": s.get("flagged_count"), "class_flags": len(s.get("class_flags", [])),
            "gate": None if not gate else ("pass" if gate["passed"] else "fail"),
            "gate_sentence": gate_sentence(gate) if gate else None, "job": jobs_by_run.get(run.id),
            "resumable": run.status in RESUMABLE, "pictures": pictures_refusal(run, settings) is None}


def _jobs_by_run(ws: Workspace) -> dict[str, str]:
    """Run id → the id of this server's audit job that is running it now."""
    out = {}
    for job_id, live in ws.audit_live.items():
        job = ws.jobs.get(job_id)
        if live.get("run_id") and job is not None and not job.finished_state:
            out[live["run_id"]] = job_id
    return out


def _launch(request: Request, ws: Workspace, store: Store, *, model_name: str, dataset_path: Path,
            settings: AuditSettings, injection: InjectionSpec | None, background_swap: bool,
            gallery: GallerySpec | None, policy: Policy | None, description: str, command: str | None = None,
            claimed: str | None = None, dataset: Dataset | None = None, estimates: dict | None = None) -> dict:
    spec = ws.specs[model_name]
    planned = ["loading the model", *(() if dataset is not None else ("reading files",)), "images", "summary",
               "pictures"]
    if settings.discovery is not None:
        planned += ["discovery"] + (["confirmation"] if settings.confirmation is not None else [])
    planned += (["injection"] if injection is not None else []) + (["background swap"] if background_swap else [])
    planned += ["gallery", "feature visuals"] if gallery is not None else []
    live: dict[str, Any] = {"phase": "queued", "run_id": None, "root": str(dataset_path), "planned": planned,
                            "estimates": estimates or {}, "phase_number": 0, "phase_started": None}
    claims: RunClaims = ws.audit_claims

    def enter(name: str) -> None:
        live.update(phase=name, phase_started=time.time(),
                    phase_number=planned.index(name) + 1 if name in planned else live["phase_number"])

    def work(progress, cancel):
        try:
            return audit(progress, cancel)
        finally:
            live["phase"] = "finished"
            claims.release(claimed)

    def audit(progress, cancel):
        def phase_progress(done: int, total: int) -> None:
            if live["phase_started"] is None:
                live["phase_started"] = time.time()
            progress(done, total)

        enter("loading the model")
        # A private copy: the audit must not share hooks or thread settings with interactive requests.
        model = load_model(spec, trust_pickled=ws.settings.trust_pickled)
        if dataset is None:
            enter("reading files")
        checked = dataset or load_dataset(dataset_path, confine=True, progress=phase_progress, cancel=cancel)
        outcome = run_audit(
            model, checked, store=store, settings=settings, injection=injection, background_swap=background_swap,
            gallery=gallery, command=command, progress=phase_progress, cancel=cancel,
            on_phase=enter, on_run=lambda run: live.update(run_id=run.id),
        )
        if policy is not None:  # the verdict is stored with the run (store.set_gate), as the CLI does
            store.set_gate(outcome.run.id, evaluate_policy(policy, outcome.summary, labels=model.labels).to_dict())
        live["phase"] = "finished"
        return {"run_id": outcome.run.id}

    try:
        # on_end: a job cancelled while it waits never runs work()'s finally; its claim and folder are freed here.
        job = ws.jobs.submit("audit", work, description=description, lane=BACKGROUND,
                             client=request.client.host if request.client else None,
                             on_end=lambda _job: (live.update(phase="finished"), claims.release(claimed)))
    except PellucidError:
        claims.release(claimed)
        raise
    ws.audit_live[job.id] = live
    return _job_view(ws, job.id)


# -- endpoints ----------------------------------------------------------------------------------------


def _supports_hooks(ws: Workspace, name: str) -> bool:
    """From the loaded model when it is loaded; else TorchScript is the one kind that takes no hooks."""
    loaded = ws.loaded().get(name)
    return loaded.supports_hooks if loaded is not None else ws.specs[name].source.kind != "torchscript"


@api.get("/options", summary="What an audit can be started with: models and their labels, methods, policies")
def options(ws: Workspace = Depends(get_workspace), settings: Settings = Depends(get_settings)) -> dict:
    from pellucid.core.attribution import method_names
    from pellucid.core.audit.policy import policy_keys

    models = []
    for name, spec in ws.specs.items():
        try:
            labels = spec_labels(spec)
        except Exception:  # noqa: BLE001 - a label set that cannot be read offers no suggestions, nothing worse
            labels = []
        entry: dict[str, Any] = {"name": name, "labels": labels,
                                 "default_method": default_method(supports_hooks=_supports_hooks(ws, name)),
                                 "input_size": [spec.input.height, spec.input.width]}
        loaded = ws.loaded().get(name)
        if loaded is not None and loaded.supports_hooks:
            entry["conv_layers"] = conv_layer_names(loaded.module)
        models.append(entry)
    lib = library(settings)
    return {
        "models": models,
        "methods": method_names(),
        "policies": [policy_entry(lib, e) for e in lib.entries()],
        "policy_keys": policy_keys(),
        "demo_splits": list(DEMO_SPLITS),
        "has_folder": settings.image_root is not None,
        "confirm_above": CONFIRM_ABOVE_SECONDS,
        "caution": CAUTION,
    }


@api.get("/layers", summary="Layers a channel gallery can use for a model")
def layers(model: str | None = None, ws: Workspace = Depends(get_workspace)) -> dict:
    lm = ws.model(model)
    if not lm.supports_hooks:
        return {"model": lm.name, "layers": []}
    return {"model": lm.name, "layers": ws.layer_map(lm).leaf_layer_names()}


@api.post("/estimate", summary="What an audit will do and cost before it starts (the same checks as a start)")
def estimate(body: AuditRequest, ws: Workspace = Depends(get_workspace),
             settings: Settings = Depends(get_settings)) -> dict:
    plan = _plan(body, ws, settings)
    return {"plan": _plan_view(plan), "cost": _cost(ws, plan)}


@api.post("", summary="Start an audit as a job (poll /api/audits/jobs/{id})")
def start(body: AuditRequest, request: Request, ws: Workspace = Depends(get_workspace),
          settings: Settings = Depends(get_settings), store: Store = Depends(get_store)) -> dict:
    plan = _plan(body, ws, settings)
    estimates = {p["phase"]: p["seconds"] for p in _cost(ws, plan)["phases"]}
    job = _launch(request, ws, store, model_name=plan.model_name, dataset_path=plan.dataset_path,
                  settings=plan.settings, injection=plan.injection, background_swap=plan.background_swap,
                  gallery=plan.gallery, policy=plan.policy, command=plan.command, dataset=plan.dataset,
                  description=f"audit of {plan.dataset_path.name} with {plan.model_name} ({plan.settings.method})",
                  estimates=estimates)
    return {**job, "command": plan.command}


@api.get("/jobs/{job_id}", summary="Progress of an audit job: phase, counts in the phase's units, time left, run id")
def job_status(job_id: str, ws: Workspace = Depends(get_workspace)) -> dict:
    return _job_view(ws, job_id)


@api.post("/jobs/{job_id}/cancel", summary="Cancel an audit job (its run is kept and can be resumed)")
def cancel(job_id: str, ws: Workspace = Depends(get_workspace)) -> dict:
    _job_view(ws, job_id)
    ws.jobs.cancel(job_id)
    return _job_view(ws, job_id)


@api.get("/runs", summary="Stored audit runs, newest first")
def runs(ws: Workspace = Depends(get_workspace), store: Store = Depends(get_store),
         settings: Settings = Depends(get_settings)) -> dict:
    jobs = _jobs_by_run(ws)
    return {"runs": [_run_list_entry(r, settings, jobs) for r in store.list_runs()]}


@api.get("/runs/{run_id}", summary="One stored run with its settings and summary")
def run_detail(run_id: str, ws: Workspace = Depends(get_workspace), store: Store = Depends(get_store),
               settings: Settings = Depends(get_settings)) -> dict:
    run = store.get_run(run_id)
    out = run.to_dict()
    out["artefacts"] = sorted(store.run_artefacts(run.id))
    out["caution"] = CAUTION
    out["resumable"] = run.status in RESUMABLE
    out["job"] = _jobs_by_run(ws).get(run.id)
    refusal = pictures_refusal(run, settings)
    out["pictures"] = refusal is None
    out["pictures_refusal"] = refusal
    # The verdict stored with the run (failed checks first), the images it could not use, and the
    # injection test's counts in one sentence: the page shows them as they are, for any model.
    gate = gate_of(run)
    out["gate"] = {**gate, "checks": failed_first(gate.get("checks") or []),
                   "sentence": gate_sentence(gate)} if gate else None
    out["unreadable"] = unreadable_images(run.dataset, run.summary)
    inj = (run.summary or {}).get("injection")
    out["injection_sentence"] = injection_sentence(inj) if inj else None
    return out


@api.delete("/runs/{run_id}", summary="Delete a run, its results and artefacts no other run uses (409 while it "
                                      "runs: cancel it first)")
def delete(run_id: str, ws: Workspace = Depends(get_workspace), store: Store = Depends(get_store)) -> dict:
    run = store.get_run(run_id)
    job = _jobs_by_run(ws).get(run.id)
    if job is not None:
        raise ConflictError(f"run {run.id} is still running (audit job {job}); cancel it first, then delete it")
    try:
        removed = store.delete_run(run.id)
    except StoreError as exc:  # running in another process (the command line): a conflict, not a broken store
        if store.get_run(run.id).status == RUNNING:
            raise ConflictError(str(exc)) from None
        raise
    return {"deleted": run.id, "files_removed": removed}


@api.post("/runs/{run_id}/resume", summary="Resume an interrupted, cancelled or failed run as a job (409 while "
                                          "it runs or once it is done)")
def resume(run_id: str, request: Request, ws: Workspace = Depends(get_workspace),
           store: Store = Depends(get_store), server: Settings = Depends(get_settings)) -> dict:
    run = store.get_run(run_id)
    claims: RunClaims = ws.audit_claims
    if run.status not in RESUMABLE:
        raise ConflictError(f"run {run.id} is {run.status}; only interrupted, cancelled or failed runs resume")
    name = next((n for n, s in ws.specs.items() if s.path and str(s.path) == run.model_spec), None)
    if name is None:
        raise NotFoundError(f"run {run.id} used the model spec {run.model_spec!r}, which this server does not offer; "
                            "resume it from the command line instead")
    require_pictures(run, server)  # its images must lie where this server may read
    claims.claim(run.id)  # two quick resumes: the second is a conflict, not a duplicate run
    try:
        run = store.get_run(run.id)
        if run.status not in RESUMABLE:
            raise ConflictError(f"run {run.id} is {run.status}; only interrupted, cancelled or failed runs resume")
        root = Path(run.dataset_root)
        if not root.is_dir():
            restore_demo_folder(server, root, in_use=_in_use(ws))
        dataset = load_dataset(root, confine=True)
        if dataset.hash != run.dataset_hash:
            raise DataError(f"the folder {str(root)!r} changed since run {run.id} started (its hash differs); "
                            "start a new audit")
        settings, injection, gallery, swap = stored_inputs(store, run)
        return _launch(request, ws, store, model_name=name, dataset_path=root, settings=settings,
                       injection=injection, background_swap=swap, gallery=gallery, policy=None,
                       description=f"resume of run {run.id}", claimed=run.id, dataset=dataset)
    except BaseException:
        claims.release(run.id)
        raise


def _finished(store: Store, run_id: str) -> Any:
    run = store.get_run(run_id)
    if not run.summary:
        raise BadParameterError(f"run {run.id} is {run.status} and has no summary yet")
    return run


@api.get("/runs/{run_id}/flagged", summary="Flagged images, most suspect first, with picture and overlay")
def flagged(run_id: str, limit: int = Query(24, ge=1, le=100), store: Store = Depends(get_store),
            settings: Settings = Depends(get_settings)) -> dict:
    run = _finished(store, run_id)
    require_pictures(run, settings)
    arts = store.run_artefacts(run.id)
    out = []
    for entry in run.summary["flagged_images"][:limit]:
        pics = {}
        for kind in ("image", "overlay"):
            digest = arts.get(f"flagged/{entry['rel']}/{kind}")
            pics[kind] = data_url(store.get_bytes(digest)) if digest else None
        out.append({**entry, **pics})
    return {"run_id": run.id, "flagged_count": run.summary["flagged_count"], "images": out, "caution": CAUTION}


@api.get("/runs/{run_id}/image", summary="One image of a run: its result, picture and overlay")
def image(run_id: str, rel: str = Query(..., description="path relative to the dataset root"),
          store: Store = Depends(get_store), settings: Settings = Depends(get_settings)) -> dict:
    run = _finished(store, run_id)
    require_pictures(run, settings)
    row = store.result(run.id, rel)
    out: dict[str, Any] = {"rel": row.rel, "label": row.label, "status": row.status, "result": row.data}
    if row.status == "done" and row.map_hash and run.model_spec:
        spec = ModelSpec.from_toml(run.model_spec)
        root = Path(run.dataset["allowed_root"])
        if not root.is_dir():
            restore_demo_folder(settings, root)
        path = resolve_inside(root, rel)
        display = prepare(spec, read_image(path)).display
        amap = store.get_array(row.map_hash)
        signed = bool(row.data.get("signed"))
        lo, hi = render.value_range(amap, signed=signed)
        cmap = render.SIGNED_CMAP if signed else render.MAGNITUDE_CMAP
        out["image"] = data_url(render.encode_png(display))
        out["overlay"] = data_url(render.encode_png(render.overlay(display, amap, cmap=cmap, vmin=lo, vmax=hi)))
        out["scale"] = {"vmin": lo, "vmax": hi, "cmap": cmap,
                        "colorbar": data_url(render.colorbar_png(vmin=lo, vmax=hi, cmap=cmap, label="evidence"))}
    return out


@api.get("/runs/{run_id}/mean-maps", summary="Per-class mean evidence maps on one shared colour scale")
def mean_maps(run_id: str, store: Store = Depends(get_store)) -> dict:
    run = _finished(store, run_id)
    maps = {c: store.get_array(h) for c, h in run.summary.get("mean_maps", {}).items()}
    vmax = max((float(m.max()) for m in maps.values()), default=1.0) or 1.0
    cmap = render.MAGNITUDE_CMAP
    return {
        "scale": {"vmin": 0.0, "vmax": vmax, "cmap": cmap, "meaning": "1 = as much evidence as a uniform map",
                  "colorbar": data_url(render.colorbar_png(vmin=0.0, vmax=vmax, cmap=cmap, label="mean evidence"))},
        "maps": [{"class": c, "png": data_url(render.map_png(m, signed=False, vmin=0.0, vmax=vmax, upscale=2))}
                 for c, m in maps.items()],
    }


@api.get("/runs/{run_id}/artefact", summary="A stored PNG of a run (injection examples, feature visuals)")
def artefact(run_id: str, name: str = Query(...), store: Store = Depends(get_store),
             settings: Settings = Depends(get_settings)) -> Response:
    run = store.get_run(run_id)
    require_pictures(run, settings)
    digest = store.run_artefacts(run.id).get(name)
    if digest is None or not name.startswith(("injection/", "swap/", "gallery/visual/", "flagged/")):
        raise NotFoundError(f"run {run.id} has no picture called {name!r}")
    return Response(store.get_bytes(digest), media_type="image/png")


@api.get("/runs/{run_id}/gallery", summary="The channel response gallery of a run, as pictures")
def gallery(run_id: str, channels: int = Query(8, ge=1, le=256), store: Store = Depends(get_store),
            settings: Settings = Depends(get_settings)) -> dict:
    run = _finished(store, run_id)
    require_pictures(run, settings)
    g = run.summary.get("gallery")
    if not g:
        raise NotFoundError(f"run {run.id} has no channel gallery; start an audit with a gallery layer")
    arts = store.run_artefacts(run.id)
    patches = store.get_array(arts["gallery/patches"])
    out = []
    for c in g["most_selective"][:channels]:
        visual = arts.get(f"gallery/visual/{c}")
        out.append({
            "channel": c, "selectivity": g["selectivity"][c], "preferred_class": g["preferred_class"][c],
            "class_means": dict(zip(g["classes"], g["class_means"][c])),
            "patches": [{"png": data_url(render.encode_png(render.upscale_nearest(patches[c, n], 2))), **e}
                        for n, e in enumerate(g["entries"][c])],
            "visual": data_url(store.get_bytes(visual)) if visual else None,
        })
    return {"layer": g["layer"], "rf_size": g["rf_size"], "kernel_layer": g["kernel_layer"], "channels": out,
            "caution": "A synthetic picture shows what excites a channel, not what it responds to in these images."}


@api.get("/runs/{run_id}/discovery", summary="Clusters of each class's maps, most suspicious first, with "
                                             "pictures and the confirmation tests")
def discovery(run_id: str, clusters: int = Query(12, ge=1, le=200), store: Store = Depends(get_store),
              settings: Settings = Depends(get_settings)) -> dict:
    run = _finished(store, run_id)
    refusal = pictures_refusal(run, settings)  # numbers always; the images' pictures only where allowed
    d = run.summary.get("discovery")
    if not d:
        raise NotFoundError(f"run {run.id} ran no discovery; start an audit with discovery on (the default)")
    arts = store.run_artefacts(run.id)
    conf = run.summary.get("confirmation") or {}
    tested = {t["cluster"]: t for t in conf.get("tested", [])}
    by_key = {c["key"]: c for cd in d["classes"] for c in cd["clusters"]}
    ranked = [by_key[k] for k in d["ranking"] if k in by_key][:clusters]
    means = {c["key"]: store.get_array(arts[f"discovery/{c['key']}/mean"]) for c in ranked
             if f"discovery/{c['key']}/mean" in arts}
    vmax = max((float(m.max()) for m in means.values()), default=1.0) or 1.0
    cmap = render.MAGNITUDE_CMAP

    def png(name: str) -> str | None:
        digest = arts.get(name)
        return data_url(store.get_bytes(digest)) if digest and refusal is None else None

    out = []
    for c in ranked:
        key = c["key"]
        entry = {**c, "mean_png": (data_url(render.map_png(means[key], signed=False, vmin=0.0, vmax=vmax, upscale=2))
                                   if key in means else None),
                 "thumbnails": [{"rel": rel, "png": png(f"discovery/{key}/member/{n}")}
                                for n, rel in enumerate(c["members"][:THUMBNAILS])],
                 "confirmation": tested.get(key)}
        if key in tested:
            entry["pictures"] = {k: png(f"confirm/{key}/{k}") for k in ("patch", "region", "before", "after")}
        out.append(entry)
    return {
        "run_id": run.id, "method": d.get("method"), "settings": d.get("settings"),
        "classes": [{k: cd[k] for k in ("class", "images", "clustered", "count", "note")} for cd in d["classes"]],
        "clusters": out, "total_clusters": len(by_key),
        "confirmation": {k: conf.get(k) for k in ("settings", "candidates", "confirmed", "confirmed_clusters",
                                                  "channel_layer", "channel_note")} if conf else None,
        "scale": {"vmin": 0.0, "vmax": vmax, "cmap": cmap, "meaning": "1 = as much evidence as an even spread",
                  "colorbar": data_url(render.colorbar_png(vmin=0.0, vmax=vmax, cmap=cmap, label="mean evidence"))},
        "pictures_note": refusal, "caution": CLUSTER_CAUTION,
    }


@api.get("/compare", summary="Differences between two stored runs")
def compare(first: str, second: str, store: Store = Depends(get_store)) -> dict:
    return compare_runs(store, first, second)


def _report_file(store: Store, run_id: str, kind: str, settings: Settings, paper: str = "a4") -> Response:
    from pellucid.core.audit.report import write_report

    run = store.get_run(run_id)
    require_pictures(run, settings)  # a report carries the run's pictures
    # The same files as `pellucid report RUN --paper …`: the PDF is the HTML printed.
    with tempfile.TemporaryDirectory(prefix="pellucid-report-") as tmp:
        files = write_report(store, run.id, tmp, pdf=(kind == "pdf"), paper=paper)
        data = files[-1].read_bytes()
    media = "text/html; charset=utf-8" if kind == "html" else "application/pdf"
    stamp = time.strftime("%Y%m%d", time.gmtime())
    return Response(data, media_type=media,
                    headers={"Content-Disposition": f'attachment; filename="pellucid-audit-{run.id}-{stamp}.{kind}"'})


@api.get("/runs/{run_id}/report.html", summary="Download the run's self-contained HTML report")
def report_html(run_id: str, paper: Literal["a4", "letter"] = "a4", store: Store = Depends(get_store),
                settings: Settings = Depends(get_settings)) -> Response:
    return _report_file(store, run_id, "html", settings, paper)


@api.get("/runs/{run_id}/report.pdf", summary="Download the run's PDF report")
def report_pdf(run_id: str, paper: Literal["a4", "letter"] = "a4", store: Store = Depends(get_store),
               settings: Settings = Depends(get_settings)) -> Response:
    return _report_file(store, run_id, "pdf", settings, paper)


@pages.get("/audits", response_class=HTMLResponse)
def audits_page(request: Request, ws: Workspace = Depends(get_workspace),
                settings: Settings = Depends(get_settings)) -> HTMLResponse:
    context = {
        "page": "audits", "version": __version__, "caution": CAUTION, "models": list(ws.specs),
        "selected_model": request.query_params.get("model") or next(iter(ws.specs), None),
        "has_folder": settings.image_root is not None,
        "demo_splits": DEMO_SPLITS,
    }
    return request.app.state.templates.TemplateResponse(request, "audits.html", context)


# One router for the app to mount: the JSON API, the policy library's API and the page.
router = APIRouter()
router.include_router(api)
router.include_router(policy_api)
router.include_router(pages)
