"""The shard map: run :func:`process_shard` over shards, inline, in a process pool, or on Ray.

- ``local`` with one worker runs the shards in this process (no start-up cost);
- ``local`` with N > 1 workers uses a pool of N spawned processes;
- ``ray`` submits each shard as a Ray task (one CPU each). It connects to the cluster named by
  ``address`` or the ``RAY_ADDRESS`` environment variable, or starts a local Ray runtime when
  neither is set. If Ray is already initialised in this process (a notebook, a test) that session
  is used as it is.

Shards come back in completion order; the caller stores each one as it arrives. Every engine
runs the same function on the same inputs with the same thread count, so results are equal.

Worker processes never outlive the audit: they end when their parent does (``core/lifeline.py``,
their initializer, which a spawned worker loads before torch). When the map ends early (an
error, a cancel, Ctrl-C, or a stop request, which :func:`stop_requests_interrupt` turns into
KeyboardInterrupt), the parent terminates the workers still busy instead of waiting for their
shards.
"""

from __future__ import annotations

import contextlib
import multiprocessing
import os
import signal
import threading
import time
from collections.abc import Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait

from pellucid.core.audit.worker import ImageOutcome, ShardTask, process_shard
from pellucid.core.errors import BadParameterError, Cancelled
from pellucid.core.lifeline import die_with_parent
from pellucid.core.model.loading import LoadedModel
from pellucid.core.progress import CancelToken

__all__ = ["ENGINES", "ray_available", "run_shards", "stop_requests_interrupt"]

ENGINES = ("local", "ray")
_POLL_SECONDS = 0.2
_TERMINATE_GRACE_SECONDS = 5.0


def _raise_interrupt(signum: int, _frame: object) -> None:
    raise KeyboardInterrupt(f"stopped by signal {signal.Signals(signum).name}")


@contextlib.contextmanager
def stop_requests_interrupt() -> Iterator[None]:
    """While inside, SIGTERM raises KeyboardInterrupt (as Ctrl-C does), so clean-up code runs.

    Only on the main thread and only when SIGTERM still has its default action (a server that
    installed its own handler keeps it).
    """
    if threading.current_thread() is not threading.main_thread() or \
            signal.getsignal(signal.SIGTERM) is not signal.SIG_DFL:
        yield
        return
    signal.signal(signal.SIGTERM, _raise_interrupt)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, signal.SIG_DFL)


def _terminate(pool: ProcessPoolExecutor) -> None:
    """End the pool's worker processes now (SIGTERM, then SIGKILL after a grace period) and reap them."""
    processes = list((getattr(pool, "_processes", None) or {}).values())  # the executor keeps no public list
    for proc in processes:
        if proc.is_alive():
            proc.terminate()
    deadline = time.monotonic() + _TERMINATE_GRACE_SECONDS
    for proc in processes:
        proc.join(max(0.0, deadline - time.monotonic()))
        if proc.is_alive():
            proc.kill()
            proc.join(1.0)


def ray_available() -> bool:
    try:
        import ray  # noqa: F401
    except ImportError:
        return False
    return True


def _check(engine: str, workers: int) -> None:
    if engine not in ENGINES:
        raise BadParameterError(f"engine must be one of {', '.join(ENGINES)}; received {engine!r}")
    if isinstance(workers, bool) or not isinstance(workers, int) or not 1 <= workers <= 512:
        raise BadParameterError(f"workers must be a whole number from 1 to 512; received {workers!r}")


def run_shards(
    tasks: list[ShardTask],
    *,
    engine: str = "local",
    workers: int = 1,
    model: LoadedModel | None = None,
    ray_address: str | None = None,
    cancel: CancelToken | None = None,
) -> Iterator[list[ImageOutcome]]:
    """Yield each shard's outcomes as it finishes. ``model`` is reused by the inline engine."""
    _check(engine, workers)
    if not tasks:
        return
    if engine == "ray":
        yield from _ray(tasks, address=ray_address, workers=workers, cancel=cancel)
    elif workers == 1:
        for task in tasks:
            if cancel is not None:
                cancel.raise_if_cancelled()
            yield process_shard(task, model=model, cancel=cancel)
    else:
        yield from _pool(tasks, workers=workers, cancel=cancel)


def _pool(tasks: list[ShardTask], *, workers: int, cancel: CancelToken | None) -> Iterator[list[ImageOutcome]]:
    # spawn, not fork: forking a process that already runs torch threads can deadlock.
    context = multiprocessing.get_context("spawn")
    pool = ProcessPoolExecutor(max_workers=min(workers, len(tasks)), mp_context=context,
                               initializer=die_with_parent, initargs=(os.getpid(),))
    finished = False
    try:
        with stop_requests_interrupt():
            pending: set[Future] = {pool.submit(process_shard, task) for task in tasks}
            while pending:
                done, pending = wait(pending, timeout=_POLL_SECONDS, return_when=FIRST_COMPLETED)
                for future in done:
                    yield future.result()
                if cancel is not None and cancel.cancelled:
                    raise Cancelled("the audit was cancelled")
            finished = True
    finally:
        if not finished:
            # Stopped early: the shards still running are not wanted. No future is cancelled first:
            # the executor marks every pending one broken when its workers end, and a cancelled one
            # would make its manager thread fail (Python 3.11).
            _terminate(pool)
        pool.shutdown(wait=True)


def _ray(tasks: list[ShardTask], *, address: str | None, workers: int,
         cancel: CancelToken | None) -> Iterator[list[ImageOutcome]]:
    try:
        import ray
    except ImportError:
        raise BadParameterError(
            "engine 'ray' needs the ray package, which is not installed here: pip install ray "
            "(or use --engine local)"
        ) from None
    if not ray.is_initialized():
        address = address or os.environ.get("RAY_ADDRESS") or None
        try:
            if address:
                ray.init(address=address, log_to_driver=False)
            else:
                ray.init(num_cpus=workers, include_dashboard=False, log_to_driver=False)
        except (ConnectionError, RuntimeError, ValueError) as exc:
            raise BadParameterError(
                f"could not reach a Ray cluster at {address or 'a new local runtime'}: {exc}. Check the "
                "address (--ray-address or RAY_ADDRESS) or use --engine local"
            ) from None
    remote = ray.remote(num_cpus=1, max_retries=0)(process_shard)
    pending = [remote.remote(task) for task in tasks]
    try:
        while pending:
            ready, pending = ray.wait(pending, num_returns=1, timeout=_POLL_SECONDS)
            for ref in ready:
                yield ray.get(ref)
            if cancel is not None and cancel.cancelled:
                raise Cancelled("the audit was cancelled")
    finally:
        for ref in pending:
            try:
                ray.cancel(ref, force=True)
            except Exception:  # noqa: BLE001, S110 - a task that already ended cannot be cancelled
                pass
