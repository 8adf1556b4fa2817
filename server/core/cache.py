"""A bounded, thread-safe result cache keyed by what produced the result.

Keys are (model fingerprint, image sha256, method, canonical JSON of the parameters), so a result
is reused only when every input that shaped it is the same.
"""

from __future__ import annotations

import json
import threading
from collections import OrderedDict
from collections.abc import Hashable
from typing import Any


def result_key(*, model: str, image: str, method: str, params: dict[str, Any]) -> tuple[str, str, str, str]:
    return (model, image, method, json.dumps(params, sort_keys=True, default=str))


class ResultCache:
    """Least-recently-used cache holding at most ``max_entries`` results."""

    def __init__(self, *, max_entries: int = 128) -> None:
        self._data: OrderedDict[Hashable, Any] = OrderedDict()
        self._lock = threading.Lock()
        self.max_entries = max_entries
        self.hits = 0
        self.misses = 0

    def get(self, key: Hashable) -> Any | None:
        with self._lock:
            if key in self._data:
                self._data.move_to_end(key)
                self.hits += 1
                return self._data[key]
            self.misses += 1
            return None

    def put(self, key: Hashable, value: Any) -> None:
        with self._lock:
            self._data[key] = value
            self._data.move_to_end(key)
            while len(self._data) > self.max_entries:
                self._data.popitem(last=False)

    def __len__(self) -> int:
        with self._lock:
            return len(self._data)
