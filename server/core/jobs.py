"""Jobs: long computations run off the caller's thread, with progress, time left and cancel.

A job moves through explicit states::

    queued ──► running ──► done
       │          ├──────► failed
       └──────────┴──────► cancelled

Any other transition is a programming error and raises RuntimeError. The manager keeps a bounded
history so a long-running server does not grow without limit.
"""

from __future__ import annotations

import threading
import time
import traceback
import uuid
from collections import OrderedDict
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from pellucid.core.errors import Cancelled, PellucidError
from pellucid.core.progress import CancelToken

QUEUED, RUNNING, DONE, FAILED, CANCELLED = "queued", "running", "done", "failed", "cancelled"
_ALLOWED = {
    QUEUED: {RUNNING, CANCELLED},
    RUNNING: {DONE, FAILED, CANCELLED},
    DONE: set(),
    FAILED: set(),
    CANCELLED: set(),
}

JobFn = Callable[[Callable[[int, int], None], CancelToken], Any]


@dataclass
class Job:
    id: str
    kind: str
    description: str
    state: str = QUEUED
    done: int = 0
    total: int = 0
    created: float = field(default_factory=time.time)
    started: float | None = None
    finished: float | None = None
    result: Any = None
    error: str | None = None
    cancel_token: CancelToken = field(default_factory=CancelToken)
    meta: dict = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def _move(self, state: str) -> None:
        if state not in _ALLOWED[self.state]:
            raise RuntimeError(f"job {self.id}: cannot go from {self.state} to {state}")
        self.state = state

    @property
    def fraction(self) -> float:
        if self.state == DONE:
            return 1.0
        return (self.done / self.total) if self.total else 0.0

    @property
    def seconds_left(self) -> float | None:
        """Estimated from the rate so far; None until there is a rate to go by."""
        if self.state != RUNNING or not self.started or self.done <= 0 or not self.total:
            return None
        elapsed = time.time() - self.started
        return max(0.0, elapsed / self.done * (self.total - self.done))

    @property
    def finished_state(self) -> bool:
        return self.state in (DONE, FAILED, CANCELLED)

    def to_dict(self) -> dict:
        return {
            "id": self.id,
            "kind": self.kind,
            "description": self.description,
            "state": self.state,
            "done": self.done,
            "total": self.total,
            "fraction": self.fraction,
            "seconds_left": self.seconds_left,
            "elapsed": ((self.finished or time.time()) - self.started) if self.started else 0.0,
            "error": self.error,
            "meta": self.meta,
        }


class JobManager:
    """Runs jobs on a small thread pool (torch releases the GIL in its kernels)."""

    def __init__(self, *, workers: int = 2, keep: int = 200) -> None:
        self._pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="pellucid-job")
        self._jobs: OrderedDict[str, Job] = OrderedDict()
        self._lock = threading.Lock()
        self._keep = keep

    def submit(self, kind: str, fn: JobFn, *, description: str = "", meta: dict | None = None) -> Job:
        job = Job(id=uuid.uuid4().hex[:12], kind=kind, description=description, meta=dict(meta or {}))
        with self._lock:
            self._jobs[job.id] = job
            self._trim()
        self._pool.submit(self._run, job, fn)
        return job

    def _trim(self) -> None:
        while len(self._jobs) > self._keep:
            oldest = next((k for k, j in self._jobs.items() if j.finished_state), None)
            if oldest is None:
                break
            del self._jobs[oldest]

    def _run(self, job: Job, fn: JobFn) -> None:
        with job._lock:
            if job.state == CANCELLED:
                return
            job._move(RUNNING)
            job.started = time.time()

        def progress(done: int, total: int) -> None:
            job.done, job.total = int(done), int(total)

        try:
            result = fn(progress, job.cancel_token)
        except Cancelled:
            with job._lock:
                job._move(CANCELLED)
        except PellucidError as exc:
            with job._lock:
                job.error = str(exc)
                job._move(FAILED)
        except Exception as exc:  # noqa: BLE001 - a job must never take the server down
            with job._lock:
                job.error = f"internal error in {job.kind}: {type(exc).__name__}: {exc}"
                job.meta["traceback"] = traceback.format_exc(limit=8)
                job._move(FAILED)
        else:
            with job._lock:
                if job.cancel_token.cancelled:
                    job._move(CANCELLED)
                else:
                    job.result = result
                    job.done = job.total = max(job.total, 1)
                    job._move(DONE)
        finally:
            job.finished = time.time()

    def get(self, job_id: str) -> Job | None:
        with self._lock:
            return self._jobs.get(job_id)

    def cancel(self, job_id: str) -> Job | None:
        job = self.get(job_id)
        if job is None:
            return None
        job.cancel_token.cancel()
        with job._lock:
            if job.state == QUEUED:
                job._move(CANCELLED)
                job.finished = time.time()
        return job

    def list(self) -> list[Job]:
        with self._lock:
            return list(self._jobs.values())

    def wait(self, job_id: str, *, timeout: float = 60.0) -> Job:
        """Block until a job has finished (for tests and the CLI)."""
        deadline = time.time() + timeout
        job = self.get(job_id)
        if job is None:
            raise KeyError(job_id)
        while not job.finished_state or job.finished is None:
            if time.time() > deadline:
                raise TimeoutError(f"job {job_id} still {job.state} after {timeout} s")
            time.sleep(0.02)
        return job

    def shutdown(self) -> None:
        for job in self.list():
            job.cancel_token.cancel()
        self._pool.shutdown(wait=True, cancel_futures=True)
