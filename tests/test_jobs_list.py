"""GET /api/jobs: every job the server holds (maps, checks, audits), in real units, with links; cancel
through the one endpoint the jobs panel uses, for every kind; time left measured per phase."""

from __future__ import annotations

import time

import pytest
from _slow_model import slow_down, write_slow_spec
from conftest import png_bytes, synthetic_tile
from fastapi.testclient import TestClient

from pellucid.core.jobs import RUNNING, Job, JobManager
from pellucid.web.app import create_app
from pellucid.web.settings import Settings

FINISHED = ("done", "failed", "cancelled")


@pytest.fixture(scope="module")
def slow_client(tmp_path_factory: pytest.TempPathFactory):
    root = tmp_path_factory.mktemp("joblist")
    spec = write_slow_spec(root / "slowtile")
    settings = Settings(models=(str(spec),), include_bundled=False, data_dir=root / "data", job_workers=2)
    with TestClient(create_app(settings)) as c:
        yield c
    slow_down(0)


def _upload(client: TestClient, seed: int = 3) -> dict:
    r = client.post("/api/images", files={"file": (f"tile-{seed}.png", png_bytes(synthetic_tile(seed=seed)),
                                                    "image/png")})
    assert r.status_code == 200, r.text
    return r.json()


def _listed(client: TestClient, job_id: str) -> dict:
    body = client.get("/api/jobs").json()
    found = [j for j in body["jobs"] if j["id"] == job_id]
    assert len(found) == 1, body
    return found[0]


def _until(client: TestClient, job_id: str, test, timeout: float = 120.0) -> dict:
    deadline = time.time() + timeout
    while True:
        row = _listed(client, job_id)
        if test(row):
            return row
        assert time.time() < deadline, row
        time.sleep(0.05)


def test_an_empty_server_lists_no_jobs(slow_client: TestClient) -> None:
    body = slow_client.get("/api/jobs")
    assert body.status_code == 200
    assert set(body.json()) == {"jobs", "active"}


def test_a_map_job_is_listed_in_patch_positions_with_its_image_and_a_link(slow_client: TestClient) -> None:
    image = _upload(slow_client)
    started = slow_client.post("/api/jobs", json={"image": image["id"], "method": "occlusion",
                                                  "params": {"patch": 8, "stride": 8, "engine": "batched"}})
    assert started.status_code == 202, started.text
    row = _until(slow_client, started.json()["id"], lambda r: r["state"] in FINISHED)
    assert row["state"] == "done"
    assert row["kind"] == "occlusion" and row["unit"] == "patch positions"
    # 32 px input, 8 px patch, stride 8: (32 - 8) / 8 + 1 = 4 positions per side, 16 in all
    # (the sliding-window count; common practice, no source).
    assert row["total"] == 16 and row["done"] == 16
    assert row["model"] == "slowtile" and row["image"] == image["id"] and row["image_name"] == image["name"]
    assert row["started"] is not None and row["finished"] >= row["started"] >= row["created"]
    result = row["result_id"]
    assert row["link"] == f"/image?model=slowtile&image={image['id']}&map={result}"


def test_sanity_check_is_listed_in_maps_and_cancelled_promptly(slow_client: TestClient) -> None:
    image = _upload(slow_client, seed=4)
    first = slow_client.post("/api/jobs", json={"image": image["id"], "method": "gradcam"}).json()
    done = _until(slow_client, first["id"], lambda r: r["state"] in FINISHED)
    assert done["state"] == "done"
    slow_down(1.0)  # a second per map: the check is caught running, and stops within one map
    try:
        check = slow_client.post(f"/api/results/{done['result_id']}/sanity")
        assert check.status_code == 202, check.text
        job_id = check.json()["id"]
        row = _until(slow_client, job_id, lambda r: r["state"] == "running" and r["total"] > 0)
        assert row["kind"] == "sanity" and row["unit"] == "maps" and row["model"] == "slowtile"
        assert slow_client.get("/api/jobs").json()["active"] >= 1
        cancelled = slow_client.post(f"/api/jobs/{job_id}/cancel")
        assert cancelled.status_code == 200
        row = _until(slow_client, job_id, lambda r: r["state"] in FINISHED)
    finally:
        slow_down(0)
    assert row["state"] == "cancelled" and row["done"] < row["total"]
    # Nothing was kept with the map: the check can be started again.
    assert slow_client.get(f"/api/results/{done['result_id']}").json()["sanity"] is None


