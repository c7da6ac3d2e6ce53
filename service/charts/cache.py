"""An in-memory LRU cache of rendered charts, with one renderer at a time."""

from __future__ import annotations

import threading
from collections import OrderedDict
from typing import Callable, Hashable


class ChartCache:
    """PNG bytes by key, least recently used out first.

    Rendering holds one lock: matplotlib's text and font caches are shared by all figures of a process and
    are not documented as thread-safe, and a chart is drawn once per key anyway. A second request for a
    key being drawn waits and then gets the cached bytes.
    """

    def __init__(self, size: int) -> None:
        self._size = size
        self._items: OrderedDict[Hashable, bytes] = OrderedDict()
        self._lock = threading.Lock()
        self._render_lock = threading.Lock()

    def _get(self, key: Hashable) -> bytes | None:
        with self._lock:
            png = self._items.get(key)
            if png is not None:
                self._items.move_to_end(key)
            return png

    def get_or_make(self, key: Hashable, make: Callable[[], bytes]) -> bytes:
        png = self._get(key)
        if png is not None:
            return png
        with self._render_lock:
            png = self._get(key)
            if png is None:
                png = make()
                with self._lock:
                    self._items[key] = png
                    while len(self._items) > self._size:
                        self._items.popitem(last=False)
        return png

    def __len__(self) -> int:
        with self._lock:
            return len(self._items)
