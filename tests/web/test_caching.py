"""The worker's stamp memo: reuse within its TTL, forgetting on invalidation."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from server.readmodels.pages import PublicStamp
from web.caching import PageCache, StampMemo


class Clock:
    def __init__(self) -> None:
        self.now = 50.0

    def __call__(self) -> float:
        return self.now


class Loader:
    """Returns stamp ``s1``, ``s2``, ... on successive calls; ``during`` runs inside a call."""

    def __init__(self, during: object = None) -> None:
        self.calls = 0
        self.during = during

    def __call__(self) -> PublicStamp:
        self.calls += 1
        if callable(self.during):
            self.during()
        return PublicStamp(key=f"s{self.calls}", last_modified=datetime(2030, 1, 1, tzinfo=UTC))


def test_stamp_memo_reuses_stamp_within_ttl() -> None:
    clock, load = Clock(), Loader()
    memo = StampMemo(ttl=1.0, clock=clock)
    assert memo.fresh() is None
    assert memo.read(load).key == "s1"
    clock.now += 0.99
    assert memo.read(load).key == "s1"
    assert memo.fresh() is not None
    assert load.calls == 1


def test_stamp_memo_reads_again_after_ttl() -> None:
    clock, load = Clock(), Loader()
    memo = StampMemo(ttl=1.0, clock=clock)
    memo.read(load)
    clock.now += 1.0
    assert memo.fresh() is None
    assert memo.read(load).key == "s2"


def test_stamp_memo_invalidate_forgets_at_once() -> None:
    clock, load = Clock(), Loader()
    memo = StampMemo(ttl=1.0, clock=clock)
    memo.read(load)
    memo.invalidate()
    assert memo.fresh() is None
    assert memo.read(load).key == "s2"


def test_stamp_memo_does_not_keep_a_read_overtaken_by_invalidation() -> None:
    """A read that began before a change was committed and forgotten must not be kept."""
    clock = Clock()
    memo = StampMemo(ttl=1.0, clock=clock)
    racing = Loader(during=memo.invalidate)
    assert memo.read(racing).key == "s1"  # the caller still gets its answer
    assert memo.fresh() is None


def test_stamp_memo_ttl_zero_never_reuses() -> None:
    load = Loader()
    memo = StampMemo(ttl=0.0, clock=Clock())
    memo.read(load)
    memo.read(load)
    assert load.calls == 2


def test_stamp_memo_refuses_negative_ttl() -> None:
    with pytest.raises(ValueError, match="ttl must be >= 0, got -1"):
        StampMemo(ttl=-1)


def test_page_cache_drops_least_recently_used() -> None:
    cache = PageCache(size=2)
    cache.put("a", (b"a", "text/html", 200))
    cache.put("b", (b"b", "text/html", 200))
    assert cache.get("a") is not None  # a is now the most recent
    cache.put("c", (b"c", "text/html", 200))
    assert cache.get("b") is None
    assert cache.get("a") == (b"a", "text/html", 200)
