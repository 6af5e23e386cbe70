"""The plots' cache: a stored fit never changes, so its plot is kept by (fit id, format)."""

from __future__ import annotations

import threading
from collections import OrderedDict


class PlotCache:
    """At most ``size`` plots in memory, the least recently used dropped first."""

    def __init__(self, size: int = 256):
        self.size = size
        self._items: OrderedDict = OrderedDict()
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def get(self, key, make):
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                self.hits += 1
                return self._items[key]
        value = make()
        with self._lock:
            self.misses += 1
            self._items[key] = value
            while len(self._items) > self.size:
                self._items.popitem(last=False)
        return value
