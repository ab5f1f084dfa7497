"""Byte-bounded caches: a budget in bytes, least recently used out first, arrays counted."""

from __future__ import annotations

import numpy as np

from app.caches import ByteCache, size_of


def test_arrays_count_by_their_buffers_and_the_budget_holds():
    cache = ByteCache(3 * 8_002_000)
    for i in range(5):
        cache.put(i, {"values": np.zeros(1_000_000)})  # 8 MB each
    assert cache.bytes <= cache.max_bytes
    assert len(cache) == 3 and cache.get(0) is None and cache.get(4) is not None


def test_least_recently_used_leaves_first_and_oversized_values_are_not_kept():
    cache = ByteCache(300, sizeof=len)
    cache.put("a", b"a" * 100)
    cache.put("b", b"b" * 100)
    cache.get("a")
    cache.put("c", b"c" * 150)
    assert cache.get("b") is None and cache.get("a") is not None
    cache.put("huge", b"x" * 301)
    assert cache.get("huge") is None and cache.get("a") is not None


def test_get_or_build_builds_once():
    cache, calls = ByteCache(10_000), []
    for _ in range(3):
        cache.get_or_build("k", lambda: calls.append(1) or [1, 2, 3])
    assert calls == [1]


def test_sizes_grow_with_what_objects_hold():
    small, large = size_of({"a": "x" * 10}), size_of({"a": "x" * 10_000})
    assert large - small >= 9_990
    assert size_of([np.zeros(1000)]) >= 8000
