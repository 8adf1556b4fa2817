"""Progress reporting and cooperative cancellation for long computations.

Every long core function takes ``progress=`` (called as ``progress(done, total)``) and
``cancel=`` (a :class:`CancelToken`) keyword arguments. The core never sleeps or polls: it calls
:func:`step` between batches, which reports progress and raises :class:`Cancelled` when asked to.
"""

from __future__ import annotations

import threading
from collections.abc import Callable

from pellucid.core.errors import Cancelled

ProgressFn = Callable[[int, int], None]


class CancelToken:
    """A thread-safe flag that a job sets and the computation checks between batches."""

    def __init__(self) -> None:
        self._event = threading.Event()

    def cancel(self) -> None:
        self._event.set()

    @property
    def cancelled(self) -> bool:
        return self._event.is_set()

    def raise_if_cancelled(self) -> None:
        if self._event.is_set():
            raise Cancelled("the computation was cancelled")

    def __repr__(self) -> str:
        return f"CancelToken(cancelled={self.cancelled})"


def step(done: int, total: int, *, progress: ProgressFn | None, cancel: CancelToken | None) -> None:
    """Report ``done`` of ``total`` units and stop if cancellation was requested."""
    if cancel is not None:
        cancel.raise_if_cancelled()
    if progress is not None:
        progress(done, total)
