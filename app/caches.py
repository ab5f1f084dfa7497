"""Process-wide caches, each bounded in bytes (least recently used out first).

Built on ``cachetools.LRUCache`` with a ``getsizeof`` that estimates what a value holds: bytes
and text by length, numpy arrays by ``nbytes``, containers by their items, objects with a
``__dict__`` or dataclass fields by those. Thread-safe: the server answers requests on several
threads. A value larger than the whole cache is not kept.
"""

from __future__ import annotations

import dataclasses
import sys
import threading
from collections.abc import Callable, Hashable
from typing import Any

import numpy as np
from cachetools import LRUCache

MB = 1024 * 1024


def size_of(value: Any, _depth: int = 0) -> int:
    """Bytes a cached value holds (an estimate that counts array buffers and text in full)."""
    if isinstance(value, bytes | bytearray | str):
        return sys.getsizeof(value)
    if isinstance(value, np.ndarray):
        return int(value.nbytes) + 112
    if _depth > 6:
        return sys.getsizeof(value)
    if isinstance(value, dict):
        return sys.getsizeof(value) + sum(size_of(k, _depth + 1) + size_of(v, _depth + 1)
                                          for k, v in value.items())
    if isinstance(value, list | tuple | set | frozenset):
        return sys.getsizeof(value) + sum(size_of(v, _depth + 1) for v in value)
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return 64 + sum(size_of(getattr(value, f.name), _depth + 1)
                        for f in dataclasses.fields(value))
    if hasattr(value, "__dict__"):
        return 64 + size_of(vars(value), _depth + 1)
    return sys.getsizeof(value)


class ByteCache:
    """A thread-safe LRU cache holding at most ``max_bytes`` of values (``size_of``)."""

    def __init__(self, max_bytes: int, sizeof: Callable[[Any], int] = size_of):
        self.max_bytes = int(max_bytes)
        self._data: LRUCache = LRUCache(maxsize=max(1, self.max_bytes), getsizeof=sizeof)
        self._lock = threading.Lock()
        self.hits = self.misses = 0

    def get(self, key: Hashable) -> Any:
        with self._lock:
            value = self._data.get(key)
            if value is None:
                self.misses += 1
            else:
                self.hits += 1
            return value

    def put(self, key: Hashable, value: Any) -> None:
        with self._lock:
            try:
                self._data[key] = value
            except ValueError:  # larger than the whole cache: not kept
                self._data.pop(key, None)

    def get_or_build(self, key: Hashable, build: Callable[[], Any]) -> Any:
        found = self.get(key)
        if found is None:
            found = build()
            self.put(key, found)
        return found

    @property
    def bytes(self) -> int:
        with self._lock:
            return int(self._data.currsize)

    def clear(self) -> None:
        with self._lock:
            self._data.clear()

    def __len__(self) -> int:
        with self._lock:
            return len(self._data)
