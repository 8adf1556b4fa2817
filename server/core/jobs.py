"""Jobs: long computations run off the caller's thread, with progress, time left and cancel.

A job moves through explicit states::

    queued ──► running ──► done
       │          ├──────► failed
       └──────────┴──────► cancelled

Any other transition is a programming error and raises RuntimeError. The manager keeps a bounded
history so a long-running server does not grow without limit.

Time left comes from the rate of the current *phase*: a job whose count starts again (an audit
goes from files read to images mapped to clusters tested) measures its rate afresh, so the
minutes spent reading files do not stretch the estimate for the images.

Jobs run in *lanes*: each lane has its own thread pool, so a folder audit never holds a thread
that an interactive map is waiting for. A lane bounds how many jobs may wait (beyond that,
``submit`` raises :class:`BusyError` with a suggested wait) and how many jobs one client may
have queued or running at once. A background lane's threads run at a lower scheduling priority
(a higher nice value, Linux only), and so do the torch worker threads they start, so the
interactive lane keeps the CPU when both are busy.
"""

from __future__ import annotations

import os
import threading
import time
import traceback
import uuid
from collections import OrderedDict, deque
from collections.abc import Callable, Iterable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

from pellucid.core.errors import BusyError, Cancelled, PellucidError
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
INTERACTIVE, BACKGROUND = "interactive", "background"


@dataclass(frozen=True)
class Lane:
    """A pool of ``workers`` threads with its own limits.

    ``max_queued``: jobs that may wait for a thread (0: no limit). ``max_per_client``: jobs one
    client may have queued or running (0: no limit). ``nice``: added niceness of the lane's
    threads (0 keeps the process's priority).
    """

    name: str
    workers: int
    max_queued: int = 0
    max_per_client: int = 0
    nice: int = 0

    def __post_init__(self) -> None:
        if self.workers < 1 or self.max_queued < 0 or self.max_per_client < 0 or self.nice < 0:
            raise ValueError(f"lane {self.name!r}: workers must be ≥ 1 and the limits ≥ 0, got {self}")


def _lower_priority(nice: int) -> None:
    """Raise this thread's nice value (Linux schedules threads one by one; threads it starts inherit it)."""
    if nice <= 0 or not hasattr(os, "setpriority"):
        return
    try:
        tid = threading.get_native_id()
        os.setpriority(os.PRIO_PROCESS, tid, min(19, os.getpriority(os.PRIO_PROCESS, tid) + nice))
    except OSError:  # not permitted or not supported here: run at the normal priority
        pass


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
    lane: str = INTERACTIVE
    client: str | None = None
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)
    # (time, units done) where the current phase's rate is measured from
    _rate_from: tuple[float, int] | None = field(default=None, repr=False)
    _on_end: Callable[[Job], None] | None = field(default=None, repr=False)
    _ended: bool = field(default=False, repr=False)

    def report(self, done: int, total: int) -> None:
        """Progress from the job's function; a count that goes back starts a new phase."""
        done, total = int(done), int(total)
        if self._rate_from is None or done < self.done:
            self._rate_from = (time.time(), done)
        self.done, self.total = done, total

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
        if self.state != RUNNING or not self.total:
            return None
        since, base = self._rate_from or (self.started or time.time(), 0)
        if self.done <= base:
            return None
        return max(0.0, (time.time() - since) / (self.done - base) * (self.total - self.done))

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
            "created": self.created,
            "started": self.started,
            "finished": self.finished,
            "error": self.error,
            "meta": self.meta,
            "lane": self.lane,
        }


