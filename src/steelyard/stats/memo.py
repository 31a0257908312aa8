"""Once-only results shared between threads, and the byte-bounded cache of large arrays.

Every statistic is computed by one thread while the others wait for it, so results never
depend on how many threads ask; small results stay for the whole audit, large arrays live in
an LRU cache bounded by their total bytes and are dropped when a layer's rules are done.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Callable, Hashable
from typing import TypeVar

import numpy as np

T = TypeVar("T")


class Memo:
    """Results computed once per key, by exactly one thread, kept until the audit ends."""

    def __init__(self) -> None:
        self._values: dict[Hashable, object] = {}
        self._guard = threading.Lock()
        self._locks: dict[Hashable, threading.Lock] = {}

    def lock_for(self, key: Hashable) -> threading.Lock:
        """The lock that serialises work on ``key`` (created on first use)."""
        with self._guard:
            lock = self._locks.get(key)
            if lock is None:
                lock = self._locks[key] = threading.Lock()
            return lock

    def once(self, key: Hashable, compute: Callable[[], T]) -> T:
        """``compute()`` run by exactly one thread, its result kept for the audit."""
        try:
            return self._values[key]  # type: ignore[return-value]
        except KeyError:
            pass
        with self.lock_for(key):
            if key not in self._values:
                self._values[key] = compute()
            return self._values[key]  # type: ignore[return-value]

    def get(self, key: Hashable) -> object | None:
        """The stored result for ``key``, or None when nothing is stored yet."""
        return self._values.get(key)

    def put(self, key: Hashable, value: object) -> None:
        """Store ``value`` for ``key`` (the caller holds the key's lock)."""
        with self._guard:
            self._values[key] = value


class MatrixCache:
    """LRU cache of large arrays bounded by their total bytes."""

    def __init__(self, budget: int) -> None:
        self.budget = budget
        self._items: OrderedDict[Hashable, np.ndarray] = OrderedDict()
        self._bytes = 0
        self._lock = threading.Lock()

    def get(self, key: Hashable) -> np.ndarray | None:
        """The cached array (now the most recently used), or None."""
        with self._lock:
            found = self._items.get(key)
            if found is not None:
                self._items.move_to_end(key)
            return found

    def put(self, key: Hashable, array: np.ndarray) -> None:
        """Keep ``array`` unless it alone exceeds the budget; evict the least recently used."""
        if array.nbytes > self.budget:
            return
        with self._lock:
            if key in self._items:
                return
            self._items[key] = array
            self._bytes += array.nbytes
            while self._bytes > self.budget and len(self._items) > 1:
                _, evicted = self._items.popitem(last=False)
                self._bytes -= evicted.nbytes

    def drop(self, predicate: Callable[[Hashable], bool]) -> None:
        """Forget every array whose key satisfies ``predicate``."""
        with self._lock:
            for key in [k for k in self._items if predicate(k)]:
                self._bytes -= self._items.pop(key).nbytes
