"""A small process-local cache of decoded model states, keyed by (channel, version).

Versions only grow, so an entry is either exactly the stored state or stale (and then
never asked for again): the cache stays coherent with several processes on one store.
"""

from __future__ import annotations

from collections import OrderedDict
from threading import Lock
from typing import Any


class VersionCache:
    def __init__(self, size: int = 4096) -> None:
        self.size = size
        self._items: OrderedDict[int, tuple[int, Any]] = OrderedDict()
        self._lock = Lock()

    def get(self, key: int, version: int) -> Any | None:
        with self._lock:
            hit = self._items.get(key)
            if hit is None or hit[0] != version:
                return None
            self._items.move_to_end(key)
            return hit[1]

    def put(self, key: int, version: int, value: Any) -> None:
        with self._lock:
            old = self._items.get(key)
            if old is not None and old[0] > version:
                return
            self._items[key] = (version, value)
            self._items.move_to_end(key)
            while len(self._items) > self.size:
                self._items.popitem(last=False)

    def clear(self) -> None:
        with self._lock:
            self._items.clear()
