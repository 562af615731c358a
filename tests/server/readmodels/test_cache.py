"""The one cache mechanism of the read models and the web layer: bounded, LRU, thread safe."""

from __future__ import annotations

import threading
from functools import partial

import pytest

from server.readmodels.cache import BoundedCache


def test_bounded_cache_of_one_keeps_only_the_newest_key() -> None:
    cache: BoundedCache[str, int] = BoundedCache(size=1)
    cache.put("run-1", 1)
    cache.put("run-2", 2)
    assert cache.get("run-1") is None
    assert cache.get("run-2") == 2
    assert len(cache) == 1


def test_bounded_cache_drops_the_least_recently_used() -> None:
    cache: BoundedCache[str, int] = BoundedCache(size=2)
    cache.put("a", 1)
    cache.put("b", 2)
    assert cache.get("a") == 1  # a is now the most recent
    cache.put("c", 3)
    assert cache.get("b") is None
    assert (cache.get("a"), cache.get("c")) == (1, 3)


def test_bounded_cache_builds_once_per_key() -> None:
    cache: BoundedCache[tuple[object, ...], str] = BoundedCache(size=4)
    calls: list[tuple[object, ...]] = []

    def build(key: tuple[object, ...]) -> str:
        calls.append(key)
        return repr(key)

    for key in [(1, "x"), (1, "x"), (2, "x"), (1, "x")]:
        assert cache.get_or_build(key, partial(build, key)) == repr(key)
    assert calls == [(1, "x"), (2, "x")]


def test_bounded_cache_keeps_a_falsy_value() -> None:
    cache: BoundedCache[str, tuple[int, ...]] = BoundedCache(size=1)
    calls: list[int] = []

    def build() -> tuple[int, ...]:
        calls.append(1)
        return ()  # e.g. no active policy: empty, but an answer

    for _ in range(3):
        assert cache.get_or_build("none active", build) == ()
    assert calls == [1]


def test_bounded_cache_clear_forgets_everything() -> None:
    cache: BoundedCache[str, int] = BoundedCache(size=3)
    cache.put("a", 1)
    cache.clear()
    assert cache.get("a") is None and len(cache) == 0


def test_bounded_cache_refuses_a_size_below_one() -> None:
    with pytest.raises(ValueError, match="size must be >= 1, got 0"):
        BoundedCache(size=0)


def test_bounded_cache_stays_bounded_under_concurrent_writers() -> None:
    cache: BoundedCache[int, int] = BoundedCache(size=5)
    start = threading.Barrier(8)
    sizes: list[int] = []

    def write(offset: int) -> None:
        start.wait()
        for k in range(2000):
            key = offset * 10_000 + k % 50
            assert cache.get_or_build(key, partial(int, key)) == key
            sizes.append(len(cache))

    threads = [threading.Thread(target=write, args=(n,)) for n in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(sizes) == 8 * 2000 and max(sizes) <= 5
    assert len(cache) == 5