def test_an_audit_is_listed_with_its_run_and_cancelled_in_the_store(slow_client: TestClient) -> None:
    slow_down(0.05)
    try:
        started = slow_client.post("/api/audits", json={
            "source": {"kind": "demo", "split": "clean", "per_class": 10, "seed": 3}, "method": "gradcam",
            "discovery": False})
        assert started.status_code == 200, started.text
        job_id = started.json()["id"]
        row = _until(slow_client, job_id, lambda r: r["phase"] == "images" and r["done"] > 0)
        assert row["kind"] == "audit" and row["lane"] == "background" and row["unit"] == "images"
        assert row["total"] == 40  # 10 tiles for each of the 4 classes
        assert row["seconds_left"] is not None and row["left_from"] == "rate"  # as the audits page says
        assert row["model"] == "slowtile" and row["link"] == f"/audits?run={row['run_id']}"
        assert slow_client.post(f"/api/jobs/{job_id}/cancel").status_code == 200  # the panel's endpoint
        row = _until(slow_client, job_id, lambda r: r["state"] in FINISHED)
    finally:
        slow_down(0)
    assert row["state"] == "cancelled"
    run = slow_client.get(f"/api/audits/runs/{row['run_id']}").json()
    assert run["status"] == "cancelled" and run["done"] < 40
    # Once ended, the listing counts what the stored run holds, in images, whatever phase it stopped in.
    assert (row["done"], row["total"], row["unit"]) == (run["done"], 40, "images")


def test_unknown_job_cannot_be_cancelled(slow_client: TestClient) -> None:
    r = slow_client.post("/api/jobs/nosuchjob/cancel")
    assert r.status_code == 404 and "no job" in r.json()["detail"]


def test_time_left_is_measured_per_phase(monkeypatch: pytest.MonkeyPatch) -> None:
    clock = [1000.0]
    monkeypatch.setattr("pellucid.core.jobs.time.time", lambda: clock[0])
    job = Job(id="x", kind="audit", description="")
    job.state, job.started, job._rate_from = RUNNING, 1000.0, (1000.0, 0)
    clock[0] = 1100.0  # 100 s reading 10 files
    job.report(10, 10)
    job.report(0, 40)  # a new phase: 40 images
    clock[0] = 1110.0
    job.report(10, 40)  # 10 images in 10 s: 30 more take 30 s, whatever the files took
    assert job.seconds_left == pytest.approx(30.0)
    job.report(20, 40)
    assert job.seconds_left == pytest.approx(10.0 / 20 * 20)


def test_work_that_finished_before_a_late_cancel_is_done() -> None:
    manager = JobManager(workers=1)
    try:
        def work(progress, cancel):
            cancel.cancel()  # the cancel arrives after the last check: the result exists
            return "kept"

        job = manager.wait(manager.submit("demo", work).id, timeout=10)
        assert job.state == "done" and job.result == "kept"
    finally:
        manager.shutdown()


def test_the_jobs_list_is_in_the_api_description(slow_client: TestClient) -> None:
    paths = slow_client.get("/openapi.json").json()["paths"]
    assert "get" in paths["/api/jobs"] and "post" in paths["/api/jobs"]


