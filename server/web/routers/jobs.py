"""Attribution maps as jobs: list the methods, start / poll / cancel a job, fetch its result.

A job runs on the workspace's job pool (never on the event loop). Its result id is derived from
(model fingerprint, image sha256, method, validated parameters + target); the finished map is kept
in the store (``core/workbench/``), so asking again for the same map is served at once, and
``/api/results/{id}`` (and the link each result carries) still works after a restart. A job is
bound to the image and model it was started for: its status names them, and its map is stored
under its own image whatever the page shows meanwhile.
"""

from __future__ import annotations

import hashlib
import json
from urllib.parse import quote

import numpy as np
from fastapi import APIRouter, Depends, Query, Request
from fastapi.responses import Response

from pellucid.core.attribution import (
    Normalization,
    check_request,
    compute_attribution,
    faithfulness,
    get_method,
    list_methods,
    rank_methods,
    sanity_check,
)
from pellucid.core.cache import result_key
from pellucid.core.errors import BadParameterError, NotFoundError
from pellucid.core.jobs import Job
from pellucid.core.views import render
from pellucid.core.workbench import costs, reading
from pellucid.core.workbench.durable import overlay_thumbnail
from pellucid.web.deps import get_workspace
from pellucid.web.job_listing import job_list
from pellucid.web.routers._media import data_url, rounded_rows
from pellucid.web.schemas import (
    CAUTION,
    CheckEstimateResponse,
    JobList,
    JobRequest,
    JobStatus,
    MethodList,
    Ranking,
    ResultResponse,
    SharedScale,
)
from pellucid.web.workspace import ResultRecord, Workspace

router = APIRouter(prefix="/api", tags=["attribution"])


@router.get("/methods", response_model=MethodList, summary="The registered attribution methods and their parameters")
def get_methods() -> MethodList:
    methods = list_methods()
    for m in methods:
        if m["name"] == "occlusion":
            from pellucid.core.occlusion.engine import METHODS as ENGINES

            for p in m["params"]:
                if p["name"] == "engine":
                    p["suggestions"] = list(ENGINES)
    return MethodList(methods=methods)


def _result_id(key: tuple) -> str:
    return hashlib.sha256(json.dumps(key).encode()).hexdigest()[:24]


def job_status(job: Job, *, cached: bool = False) -> JobStatus:
    d = job.to_dict()
    meta = job.meta
    seconds_left, left_from = d["seconds_left"], "rate" if d["seconds_left"] is not None else None
    estimate = meta.get("estimate_seconds")
    if seconds_left is None and job.state == "running" and estimate is not None:
        # Before the first unit finishes there is no rate to go by: the estimate less the time spent.
        seconds_left, left_from = max(0.0, estimate - d["elapsed"]), "estimate"
    result_id = meta.get("result_id") if job.state == "done" else None
    link = None
    if meta.get("image"):
        link = f"/image?model={quote(meta.get('model') or '')}&image={meta['image']}"
        if result_id:
            link += f"&map={result_id}"
    return JobStatus(
        id=d["id"], kind=d["kind"], description=d["description"], state=d["state"], done=d["done"],
        total=d["total"], unit=reading.progress_unit(job.kind, phase=meta.get("phase")), fraction=d["fraction"],
        seconds_left=seconds_left, left_from=left_from, estimate_seconds=estimate, elapsed=d["elapsed"],
        error=d["error"], result_id=result_id, cached=cached, lane=d.get("lane") or "interactive",
        created=job.created, model=meta.get("model"), image=meta.get("image"), image_name=meta.get("image_name"),
        method=meta.get("method"), run_id=meta.get("run_id"), phase=meta.get("phase"), link=link,
    )


@router.post("/jobs", response_model=JobStatus, status_code=202,
             summary="Start an attribution map (occlusion or any registered method) as a job")
