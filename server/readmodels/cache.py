"""The one small cache mechanism of the read models and the web layer: a bounded, thread-safe LRU.

A read model keeps what it built under a key made of everything that invalidates it (a run's
cutoff and rows written, a decision stamp, the newest vintage id, the minute); a new key simply
misses, so nothing is ever invalidated by hand. Kept per worker: each instance lives on
``app.state`` or, for a read model called without an app (the CLI, the demo, benchmarks), once
in the module that owns it. ``size`` bounds it: the read models keep only their newest key
(``size=1``), the web layer the newest few maps and fragments or a few thousand pages.

Building runs outside the lock (it reads the database and can take a second): two requests that
miss at once both build, and the later one is kept, which is harmless because both answers
belong to the same key. None is never kept (it reads as a miss).
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import Generic, TypeVar

__all__ = ["BoundedCache"]

K = TypeVar("K", bound=Hashable)
V = TypeVar("V")


class BoundedCache(Generic[K, V]):
    """At most ``size`` values by key; the least recently used one goes first."""

    def __init__(self, *, size: int) -> None:
        if size < 1:
            raise ValueError(f"size must be >= 1, got {size}")
        self.size = size
        self._items: OrderedDict[K, V] = OrderedDict()
        self._lock = threading.Lock()

    def __len__(self) -> int:
        with self._lock:
            return len(self._items)

    def get(self, key: K) -> V | None:
        """The value kept under ``key`` (now the most recently used), else None."""
        with self._lock:
            hit = self._items.get(key)
            if hit is not None:
                self._items.move_to_end(key)
            return hit

    def put(self, key: K, value: V) -> None:
        """Keep ``value`` under ``key``, dropping the least recently used beyond ``size``."""
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.size:
                self._items.popitem(last=False)

    def get_or_build(self, key: K, build: Callable[[], V]) -> V:
        """The value under ``key``, or ``build()`` (called without the lock held) kept under it."""
        hit = self.get(key)
        if hit is None:
            hit = build()
            self.put(key, hit)
        return hit

    def clear(self) -> None:
        with self._lock:
            self._items.clear()
