"""The server's decoded images and prepared inputs, held within a budget of bytes.

An image's file size says little about its memory: a 131 KB PNG of 6300×6300 pixels decodes to
about 119 MB. So the caches here count what the decoded pixels take (width × height × bands)
and evict the least recently used entries when a new one would pass the budget. An entry larger
than the whole budget is refused with a sentence that says both sizes.

:class:`ImageCache` is the one interface the routers use to keep and fetch images
(``add``, ``get``, ``list``); a persistent store can take its place behind the same methods.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Any

from pellucid.core.errors import ImageTooLargeError
from pellucid.core.model.preprocess import IntakeImage, PreparedInput

__all__ = ["ByteBudgetLru", "ImageCache", "decoded_bytes", "prepared_bytes"]


def decoded_bytes(image: IntakeImage) -> int:
    """Bytes the decoded pixels take: width × height × bands (8-bit modes, as intake yields)."""
    w, h = image.pil.size
    return int(w) * int(h) * max(1, len(image.pil.getbands()))


def prepared_bytes(prepared: PreparedInput) -> int:
    return int(prepared.tensor.element_size() * prepared.tensor.nelement()) + int(prepared.display.nbytes)


def _mb(n: int) -> str:
    return f"{n / 1e6:.1f} MB"


class ByteBudgetLru:
    """A thread-safe LRU map bounded by the summed ``size(value)`` in bytes and by a count."""

    def __init__(self, *, budget_bytes: int, max_entries: int, size: Callable[[Any], int], what: str) -> None:
        self._data: OrderedDict[Hashable, tuple[Any, int]] = OrderedDict()
        self._lock = threading.Lock()
        self._size = size
        self.budget_bytes = int(budget_bytes)
        self.max_entries = int(max_entries)
        self.what = what
        self.bytes_used = 0

    def get(self, key: Hashable) -> Any | None:
        with self._lock:
            hit = self._data.get(key)
            if hit is None:
                return None
            self._data.move_to_end(key)
            return hit[0]

    def put(self, key: Hashable, value: Any) -> list[Hashable]:
        """Keep ``value`` (most recent); returns the keys evicted to make room."""
        size = int(self._size(value))
        if size > self.budget_bytes:
            raise ImageTooLargeError(
                f"this {self.what} takes {_mb(size)} in memory once decoded, more than this server's budget "
                f"of {_mb(self.budget_bytes)} for {self.what}s; send a smaller picture (or start the server "
                "with a larger image memory budget)"
            )
        evicted: list[Hashable] = []
        with self._lock:
            old = self._data.pop(key, None)
            if old is not None:
                self.bytes_used -= old[1]
            self._data[key] = (value, size)
            self.bytes_used += size
            while self._data and (self.bytes_used > self.budget_bytes or len(self._data) > self.max_entries):
                oldest, (_, freed) = self._data.popitem(last=False)
                self.bytes_used -= freed
                evicted.append(oldest)
        return evicted

    def values(self) -> list[Any]:
        """Most recently used first."""
        with self._lock:
            return [v for v, _ in reversed(self._data.values())]

    def discard_where(self, predicate: Callable[[Hashable], bool]) -> None:
        with self._lock:
            for key in [k for k in self._data if predicate(k)]:
                self.bytes_used -= self._data.pop(key)[1]

    def __len__(self) -> int:
        with self._lock:
            return len(self._data)


class ImageCache:
    """Decoded images by sha256, within a byte budget, least recently used evicted first."""

    def __init__(self, *, budget_bytes: int, max_images: int) -> None:
        self._lru = ByteBudgetLru(budget_bytes=budget_bytes, max_entries=max_images, size=decoded_bytes,
                                  what="image")

    def add(self, image: IntakeImage) -> list[str]:
        """Keep ``image``; returns the ids of the images evicted to make room for it."""
        return [str(k) for k in self._lru.put(image.sha256, image)]

    def get(self, image_id: str) -> IntakeImage | None:
        return self._lru.get(image_id)

    def list(self) -> list[IntakeImage]:
        """Newest (most recently used) first."""
        return self._lru.values()

    @property
    def bytes_used(self) -> int:
        return self._lru.bytes_used

    @property
    def budget_bytes(self) -> int:
        return self._lru.budget_bytes

    def __len__(self) -> int:
        return len(self._lru)