class JobManager:
    """Runs jobs on small thread pools, one per lane (torch releases the GIL in its kernels).

    ``JobManager(workers=2)`` has one interactive lane without limits; a server passes
    ``lanes=`` with its limits (see :class:`Lane`).
    """

    def __init__(self, *, workers: int = 2, keep: int = 200, lanes: Iterable[Lane] | None = None) -> None:
        lanes = tuple(lanes) if lanes is not None else (Lane(INTERACTIVE, workers=workers),)
        if not lanes or len({lane.name for lane in lanes}) != len(lanes):
            raise ValueError(f"lanes need distinct names, got {[lane.name for lane in lanes]}")
        self.lanes = {lane.name: lane for lane in lanes}
        self._pools = {
            lane.name: ThreadPoolExecutor(max_workers=lane.workers, thread_name_prefix=f"pellucid-{lane.name}",
                                          initializer=_lower_priority, initargs=(lane.nice,))
            for lane in lanes
        }
        self._jobs: OrderedDict[str, Job] = OrderedDict()
        self._lock = threading.Lock()
        self._keep = keep
        self._durations = {lane.name: deque(maxlen=20) for lane in lanes}

    def submit(self, kind: str, fn: JobFn, *, description: str = "", meta: dict | None = None,
               lane: str = INTERACTIVE, client: str | None = None,
               on_end: Callable[[Job], None] | None = None) -> Job:
        """Queue ``fn`` on ``lane``; raises BusyError when the lane's queue or the client's share is full.

        ``on_end(job)`` is called once when the job has ended, whether ``fn`` ran or the job was
        cancelled while it waited (``fn``'s own ``finally`` never runs then): release what the job held.
        """
        if lane not in self.lanes:
            raise ValueError(f"no job lane {lane!r}; lanes: {', '.join(self.lanes)}")
        limits = self.lanes[lane]
        job = Job(id=uuid.uuid4().hex[:12], kind=kind, description=description, meta=dict(meta or {}),
                  lane=lane, client=client, _on_end=on_end)
        with self._lock:
            active = [j for j in self._jobs.values() if j.lane == lane and not j.finished_state]
            queued = sum(1 for j in active if j.state == QUEUED)
            if limits.max_queued and queued >= limits.max_queued:
                raise BusyError(
                    f"{queued} {lane} job(s) are already waiting, the most this server queues; try again "
                    f"in a few seconds", retry_after=self._retry_after(lane, queued))
            if limits.max_per_client and client is not None:
                mine = sum(1 for j in active if j.client == client)
                if mine >= limits.max_per_client:
                    raise BusyError(
                        f"you already have {mine} {lane} job(s) queued or running, the most one client may have "
                        f"at once; wait for one to finish (or cancel one) and try again",
                        retry_after=self._retry_after(lane, 0))
            self._jobs[job.id] = job
            self._trim()
        self._pools[lane].submit(self._run, job, fn)
        return job

    def _retry_after(self, lane: str, queued: int) -> float:
        """A suggested wait: recent job durations times the jobs ahead, per worker (1 s … 2 min)."""
        recent = self._durations[lane]
        typical = sum(recent) / len(recent) if recent else 1.0
        return min(120.0, max(1.0, typical * (queued + 1) / self.lanes[lane].workers))

    def counts(self) -> dict[str, dict[str, int]]:
        """Per lane: jobs queued and running now, and the lane's limits."""
        with self._lock:
            jobs = list(self._jobs.values())
        return {
            name: {"queued": sum(1 for j in jobs if j.lane == name and j.state == QUEUED),
                   "running": sum(1 for j in jobs if j.lane == name and j.state == RUNNING),
                   "workers": lane.workers, "max_queued": lane.max_queued, "max_per_client": lane.max_per_client}
            for name, lane in self.lanes.items()
        }

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
            job._rate_from = (job.started, 0)

        try:
            result = fn(job.report, job.cancel_token)
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
            # Work that finished before it saw a late cancel is done: its result (a stored map, a
            # finished audit run) exists, and calling it cancelled would contradict the store.
            with job._lock:
                job.result = result
                job.done = job.total = max(job.total, 1)
                job._move(DONE)
        finally:
            job.finished = time.time()
            if job.started is not None:
                self._durations[job.lane].append(job.finished - job.started)
            self._ended(job)

    @staticmethod
    def _ended(job: Job) -> None:
        with job._lock:
            if job._ended or job._on_end is None:
                return
            job._ended = True
        try:
            job._on_end(job)
        except Exception:  # noqa: BLE001 - a clean-up that fails must not take a worker or a request down
            job.meta["on_end_error"] = traceback.format_exc(limit=4)

    def get(self, job_id: str) -> Job | None:
        with self._lock:
            return self._jobs.get(job_id)

    def cancel(self, job_id: str) -> Job | None:
        job = self.get(job_id)
        if job is None:
            return None
        job.cancel_token.cancel()
        with job._lock:
            never_ran = job.state == QUEUED
            if never_ran:
                job._move(CANCELLED)
                job.finished = time.time()
        if never_ran:
            self._ended(job)
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
        for pool in self._pools.values():
            pool.shutdown(wait=True, cancel_futures=True)
