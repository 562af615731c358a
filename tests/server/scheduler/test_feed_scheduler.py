"""The scheduler: real APScheduler runs, takeover by a second instance, a simulated day of pulls."""

from __future__ import annotations

import time
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
from apscheduler.schedulers.background import BackgroundScheduler
from sqlalchemy import func, select

from server.feeds.definition import load_feeds, parse_feeds
from server.feeds.sources import Payload, RetryPolicy
from server.scheduler.feed_scheduler import (
    JOB_TABLE,
    FeedScheduler,
    SharedEngineJobStore,
    trigger_of,
)
from server.services.database import Database
from server.services.evaluation import evaluation_behind
from server.services.feed_runs import run_feed
from server.services.feed_state import ingest_recorded
from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.models import FeedState, Vintage
from tests.server.conftest import cases_csv, seed_small_office

FAST = RetryPolicy(attempts=2, first_wait=0.0, max_wait=0.0)


def catalogue(url: str, schedule: str):  # type: ignore[no-untyped-def]
    return parse_feeds(
        f"feeds:\n  - name: pulled\n    source: {{kind: http, url: '{url}'}}\n"
        f"    measures: [cases]\n    schedule: {schedule}\n", source="t.yaml")


def seed(db: Database) -> None:
    with db.transaction() as session:
        upsert_regions(session=session, records=[RegionRecord(
            code="SA", name="Sorrelmead", level="district", parent=None, population=100)])
        upsert_measures(session=session, records=[
            MeasureRecord(name="cases", unit="n", kind="count", aggregation="sum")])


def vintages(db: Database) -> int:
    with db.sessions() as session:
        return int(session.scalar(select(func.count()).select_from(Vintage)) or 0)


def wait_for(predicate, timeout: float = 8.0) -> bool:  # type: ignore[no-untyped-def]
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if predicate():
            return True
        time.sleep(0.05)
    return False


def test_simulated_day_of_hourly_pulls(committed_db: Database, feed_server) -> None:  # type: ignore[no-untyped-def]
    seed(committed_db)
    feed = catalogue(feed_server.url, "{cron: '0 * * * *', timezone: UTC}")["pulled"]
    trigger = trigger_of(feed.schedule)
    start = datetime(2026, 3, 2, 0, 0, tzinfo=UTC)
    fire = trigger.get_next_fire_time(None, start - timedelta(seconds=1))
    runs = []
    while fire < start + timedelta(days=1):
        if fire.hour in (6, 18):  # the source publishes a corrected file twice a day
            feed_server.publish(
                f"region,date,measure,value\nSA,2026-03-01,cases,{fire.hour}\n".encode())
        runs.append(run_feed(committed_db, feed=feed, now=fire, policy=FAST, evaluate=False))
        fire = trigger.get_next_fire_time(fire, fire + timedelta(seconds=1))
    assert len(runs) == 24
    assert sum(r.landed for r in runs) == 3 == vintages(committed_db)
    assert sum(r.not_modified for r in runs) == 21
    with committed_db.sessions() as session:
        state = session.get(FeedState, "pulled")
        assert state.last_success_at == datetime(2026, 3, 2, 23, tzinfo=UTC)


def test_scheduler_one_leader_pulls_and_other_takes_over(  # type: ignore[no-untyped-def]
    committed_db: Database, feed_server
) -> None:
    seed(committed_db)
    cat = catalogue(feed_server.url, "{interval: 0.3s, timezone: UTC}")
    a = FeedScheduler(committed_db, catalogue=cat, retry=FAST, lease_seconds=1.0,
                      tick_seconds=0.2, holder="a")
    b = FeedScheduler(committed_db, catalogue=cat, retry=FAST, lease_seconds=1.0,
                      tick_seconds=0.2, holder="b")
    a.start()
    assert wait_for(lambda: a.is_leader)
    b.start()
    try:
        assert wait_for(lambda: feed_server.requests >= 2)
        assert (a.is_leader, b.is_leader) == (True, False)
        assert vintages(committed_db) == 1  # later pulls answered 304: no new vintage
        a.stop(release=False)  # dies without releasing
        assert wait_for(lambda: b.is_leader)
        feed_server.publish(b"region,date,measure,value\nSA,2026-03-01,cases,2\n")
        assert wait_for(lambda: vintages(committed_db) == 2)
    finally:
        a.stop()
        b.stop()


def test_scheduler_tick_must_be_shorter_than_lease(committed_db: Database) -> None:
    with pytest.raises(ValueError, match="tick_seconds must be in"):
        FeedScheduler(committed_db, catalogue=catalogue("http://x/y", "{interval: 1h}"),
                      lease_seconds=1.0, tick_seconds=2.0)


def test_scheduler_missed_runs_after_downtime_run_once(  # type: ignore[no-untyped-def]
    committed_db: Database, feed_server
) -> None:
    # An hourly feed whose scheduler was down for five hours: the stored job's next run time lies
    # five hours back. Coalescing runs the missed pulls once on restart, not five times.
    seed(committed_db)
    cat = catalogue(feed_server.url, "{interval: 1h, timezone: UTC}")
    first = FeedScheduler(committed_db, catalogue=cat, retry=FAST, lease_seconds=1.0,
                          tick_seconds=0.2, holder="first")
    first.start()
    assert wait_for(lambda: "feed:pulled" in first.next_runs())
    first.stop()
    # Rewrite the stored job as a scheduler that never started would have left it.
    store = SharedEngineJobStore(engine=committed_db.engine, tablename=JOB_TABLE)
    store.start(BackgroundScheduler(timezone=UTC), "default")
    job = store.lookup_job("feed:pulled")
    job.next_run_time = datetime.now(UTC) - timedelta(hours=5)
    store.update_job(job)
    assert feed_server.requests == 0
    again = FeedScheduler(committed_db, catalogue=cat, retry=FAST, lease_seconds=1.0,
                          tick_seconds=0.2, holder="again")
    again.start()
    try:
        assert wait_for(lambda: feed_server.requests >= 1)
        time.sleep(1.0)  # any further catch-up runs would come at once
        assert feed_server.requests == 1
        assert vintages(committed_db) == 1
        next_run = again.next_runs()["feed:pulled"]
        assert next_run > datetime.now(UTC)  # type: ignore[operator]
    finally:
        again.stop()


def test_new_leader_evaluates_data_left_unevaluated(committed_db: Database,
                                                    tmp_path: Path) -> None:
    # A vintage landed by a process killed before its evaluation: the next leader catches up.
    feeds = load_feeds(seed_small_office(committed_db, tmp_path))
    ingest_recorded(committed_db, feed=feeds["long-csv"],
                    payload=Payload.from_bytes("push", cases_csv(20)), evaluate=False)

    def behind() -> bool:
        with committed_db.sessions() as session:
            return evaluation_behind(session=session) is not None

    assert behind()
    leader = FeedScheduler(committed_db, catalogue=feeds, lease_seconds=1.0, tick_seconds=0.2,
                           holder="catch-up")
    leader.start()
    try:
        assert wait_for(lambda: not behind(), timeout=60)
    finally:
        leader.stop()
