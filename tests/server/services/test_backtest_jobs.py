"""Background backtest jobs kept in the database: any worker answers a poll, a dead worker's job
is shown as abandoned, a shutdown marks unfinished jobs. On SQLite and PostgreSQL.

Two :class:`BacktestJobs` on one database stand for two web worker processes. The expected
figures come from :func:`server.services.backtest.run_backtest` called directly (the job must
carry the service's result, not figures of its own).
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable, Iterator
from datetime import UTC, date, datetime, timedelta
from datetime import time as dtime
from pathlib import Path
from typing import NoReturn

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal
from sqlalchemy import func, select

from server.services import backtest_jobs
from server.services.backtest import run_backtest
from server.services.backtest_jobs import (
    KEEP_JOBS,
    BacktestJobs,
    JobStatus,
    UnknownJobError,
    decode_figures,
    encode_figures,
    figures_of,
)
from server.services.database import Database
from server.services.observations import MeasureRecord, VintageWriter, define_measures
from server.services.regions import RegionRecord, store_regions
from server.services.ruleset_activation import store_ruleset
from server.services.ruleset_cache import parsed
from server.services.rulesets import default_ruleset_path
from server.store import make_sessionmaker, scratch_engine, upgrade
from server.store.models import BacktestJob
from server.store.models import Ruleset as RulesetRow
from tests.conftest import BACKENDS, POSTGRES_URL

WAIT = 60.0
CODES = ("J01", "J02", "J03", "J04")


def _seed(db: Database) -> int:
    """Four invented districts with 70 days of counts and the demo policy; its version id."""
    rng = np.random.default_rng(11)
    records = [RegionRecord(code="JC", name="Job county", level="county", parent=None,
                            population=400_000)]
    records += [RegionRecord(code=c, name=f"Jobdistrict {c}", level="district", parent="JC",
                             population=100_000) for c in CODES]
    end = date(2030, 3, 31)
    days = [end - timedelta(days=k) for k in range(69, -1, -1)]
    measures = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")
    with db.transaction() as s:
        define_measures(session=s, measures=[
            MeasureRecord(name=m, unit="count", kind="count", aggregation="sum")
            for m in (*measures, "icu_occupied", "icu_staffed", "ww_concentration", "ww_flow")])
        store_regions(session=s, records=records, actor="test", source="test")
    with db.transaction() as s:
        writer = VintageWriter(session=s, feed="test")
        for j, day in enumerate(days):
            frames = [pd.DataFrame({
                "region": list(CODES), "measure": m, "ref_date": day.isoformat(),
                "value": rng.poisson(lam * (1 + 2 * j / len(days)), len(CODES)).astype(float)})
                for m, lam in zip(measures, (60, 900, 80, 4, 50), strict=True)]
            writer.append(pd.concat(frames),
                          received_at=datetime.combine(day + timedelta(days=1), dtime(5), UTC))
    with db.transaction() as s:
        return store_ruleset(session=s, path=default_ruleset_path(None), author="test",
                             activate=True).id


@pytest.fixture(scope="module", params=BACKENDS)
def seeded(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[tuple[Database, int]]:
    if request.param == "sqlite":
        path: Path = tmp_path_factory.mktemp("jobs") / "jobs.db"
        url = f"sqlite:///{path}"
    else:
        assert POSTGRES_URL is not None
        url = POSTGRES_URL
    with scratch_engine(url, prefix="tw_jobs") as engine:
        upgrade(engine)
        db = Database(engine=engine, sessions=make_sessionmaker(engine))
        yield db, _seed(db)


@pytest.fixture()
def workers(seeded: tuple[Database, int]) -> Iterator[tuple[BacktestJobs, BacktestJobs]]:
    db, _rid = seeded
    first, second = BacktestJobs(db), BacktestJobs(db)
    yield first, second
    first.close()
    second.close()


def _start(jobs: BacktestJobs, db: Database, rid: int, **kw: object) -> str:
    with db.transaction() as s:
        return jobs.start(session=s, ruleset_id=rid, user="ada.analyst", **kw)  # type: ignore[arg-type]


def _status(jobs: BacktestJobs, db: Database, job_id: str) -> JobStatus:
    with db.transaction() as s:
        return jobs.status(session=s, job_id=job_id)


def _until(jobs: BacktestJobs, db: Database, job_id: str,
           done: Callable[[JobStatus], bool]) -> JobStatus:
    deadline = time.monotonic() + WAIT
    while not done(st := _status(jobs, db, job_id)):
        assert time.monotonic() < deadline, f"job never got there: {st}"
        time.sleep(0.05)
    return st


class Stall:
    """A stand-in for run_backtest: reports ``days`` days, then waits for ``release``."""

    def __init__(self, days: int = 10) -> None:
        self.days = days
        self.release = threading.Event()

    def __call__(self, *, progress: Callable[[int], None], **_kw: object) -> NoReturn:
        progress(self.days)
        self.release.wait(WAIT)
        progress(1)  # raises when the registry is closing
        raise ValueError("invented failure for the test")


@pytest.mark.slow
def test_job_started_on_one_worker_is_answered_by_the_other(
    seeded: tuple[Database, int], workers: tuple[BacktestJobs, BacktestJobs]
) -> None:
    db, rid = seeded
    first, second = workers
    job_id = _start(first, db, rid)
    got = _until(second, db, job_id, lambda s: s.finished)
    assert got.state == "done", got.error
    assert got.done == got.total
    assert got.user == "ada.analyst"
    with db.transaction() as s:
        row = s.get(RulesetRow, rid)
        assert row is not None
        want = figures_of(run_backtest(session=s, ruleset=parsed(row)), ruleset_id=rid,
                          status=row.status)
    (fig,) = got.results
    assert_array_equal(fig.tier, want.tier)
    assert fig.changes_per_year == pytest.approx(want.changes_per_year, nan_ok=True)
    assert fig.tier_shares == pytest.approx(want.tier_shares)
    assert [r.code for r in fig.regions] == [r.code for r in want.regions]
    assert [r.tier_changes for r in fig.regions] == [r.tier_changes for r in want.regions]
    with db.transaction() as s:
        assert [j.id for j in second.recent(session=s)][:1] == [job_id]


def test_progress_and_failure_are_seen_by_the_other_worker(
    seeded: tuple[Database, int], workers: tuple[BacktestJobs, BacktestJobs],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    db, rid = seeded
    first, second = workers
    stall = Stall(days=10)
    monkeypatch.setattr(backtest_jobs, "run_backtest", stall)
    job_id = _start(first, db, rid)
    running = _until(second, db, job_id, lambda s: s.done == 10)
    assert running.state == "running"
    assert running.total > 10
    stall.release.set()
    failed = _until(second, db, job_id, lambda s: s.finished)
    assert failed.state == "failed"
    assert failed.error == "ValueError: invented failure for the test"


def test_job_of_a_dead_worker_is_shown_abandoned(
    seeded: tuple[Database, int], workers: tuple[BacktestJobs, BacktestJobs]
) -> None:
    db, rid = seeded
    _first, second = workers
    beat = datetime.now(UTC) - timedelta(seconds=backtest_jobs.ABANDON_AFTER_SECONDS + 5)
    with db.transaction() as s:  # what a killed process leaves behind
        s.add(BacktestJob(id="deadbeef" * 4, ruleset_id=rid, as_known=False,
                          user_name="ada.analyst", created_at=beat, state="running", done=40,
                          total=70, worker="gone-host:4242:0000", heartbeat_at=beat))
    got = _status(second, db, "deadbeef" * 4)
    assert got.state == "failed" and got.finished
    assert got.error is not None and got.error.startswith("abandoned: the server process")


def test_running_job_is_abandoned_only_after_the_timeout(
    seeded: tuple[Database, int], workers: tuple[BacktestJobs, BacktestJobs],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    db, rid = seeded
    first, _second = workers
    stall = Stall()
    monkeypatch.setattr(backtest_jobs, "run_backtest", stall)
    job_id = _start(first, db, rid)
    _until(first, db, job_id, lambda s: s.done == 10)
    soon = datetime.now(UTC) + timedelta(seconds=backtest_jobs.ABANDON_AFTER_SECONDS / 2)
    late = datetime.now(UTC) + timedelta(seconds=backtest_jobs.ABANDON_AFTER_SECONDS + 1)
    assert _status(BacktestJobs(db, clock=lambda: soon), db, job_id).state == "running"
    assert _status(BacktestJobs(db, clock=lambda: late), db, job_id).state == "failed"
    stall.release.set()


def test_heartbeat_keeps_a_silent_job_alive(
    seeded: tuple[Database, int], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A job that reports no progress for longer than the timeout is kept alive by the
    heartbeat of its process."""
    db, rid = seeded
    stall = Stall()
    monkeypatch.setattr(backtest_jobs, "run_backtest", stall)
    quick = BacktestJobs(db, heartbeat=0.05, abandon_after=0.5)
    try:
        job_id = _start(quick, db, rid)
        _until(quick, db, job_id, lambda s: s.done == 10)
        time.sleep(1.0)  # twice the timeout without progress
        assert _status(quick, db, job_id).state == "running"
    finally:
        stall.release.set()
        quick.close()


