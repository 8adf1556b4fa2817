"""Progress on stderr: a bar on a terminal, a plain line every few seconds in logs and pipes.

On a terminal the bar redraws in place (at most ten times a second) with done/total, rate and
time left. Without a terminal (CI logs, ``| tee``, cron) a redrawn bar would be noise, so one
plain line is written every ``PELLUCID_PROGRESS_SECONDS`` seconds (default 5) and one when the
work ends; work that ends within the first interval writes nothing, so a command that stops early
on bad input still says so in one line::

    audit: 120/400 (30%), 3.1 images/s, about 1m30s left

``--quiet`` gives a bar that writes nothing. No dependency beyond the standard library, so
importing it costs nothing at start-up.
"""

from __future__ import annotations

import os
import sys
import time
from typing import TextIO

DEFAULT_PLAIN_INTERVAL = 5.0


def _plain_interval() -> float:
    try:
        return max(0.0, float(os.environ.get("PELLUCID_PROGRESS_SECONDS", DEFAULT_PLAIN_INTERVAL)))
    except ValueError:
        return DEFAULT_PLAIN_INTERVAL


def _duration(seconds: float) -> str:
    if seconds != seconds or seconds == float("inf"):
        return "…"
    seconds = round(seconds)
    if seconds < 60:
        return f"{seconds}s"
    if seconds < 3600:
        return f"{seconds // 60}m{seconds % 60:02d}s"
    return f"{seconds // 3600}h{seconds % 3600 // 60:02d}m"


class ProgressBar:
    """``progress(done, total)`` callback for the core's long work; see the module doc."""

    def __init__(self, label: str, *, stream: TextIO | None = None, width: int = 28, unit: str = "",
                 quiet: bool = False, interval: float | None = None) -> None:
        self.label = label.strip()
        self.stream = stream or sys.stderr
        self.width = width
        self.unit = unit
        self.quiet = quiet
        self.started = time.monotonic()
        self._tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.interval = 0.1 if self._tty else (_plain_interval() if interval is None else interval)
        self._last = self.started
        self._finished = False
        self._printed = False

    def __call__(self, done: int, total: int) -> None:
        if self.quiet or self._finished:
            return
        now = time.monotonic()
        finished = total > 0 and done >= total
        if not finished and now - self._last < self.interval:
            return
        self._last = now
        elapsed = now - self.started
        rate = done / elapsed if elapsed > 0 and done else 0.0
        left = (total - done) / rate if rate else float("nan")
        unit = f" {self.unit}" if self.unit else ""
        if self._tty:
            frac = (done / total) if total else 1.0
            filled = int(frac * self.width)
            tail = f"{elapsed:.1f}s" if finished else f"{_duration(left)} left"
            line = (f"{self.label} [{'#' * filled}{'-' * (self.width - filled)}] {done}/{total}{unit} "
                    f"{rate:.1f}/s {tail}")
            self.stream.write("\r" + line + ("\n" if finished else ""))
        elif finished:
            if not self._printed and elapsed < self.interval:
                self._finished = True
                return
            self.stream.write(f"{self.label}: {total}/{total}{unit} done in {_duration(elapsed)}"
                              f"{f', {rate:.1f}{unit}/s' if rate else ''}\n")
        else:
            pct = f" ({100 * done / total:.0f}%)" if total else ""
            self.stream.write(f"{self.label}: {done}/{total}{unit}{pct}, {rate:.1f}{unit}/s, "
                              f"about {_duration(left)} left\n")
        self.stream.flush()
        self._printed = True
        self._finished = finished