def test_cancel_reaches_the_occlusion_engine_choice() -> None:
    """A cancel that arrives while occlusion's 'auto' engine is being chosen (a sanity check's later
    maps on a large model spend seconds there) stops the map before any occluded copy is evaluated."""
    import torch

    from pellucid.core.errors import Cancelled
    from pellucid.core.occlusion.engine import occlusion_map
    from pellucid.core.progress import CancelToken

    torch.manual_seed(0)
    model = torch.nn.Sequential(
        torch.nn.Conv2d(3, 8, 3, padding=1), torch.nn.ReLU(), torch.nn.Conv2d(8, 8, 3, padding=1), torch.nn.ReLU(),
        torch.nn.AdaptiveAvgPool2d(1), torch.nn.Flatten(), torch.nn.Linear(8, 4)).eval()
    x = torch.rand(1, 3, 64, 64)
    token, calls = CancelToken(), []

    def cancel_after_the_clean_pass(_module, _inputs, _output) -> None:
        calls.append(1)
        token.cancel()  # the clean image's forward has run: from now on the map is unwanted

    model.register_forward_hook(cancel_after_the_clean_pass)
    with pytest.raises(Cancelled):
        occlusion_map(model, x, patch=8, stride=2, method="auto", cancel=token)
    assert len(calls) == 1  # no occluded copy went through the model after the cancel


def test_on_end_runs_once_also_for_a_job_cancelled_while_it_waited() -> None:
    """A job cancelled in the queue never runs its function (nor that function's ``finally``): what it
    holds (an audit's claim on the run it resumes) is released by ``on_end``."""
    import threading

    manager = JobManager(workers=1)
    gate, ended = threading.Event(), []
    try:
        first = manager.submit("audit", lambda progress, cancel: gate.wait(10), on_end=lambda j: ended.append(j.id))
        waiting = manager.submit("audit", lambda progress, cancel: "never", on_end=lambda j: ended.append(j.id))
        assert waiting.state == "queued"
        manager.cancel(waiting.id)
        manager.cancel(waiting.id)  # twice: still one clean-up
        assert ended == [waiting.id] and waiting.state == "cancelled"
        gate.set()
        manager.wait(first.id, timeout=10)
        deadline = time.time() + 10
        while len(ended) < 2 and time.time() < deadline:
            time.sleep(0.01)
        assert ended == [waiting.id, first.id]
    finally:
        gate.set()
        manager.shutdown()


def test_a_resume_cancelled_while_it_waits_leaves_the_run_resumable(slow_client: TestClient) -> None:
    source = {"kind": "demo", "split": "clean", "per_class": 10}
    body = {"method": "gradcam", "discovery": False}
    slow_down(0.05)
    try:
        first = slow_client.post("/api/audits", json={**body, "source": {**source, "seed": 7}}).json()
        _until(slow_client, first["id"], lambda r: r["phase"] == "images" and r["done"] > 0)
        slow_client.post(f"/api/jobs/{first['id']}/cancel")
        run_id = _until(slow_client, first["id"], lambda r: r["state"] in FINISHED)["run_id"]
        slow_down(0.3)  # the one audit worker is now held by another audit
        busy = slow_client.post("/api/audits", json={**body, "source": {**source, "seed": 8}}).json()
        _until(slow_client, busy["id"], lambda r: r["state"] == "running")
        resumed = slow_client.post(f"/api/audits/runs/{run_id}/resume")
        assert resumed.status_code == 200, resumed.text
        assert _listed(slow_client, resumed.json()["id"])["state"] == "queued"
        slow_client.post(f"/api/jobs/{resumed.json()['id']}/cancel")
        assert _listed(slow_client, resumed.json()["id"])["state"] == "cancelled"
        slow_client.post(f"/api/jobs/{busy['id']}/cancel")
        _until(slow_client, busy["id"], lambda r: r["state"] in FINISHED)
    finally:
        slow_down(0)
    again = slow_client.post(f"/api/audits/runs/{run_id}/resume")  # the waiting job's claim was released
    assert again.status_code == 200, again.text
    done = _until(slow_client, again.json()["id"], lambda r: r["state"] in FINISHED)
    assert done["state"] == "done" and done["run_id"] == run_id