def start_job(body: JobRequest, request: Request, ws: Workspace = Depends(get_workspace)) -> JobStatus:
    lm = ws.model(body.model)
    method = get_method(body.method)
    # Refused here, as a 4xx, rather than as a failed job: a layer Grad-CAM cannot use, a patch
    # larger than the input (each method's own check, shared with the CLI and the audit).
    params = check_request(method.name, lm.module, lm.input_shape, body.params)
    if params.get("baseline") == "custom":
        raise BadParameterError("baseline 'custom' needs a reference picture, which the JSON API does not take; "
                                "choose another baseline (the Python API takes one as baseline_input)")
    ws.check_job(lm, method.name, params)  # memory and occlusion-grid limits, refused before the job starts
    client = request.client.host if request.client else None
    image = ws.image(body.image)
    prep = ws.prepared(lm, body.image)
    if body.target is None or body.target == "":
        with_target = None
    else:
        with_target = lm.class_index(body.target)
    key = result_key(model=lm.fingerprint, image=image.sha256, method=method.name,
                     params={**params, "target": with_target})
    # The model's name is part of the id: two names may serve the same weights, and a map is listed and
    # linked under the name it was made with.
    rid = _result_id([lm.name, *key])
    description = f"{method.title} · {lm.name} · {image.name}"
    meta = {"result_id": rid, "model": lm.name, "image": image.sha256, "image_name": image.name,
            "method": method.name}
    if ws.has_result(rid):
        job = ws.jobs.submit(method.name, lambda progress, cancel: rid, description=description, meta=meta,
                             client=client)
        return job_status(job, cached=True)
    spec = lm.spec
    normalization = Normalization.of(spec.preprocess.mean, spec.preprocess.std)

    def run(progress, cancel) -> str:
        amap = compute_attribution(
            method.name, lm.module, prep.tensor, target=with_target, params=params,
            output_kind=lm.output_kind, normalization=normalization, progress=progress, cancel=cancel,
        )
        record = ResultRecord(
            id=rid, model=lm.name, fingerprint=lm.fingerprint, image=image.sha256, image_name=image.name,
            method=method.name, title=method.title, target=amap.target, target_label=lm.labels[amap.target],
            amap=amap, display=prep.display,
        )
        # Stored under the image it was computed for, whatever the page shows now.
        ws.keep_result(record, thumbnail=_thumbnail(record))
        return rid

    meta["estimate_seconds"] = ws.job_estimate(lm, method.name, params).seconds
    job = ws.jobs.submit(method.name, run, description=description, meta=meta, client=client)
    return job_status(job)


def _job(ws: Workspace, job_id: str) -> Job:
    job = ws.jobs.get(job_id)
    if job is None:
        raise NotFoundError(f"no job with id {job_id[:24]!r} on this server; start one with POST /api/jobs")
    return job


@router.get("/jobs", response_model=JobList,
            summary="Every job this server holds (maps, checks, audits): what it works on, progress, time left")
def list_jobs(request: Request, ws: Workspace = Depends(get_workspace)) -> JobList:
    return job_list(ws, request.app.state, status_of=job_status)


@router.get("/jobs/{job_id}", response_model=JobStatus, summary="Poll a job: state, progress, time left")
def poll_job(job_id: str, ws: Workspace = Depends(get_workspace)) -> JobStatus:
    return job_status(_job(ws, job_id))


@router.post("/jobs/{job_id}/cancel", response_model=JobStatus, summary="Ask a job to stop")
def cancel_job(job_id: str, ws: Workspace = Depends(get_workspace)) -> JobStatus:
    _job(ws, job_id)
    return job_status(ws.jobs.cancel(job_id))


def _value_label(record: ResultRecord) -> str:
    return reading.map_unit(record.method, record.amap.params, record.target_label)


def _warnings(record: ResultRecord) -> str | None:
    """The method's own warning and, for a map too flat to read, the flat-map sentence."""
    own = record.amap.warning
    flat = reading.flat_map_warning(record.amap.map, method_title=record.title, method=record.method)
    if own and flat and "zero everywhere" in flat:
        flat = None  # the method's own sentence (Grad-CAM's all-zero map) already says so, and why
    return " ".join(w[0].upper() + w[1:] + ("" if w.endswith(".") else ".") for w in (own, flat) if w) or None


def _thumbnail(record: ResultRecord) -> np.ndarray:
    """A small overlay of the map on its input, for the lists of maps (on the map's own scale)."""
    lo, hi = magnitude_range(record.amap.map, signed=record.amap.signed)
    return overlay_thumbnail(record.display, record.amap.map, cmap=_cmap(record), vmin=lo,
                             vmax=hi if hi > lo else lo + 1.0)


def magnitude_range(values: np.ndarray, *, signed: bool) -> tuple[float, float]:
    """The default colour scale: symmetric for signed maps; from zero for maps that are never negative.

    Starting a magnitude map at its own minimum would paint the weakest evidence as if it were zero.
    """
    lo, hi = render.value_range(values, signed=signed)
    if not signed and lo > 0:
        lo = 0.0
    return lo, hi


def _scale(record: ResultRecord, vmin: float | None, vmax: float | None) -> tuple[float, float]:
    lo, hi = magnitude_range(record.amap.map, signed=record.amap.signed)
    lo = lo if vmin is None else vmin
    hi = hi if vmax is None else vmax
    limit = float(np.finfo(np.float32).max)  # maps are float32: a wider scale cannot be drawn
    if not (abs(lo) <= limit and abs(hi) <= limit):
        raise BadParameterError(f"vmin and vmax must be finite numbers within ±{limit:.3g}; "
                                f"received vmin={lo}, vmax={hi}")
    if hi > lo and hi - lo < 1e-36:  # 255 / (vmax - vmin) would overflow float32
        raise BadParameterError(f"vmax − vmin must be at least 1e-36; received vmin={lo}, vmax={hi}")
    if not hi > lo:
        raise BadParameterError(f"the colour scale needs vmin < vmax; received vmin={lo}, vmax={hi}")
    return lo, hi


