"""Jobs: explicit states, progress, cancel, failures kept as plain messages."""

from __future__ import annotations

import threading
import time

import pytest

from pellucid.core.errors import BadParameterError
from pellucid.core.jobs import CANCELLED, DONE, FAILED, Job, JobManager
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