def test_close_marks_running_and_queued_jobs_stopped(
    seeded: tuple[Database, int], monkeypatch: pytest.MonkeyPatch
) -> None:
    db, rid = seeded
    stall = Stall()
    monkeypatch.setattr(backtest_jobs, "run_backtest", stall)
    jobs = BacktestJobs(db)
    running = _start(jobs, db, rid)
    queued = _start(jobs, db, rid)
    _until(jobs, db, running, lambda s: s.done == 10)
    assert _status(jobs, db, queued).state == "queued"
    threading.Timer(0.2, stall.release.set).start()
    jobs.close()
    reader = BacktestJobs(db)
    for job_id in (running, queued):
        got = _status(reader, db, job_id)
        assert (got.state, got.error) == ("failed", "stopped: the server shut down")


def test_unknown_job_is_refused(
    seeded: tuple[Database, int], workers: tuple[BacktestJobs, BacktestJobs]
) -> None:
    db, _rid = seeded
    with pytest.raises(UnknownJobError, match="no backtest job 'nosuchjob'"):
        _status(workers[1], db, "nosuchjob")


def test_only_the_newest_finished_jobs_are_kept(
    seeded: tuple[Database, int], workers: tuple[BacktestJobs, BacktestJobs],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    db, rid = seeded
    first, _second = workers
    old = datetime(2030, 1, 1, tzinfo=UTC)
    with db.transaction() as s:
        s.execute(BacktestJob.__table__.delete())
        for k in range(KEEP_JOBS + 5):
            at = old + timedelta(minutes=k)
            s.add(BacktestJob(id=f"old{k:029d}", ruleset_id=rid, as_known=False, user_name="",
                              created_at=at, state="done", done=1, total=1, worker="w",
                              heartbeat_at=at))
    stall = Stall()
    monkeypatch.setattr(backtest_jobs, "run_backtest", stall)
    job_id = _start(first, db, rid)
    stall.release.set()
    with db.transaction() as s:
        kept = set(s.scalars(select(BacktestJob.id)))
        assert s.scalar(select(func.count()).select_from(BacktestJob)) == KEEP_JOBS + 1
    assert job_id in kept
    assert f"old{KEEP_JOBS + 4:029d}" in kept and "old" + "0" * 29 not in kept


def test_figures_survive_the_stored_form(seeded: tuple[Database, int]) -> None:
    db, rid = seeded
    with db.transaction() as s:
        row = s.get(RulesetRow, rid)
        assert row is not None
        fig = figures_of(run_backtest(session=s, ruleset=parsed(row), as_known=True),
                         ruleset_id=rid, status=row.status)
    (back,) = decode_figures(encode_figures([fig]))
    assert_array_equal(back.tier, fig.tier)
    assert back.tier.dtype == fig.tier.dtype
    for name in ("ruleset_id", "name", "version", "status", "tier_names", "as_known", "start",
                 "end", "escalations", "leads", "episodes", "unfollowed", "regions"):
        assert getattr(back, name) == getattr(fig, name), name
    for name in ("changes_per_year", "preceded_share", "median_lead", "seconds"):
        assert getattr(back, name) == pytest.approx(getattr(fig, name), nan_ok=True), name