def _cmap(record: ResultRecord) -> str:
    return render.SIGNED_CMAP if record.amap.signed else render.MAGNITUDE_CMAP


@router.get("/results/{result_id}", response_model=ResultResponse,
            summary="A finished map: picture, map, colour bar with numbers, raw values, engine that ran")
def get_result(
    result_id: str,
    vmin: float | None = Query(None, description="lower end of the colour scale (for a shared scale)"),
    vmax: float | None = Query(None, description="upper end of the colour scale"),
    ws: Workspace = Depends(get_workspace),
) -> ResultResponse:
    record = ws.result(result_id)
    amap = record.amap
    lo, hi = _scale(record, vmin, vmax)
    cmap = _cmap(record)
    coloured = render.colorize(amap.map, cmap=cmap, vmin=lo, vmax=hi)
    label = _value_label(record)
    unit = reading.unit_short(record.method, amap.params)
    extras = {k: v for k, v in amap.extras.items() if isinstance(v, (str, int, float, bool, type(None), list, dict))}
    return ResultResponse(
        id=record.id, link=map_link_of(record), model=record.model, fingerprint=record.fingerprint, image=record.image,
        image_name=record.image_name, method=record.method, title=record.title, target=record.target,
        target_label=record.target_label, target_source=amap.target_source, signed=amap.signed,
        engine=amap.extras.get("engine"), approximate=amap.extras.get("engine") == "approximate",
        params=amap.params, extras=extras, warning=_warnings(record), seconds=amap.seconds,
        n_forwards=amap.n_forwards, n_backwards=amap.n_backwards, value_label=label, unit=unit, vmin=lo, vmax=hi,
        cmap=cmap,
        image_png=data_url(render.encode_png(record.display)), map_png=data_url(render.encode_png(coloured)),
        colorbar=data_url(render.colorbar_png(vmin=lo, vmax=hi, cmap=cmap, label=unit)),
        values=rounded_rows(amap.map, digits=4), caution=CAUTION,
        faithfulness=record.faithfulness, sanity=record.sanity,
    )


def map_link_of(record: ResultRecord) -> str:
    return f"/image?model={quote(record.model)}&image={record.image}&map={record.id}"


@router.get("/results/{result_id}/thumbnail.png", response_class=Response,
            responses={200: {"content": {"image/png": {}}}}, summary="A small picture of a stored map over its image")
def get_thumbnail(result_id: str, ws: Workspace = Depends(get_workspace)) -> Response:
    stored = ws.workbench.get_map(result_id)
    data = ws.workbench.map_thumbnail(stored) if stored is not None else None
    if data is None:
        data = render.encode_png(_thumbnail(ws.result(result_id)))
    return Response(data, media_type="image/png", headers={"Cache-Control": "private, max-age=86400"})


@router.get("/results/{result_id}/overlay.png", response_class=Response,
            responses={200: {"content": {"image/png": {}}}},
            summary="The map blended over the image, as one PNG")
def get_overlay(
    result_id: str,
    opacity: float = Query(0.55, ge=0.0, le=1.0),
    vmin: float | None = Query(None),
    vmax: float | None = Query(None),
    ws: Workspace = Depends(get_workspace),
) -> Response:
    record = ws.result(result_id)
    lo, hi = _scale(record, vmin, vmax)
    picture = render.overlay(record.display, record.amap.map, alpha=opacity, cmap=_cmap(record), vmin=lo, vmax=hi)
    return Response(render.encode_png(picture), media_type="image/png")


@router.get("/scale", response_model=SharedScale, summary="One colour scale shared by several maps")
def shared_scale(results: list[str] = Query(..., description="result ids"),
                 ws: Workspace = Depends(get_workspace)) -> SharedScale:
    records = [ws.result(r) for r in results]
    signed = {r.amap.signed for r in records}
    if len(signed) > 1:
        raise BadParameterError(
            "cannot put a signed map and an unsigned map on one colour scale; compare maps of the same kind"
        )
    is_signed = signed.pop()
    stacked = np.concatenate([r.amap.map.ravel() for r in records])
    lo, hi = magnitude_range(stacked, signed=is_signed)
    return SharedScale(results=list(results), signed=is_signed, vmin=lo, vmax=hi)


