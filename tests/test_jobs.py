"""Jobs: explicit states, progress, cancel, failures kept as plain messages."""

from __future__ import annotations

import os
import threading
import time

import pytest

from pellucid.core.errors import BadParameterError, BusyError
from pellucid.core.jobs import BACKGROUND, CANCELLED, DONE, FAILED, INTERACTIVE, Job, JobManager, Lane
from pellucid.core.progress import step


@pytest.fixture()
def jobs():
    manager = JobManager(workers=2, keep=5)
    yield manager
    manager.shutdown()


def test_job_runs_to_done_with_progress(jobs):
    def work(progress, cancel):
        for i in range(1, 11):
            step(i, 10, progress=progress, cancel=cancel)
        return "result"

    job = jobs.wait(jobs.submit("count", work).id, timeout=10)
    assert job.state == DONE and job.result == "result" and job.fraction == 1.0
    assert job.to_dict()["done"] == 10


def test_cancel_stops_running_work(jobs):
    started = threading.Event()

    def work(progress, cancel):
        started.set()
        for i in range(10_000):
            step(i, 10_000, progress=progress, cancel=cancel)
            time.sleep(0.001)

    job = jobs.submit("slow", work)
    assert started.wait(5)
    jobs.cancel(job.id)
    assert jobs.wait(job.id, timeout=10).state == CANCELLED


def test_failures_keep_a_plain_message(jobs):
    def bad(progress, cancel):
        raise BadParameterError("patch must be positive, got 0")

    def broken(progress, cancel):
        raise ZeroDivisionError("oops")

    assert jobs.wait(jobs.submit("bad", bad).id).error == "patch must be positive, got 0"
    failed = jobs.wait(jobs.submit("broken", broken).id)
    assert failed.state == FAILED and "ZeroDivisionError" in failed.error


def test_illegal_transition_raises():
    job = Job(id="x", kind="k", description="")
    job._move("running")
    job._move("done")
    with pytest.raises(RuntimeError, match="cannot go from done to running"):
        job._move("running")


def test_history_is_bounded(jobs):
    ids = [jobs.submit("n", lambda p, c: 1).id for _ in range(12)]
    for i in ids:
        if jobs.get(i):
            jobs.wait(i)
    jobs.submit("n", lambda p, c: 1)
    assert len(jobs.list()) <= 6


# --- lanes, bounded queues, per-client limits (issue 11, finding 4) -----------------------------------


def _blocker():
    gate = threading.Event()

    def work(progress, cancel):
        while not gate.wait(0.01):
            cancel.raise_if_cancelled()
        return "released"

    return gate, work


def test_background_work_never_holds_an_interactive_thread():
    manager = JobManager(lanes=(Lane(INTERACTIVE, workers=1), Lane(BACKGROUND, workers=1, nice=10)))
    gate, work = _blocker()
    try:
        audits = [manager.submit("audit", work, lane=BACKGROUND) for _ in range(3)]
        quick = manager.wait(manager.submit("saliency", lambda p, c: "map").id, timeout=30)
        assert quick.state == DONE and quick.result == "map"
        assert [j.state for j in audits] == ["running", "queued", "queued"]
    finally:
        gate.set()
        manager.shutdown()


def test_a_full_queue_answers_busy_with_a_wait():
    manager = JobManager(lanes=(Lane(INTERACTIVE, workers=1, max_queued=3),))
    gate, work = _blocker()
    try:
        first = manager.submit("slow", work)
        while first.state != "running":
            time.sleep(0.01)
        accepted = [manager.submit("slow", work) for _ in range(3)]
        with pytest.raises(BusyError, match="already waiting") as refused:
            manager.submit("slow", work)
        assert refused.value.retry_after >= 1
        assert all(j.state == "queued" for j in accepted) and len(manager.list()) == 4
        assert manager.counts()[INTERACTIVE]["queued"] == 3
    finally:
        gate.set()
        manager.shutdown()


def test_one_client_cannot_take_the_whole_lane():
    manager = JobManager(lanes=(Lane(INTERACTIVE, workers=2, max_per_client=2),))
    gate, work = _blocker()
    try:
        mine = [manager.submit("slow", work, client="10.0.0.1") for _ in range(2)]
        with pytest.raises(BusyError, match="one client"):
            manager.submit("slow", work, client="10.0.0.1")
        other = manager.submit("slow", work, client="10.0.0.2")
        assert other.state in ("queued", "running")
        manager.cancel(mine[0].id)
        manager.wait(mine[0].id, timeout=10)
        manager.submit("slow", work, client="10.0.0.1")  # a finished job frees its place
    finally:
        gate.set()
        manager.shutdown()


@pytest.mark.skipif(not hasattr(os, "getpriority"), reason="thread priorities are a POSIX feature")
def test_background_lane_threads_run_at_a_lower_priority():
    manager = JobManager(lanes=(Lane(INTERACTIVE, workers=1), Lane(BACKGROUND, workers=1, nice=5)))

    def own_nice(progress, cancel):
        return os.getpriority(os.PRIO_PROCESS, threading.get_native_id())

    try:
        base = os.getpriority(os.PRIO_PROCESS, 0)
        fg = manager.wait(manager.submit("n", own_nice).id).result
        bg = manager.wait(manager.submit("n", own_nice, lane=BACKGROUND).id).result
        assert fg == base and bg == min(19, base + 5)
    finally:
        manager.shutdown()


def test_server_answers_429_with_retry_after_when_its_queue_is_full(web_settings):
    from dataclasses import replace

    from conftest import png_bytes, synthetic_tile
    from fastapi.testclient import TestClient

    from pellucid.web.app import create_app

    settings = replace(web_settings, job_workers=1, max_queued_jobs=2, max_jobs_per_client=100)
    with TestClient(create_app(settings)) as c:
        image = c.post("/api/images", files={"file": ("t.png", png_bytes(synthetic_tile(seed=1)), "image/png")})
        gate, work = _blocker()
        jobs = c.app.state.workspace.jobs
        try:
            jobs.submit("hold", work)  # keeps the one interactive thread busy
            codes = []
            for seed in range(6):
                r = c.post("/api/jobs", json={"image": image.json()["id"], "method": "rise",
                                              "params": {"masks": 8, "seed": seed}})
                codes.append(r.status_code)
                if r.status_code == 429:
                    assert int(r.headers["retry-after"]) >= 1 and r.json()["error"] == "BusyError"
                    assert "try again" in r.json()["detail"]
            assert codes[:2] == [202, 202] and set(codes[2:]) == {429}, codes
        finally:
            gate.set()
