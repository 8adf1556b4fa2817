"""Every job the server holds, as ``GET /api/jobs`` and the jobs panel show it.

A job is described by what it works on (model, image or audit run), its progress in the unit its
work counts (patch positions, masks, path points, maps, images; ``core/workbench/reading.py``),
the time left and where its subject or result is shown. Audit jobs keep their phase and run id in
a live record beside the job (written by the audits router); this module only reads it.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any
from urllib.parse import quote

from pellucid.core.errors import PellucidError
from pellucid.core.jobs import QUEUED, RUNNING, Job
from pellucid.core.workbench.reading import progress_unit
from pellucid.web.schemas import JobList, JobStatus
from pellucid.web.workspace import Workspace

__all__ = ["audit_live_records", "job_list"]


def audit_live_records(ws: Workspace, app_state: Any) -> dict[str, dict]:
    """Phase and run id of each audit job, by job id (the audits router keeps them)."""
    records: dict[str, dict] = {}
    records.update(getattr(app_state, "audit_live", None) or {})
    records.update(getattr(ws, "audit_live", None) or {})
    return records


def _image_link(model: str | None, image: str | None, result_id: str | None) -> str | None:
    if not image:
        return None
    parts = [f"model={quote(model)}"] if model else []
    parts.append(f"image={quote(image)}")
    if result_id:
        parts.append(f"map={quote(result_id)}")
    return "/image?" + "&".join(parts)


def _audit_run(ws: Workspace, app_state: Any, run_id: str | None, cache: dict[str, Any]) -> Any:
    """The stored run an audit job writes (None before it exists, once deleted, or without a store)."""
    if not run_id:
        return None
    if run_id not in cache:
        try:
            store = getattr(app_state, "audit_store", None) or ws.store
            cache[run_id] = store.get_run(run_id)
        except PellucidError:  # deleted meanwhile, or the store cannot open: the job lists without it
            cache[run_id] = None
    return cache[run_id]


def _follow_audit_view(ws: Workspace, job: Job, extra: dict[str, Any], given: dict[str, Any]) -> None:
    """A running audit's unit and time left (this phase's and the later ones'), as the audits page computes them."""
    from pellucid.web.routers.audits import audit_job_view  # the audits page's own rule, not a copy of it

    try:
        view = audit_job_view(ws, job.id)
    except PellucidError:  # ended or forgotten between the two reads
        return
    if view.get("unit"):
        extra["unit"] = view["unit"]
    if view.get("seconds_left") is not None:
        given.pop("seconds_left", None)
        given.pop("left_from", None)
        extra["seconds_left"] = view["seconds_left"]
        extra["left_from"] = "rate" if job.done > 0 else "estimate"


def describe(job: Job, base: JobStatus, *, ws: Workspace, live: dict | None, app_state: Any,
             runs: dict[str, Any]) -> JobStatus:
    """``base`` (the job's own status) with what it works on, its unit and its link filled in.

    Fields the base already carries are kept: the router that started the job knows best.
    """
    extra: dict[str, Any] = {"lane": job.lane, "created": job.created, "started": job.started,
                             "finished": job.finished}
    given = base.model_dump(exclude_unset=True)
    if job.kind == "audit":
        phase = (live or {}).get("phase")
        run_id = (live or {}).get("run_id") or given.get("run_id")
        run = _audit_run(ws, app_state, run_id, runs)
        # The live record is the truth about an audit's phase: it decides what the count counts.
        given.pop("unit", None)
        given.pop("phase", None)
        extra.update(phase=phase, run_id=run_id, unit=progress_unit("audit", phase=phase),
                     model=run.model_name if run is not None else None,
                     link=f"/audits?run={quote(run_id)}" if run_id else None)
        if job.state == RUNNING and live is not None:
            _follow_audit_view(ws, job, extra, given)
        if run is not None and job.state not in (QUEUED, RUNNING):
            # Once it has ended, the stored run says how far it got, in images, whatever phase it ended in.
            for key in ("done", "total", "fraction", "unit"):
                given.pop(key, None)
            extra.update(done=run.done, total=run.total, unit="images",
                         fraction=run.done / run.total if run.total else 0.0)
    else:
        meta = job.meta
        model, image = meta.get("model"), meta.get("image")
        result_id = meta.get("result_id") if job.state == "done" else None
        extra.update(unit=progress_unit(job.kind), model=model, image=image, image_name=meta.get("image_name"),
                     method=meta.get("method"), link=_image_link(model, image, result_id))
    return base.model_copy(update={k: v for k, v in extra.items() if k not in given or given[k] is None})


def job_list(ws: Workspace, app_state: Any, *, status_of: Callable[[Job], JobStatus]) -> JobList:
    """All jobs: queued and running first, then finished ones, newest first within each."""
    live = audit_live_records(ws, app_state)
    runs: dict[str, Any] = {}  # stored runs read for this listing, by id
    jobs = sorted(ws.jobs.list(), key=lambda j: (j.state not in (QUEUED, RUNNING), -j.created))
    rows = [describe(j, status_of(j), ws=ws, live=live.get(j.id), app_state=app_state,
                     runs=runs) for j in jobs]
    return JobList(jobs=rows, active=sum(1 for j in jobs if j.state in (QUEUED, RUNNING)))