def _follow_up(ws: Workspace, result_id: str, kind: str, compute) -> JobStatus:
    """A job that adds ``kind`` (faithfulness or sanity) to a stored result; served at once when present."""
    record = ws.result(result_id)
    meta = {"result_id": record.id, "model": record.model, "image": record.image, "image_name": record.image_name,
            "method": record.method}
    description = f"{kind} of {record.title} · {record.model} · {record.image_name}"
    if getattr(record, kind) is not None:
        return job_status(ws.jobs.submit(kind, lambda progress, cancel: record.id, description=description,
                                         meta=meta), cached=True)
    lm = ws.model(record.model)
    if lm.fingerprint != record.fingerprint:
        raise NotFoundError(f"model {record.model!r} changed since this result was made; compute the map again")
    prep = ws.prepared(lm, record.image)
    meta["estimate_seconds"] = _check_estimate(ws, lm, record, kind).seconds

    def run(progress, cancel) -> str:
        ws.keep_check(record, kind, compute(lm, prep, record, progress, cancel))
        return record.id

    return job_status(ws.jobs.submit(kind, run, description=description, meta=meta))


def _check_estimate(ws: Workspace, lm, record: ResultRecord, kind: str) -> costs.CheckEstimate:
    per_forward = ws.forward_seconds(lm)
    if kind == "faithfulness":
        return costs.faithfulness_estimate(lm.input_shape[1:], seconds_per_forward=per_forward)
    one_map = ws.job_estimate(lm, record.method, dict(record.amap.params))
    return costs.sanity_estimate(lm.module, map_forwards=one_map.forwards, map_seconds=one_map.seconds)


@router.get("/results/{result_id}/estimate", response_model=CheckEstimateResponse,
            summary="What a map's faithfulness score or weight-randomisation check will cost, before it starts")
def estimate_check(result_id: str,
                   check: str = Query(..., description="faithfulness or sanity"),
                   ws: Workspace = Depends(get_workspace)) -> CheckEstimateResponse:
    if check not in ("faithfulness", "sanity"):
        raise BadParameterError(f"check must be 'faithfulness' or 'sanity'; received {check!r}")
    record = ws.result(result_id)
    lm = ws.model(record.model)
    est = _check_estimate(ws, lm, record, check)
    return CheckEstimateResponse(result_id=record.id, check=check, units=est.units, count=est.count,
                                 forwards=est.forwards, seconds=est.seconds,
                                 done=getattr(record, check) is not None)


@router.post("/results/{result_id}/faithfulness", response_model=JobStatus, status_code=202,
             summary="Score a map by its deletion and insertion curves (a job)")
def start_faithfulness(result_id: str, ws: Workspace = Depends(get_workspace)) -> JobStatus:
    def compute(lm, prep, record, progress, cancel) -> dict:
        res = faithfulness(lm.module, prep.tensor, record.amap.map, target=record.target,
                           output_kind=lm.output_kind, progress=progress, cancel=cancel)
        return res.to_dict()

    return _follow_up(ws, result_id, "faithfulness", compute)


@router.post("/results/{result_id}/sanity", response_model=JobStatus, status_code=202,
             summary="Cascading randomisation of the weights: does the map depend on them? (a job)")
def start_sanity(result_id: str, ws: Workspace = Depends(get_workspace)) -> JobStatus:
    def compute(lm, prep, record, progress, cancel) -> dict:
        spec = lm.spec
        res = sanity_check(
            record.method, lm.module, prep.tensor, target=record.target, params=record.amap.params,
            output_kind=lm.output_kind, normalization=Normalization.of(spec.preprocess.mean, spec.preprocess.std),
            progress=progress, cancel=cancel,
        )
        return res.to_dict()

    return _follow_up(ws, result_id, "sanity", compute)


@router.get("/ranking", response_model=Ranking, summary="Rank scored maps of one image and target by faithfulness")
def get_ranking(results: list[str] = Query(..., description="result ids, all scored for faithfulness"),
                ws: Workspace = Depends(get_workspace)) -> Ranking:
    records = [ws.result(r) for r in results]
    if len({(r.fingerprint, r.image, r.target) for r in records}) > 1:
        raise BadParameterError("rank only maps of the same model, image and target class")
    unscored = [r.id for r in records if r.faithfulness is None]
    if unscored:
        raise BadParameterError(f"score these maps for faithfulness first: {', '.join(unscored)}")
    rows = rank_methods({r.id: r.faithfulness for r in records})
    by_id = {r.id: r for r in records}
    for row in rows:
        row["result_id"] = row["method"]
        row["method"] = by_id[row["result_id"]].method
        row["title"] = by_id[row["result_id"]].title
    return Ranking(rows=rows)
