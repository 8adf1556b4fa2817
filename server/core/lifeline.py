"""Child processes that end with their parent: the initializer of Pellucid's worker pools.

A pool worker asks the kernel to kill it when its parent dies (``prctl(PR_SET_PDEATHSIG)`` on
Linux) and also watches its parent's process id (the portable fallback, and a guard for a parent
that died before the request was made); it ignores Ctrl-C, which reaches the whole process group
and which the parent handles.

This module imports nothing heavy on purpose: a spawned worker unpickles its initializer before
anything else, so the sooner that import finishes, the shorter the time in which a worker whose
parent was killed could go on (a worker still importing torch under load takes seconds).
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading
import time

__all__ = ["die_with_parent"]

_PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>
_PARENT_CHECK_SECONDS = 0.5


def die_with_parent(parent_pid: int) -> None:
    """Pool initializer: end this process when the process ``parent_pid`` ends."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if sys.platform.startswith("linux"):
        try:
            ctypes.CDLL(None, use_errno=True).prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):
            pass  # no prctl here: the watcher below still ends the process
    if os.getppid() != parent_pid:
        os._exit(1)
    threading.Thread(target=_watch_parent, args=(parent_pid,), name="pellucid-parent-watch", daemon=True).start()


def _watch_parent(parent_pid: int) -> None:
    # The kernel's death signal fires when the *thread* that started us ends, and not at all off
    # Linux; the parent's id changing (to init or a subreaper) is the fact that matters.
    while True:
        if os.getppid() != parent_pid:
            os._exit(1)
        time.sleep(_PARENT_CHECK_SECONDS)
