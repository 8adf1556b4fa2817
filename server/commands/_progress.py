"""A small stderr progress bar with counts and time left (no dependency, quiet when not a TTY)."""

from __future__ import annotations

import sys
import time


class ProgressBar:
    def __init__(self, label: str, *, stream=None, width: int = 28, min_interval: float = 0.1) -> None:
        self.label = label
        self.stream = stream or sys.stderr
        self.width = width
        self.min_interval = min_interval
        self.started = time.time()
        self._last = 0.0
        self._shown = False
        self._tty = hasattr(self.stream, "isatty") and self.stream.isatty()

    def __call__(self, done: int, total: int) -> None:
        now = time.time()
        if done < total and now - self._last < self.min_interval:
            return
        self._last = now
        frac = (done / total) if total else 1.0
        elapsed = now - self.started
        left = (elapsed / done * (total - done)) if done else float("nan")
        bar = "#" * int(frac * self.width) + "-" * (self.width - int(frac * self.width))
        left_txt = f"{left:5.1f}s left" if left == left else "  …   left"
        line = f"{self.label} [{bar}] {done}/{total} {left_txt}"
        if self._tty:
            self.stream.write("\r" + line)
            if done >= total:
                self.stream.write("\n")
            self.stream.flush()
            self._shown = True
        elif done >= total:
            self.stream.write(f"{self.label}: {total}/{total} in {elapsed:.1f}s\n")
            self.stream.flush()
