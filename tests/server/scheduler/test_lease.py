"""The scheduler's leader lease: one holder at a time, takeover when the holder dies or lets go.

Each test runs on SQLite (the lease row) and, with ``TIERWISE_TEST_POSTGRES_URL``, on PostgreSQL
(the advisory lock) through the ``committed_db`` fixture.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

from server.scheduler.lease import LeaderLease
from server.services.database import Database


def test_lease_second_holder_waits(committed_db: Database) -> None:
    first = LeaderLease(committed_db, name="t", holder="one", ttl_seconds=5)
    second = LeaderLease(committed_db, name="t", holder="two", ttl_seconds=5)
    try:
        assert (first.acquire(), second.acquire(), first.acquire()) == (True, False, True)
    finally:
        first.release()
        second.release()


def test_lease_taken_over_when_holder_dies(committed_db: Database) -> None:
    first = LeaderLease(committed_db, name="t", holder="one", ttl_seconds=1)
    second = LeaderLease(committed_db, name="t", holder="two", ttl_seconds=1)
    t0 = datetime.now(UTC)
    assert first.acquire(t0)
    first.abandon()  # PostgreSQL: the lock goes with the holder's connection
    assert second.acquire(t0 + timedelta(seconds=2))  # SQLite: the row expired
    second.release()


def test_lease_released_lets_other_in_at_once(committed_db: Database) -> None:
    first = LeaderLease(committed_db, name="t", holder="one", ttl_seconds=60)
    second = LeaderLease(committed_db, name="t", holder="two", ttl_seconds=60)
    assert first.acquire()
    first.release()
    assert second.acquire()
    second.release()
