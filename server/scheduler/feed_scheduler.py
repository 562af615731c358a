"""The feed scheduler: APScheduler 3.x with its job store in the application database, one leader.

Every instance (each web worker, or ``tierwise scheduler``) runs a small watch thread that tries to
take the leader lease every ``tick_seconds``. Only the leader starts APScheduler and runs jobs; when
it stops renewing (it died, or lost its database connection) another instance takes the lease and
starts its own APScheduler on the same job store. Jobs coalesce and have no misfire grace limit:
runs missed while no instance was up are run once, as soon as a leader is back.

Jobs are synchronised from the feed catalogue when an instance becomes leader: a job whose trigger
is unchanged keeps its stored next run time (so a missed run is not forgotten); a changed one is
replaced; jobs of feeds no longer configured are removed. A new leader also runs one catch-up
evaluation at once (:func:`server.scheduler.jobs.catch_up_evaluation`): data a killed process
landed but did not evaluate are evaluated before the next feed run.
"""

from __future__ import annotations

import logging
import os
import socket
import threading
import uuid
from collections.abc import Mapping
from datetime import UTC
from zoneinfo import ZoneInfo

from apscheduler.jobstores.sqlalchemy import SQLAlchemyJobStore
from apscheduler.schedulers.background import BackgroundScheduler
from apscheduler.triggers.base import BaseTrigger
from apscheduler.triggers.cron import CronTrigger
from apscheduler.triggers.interval import IntervalTrigger

from server.scheduler.jobs import (
    CATCH_UP_FUNCTION,
    JOB_FUNCTION,
    Runtime,
    register,
    unregister,
)
from server.scheduler.lease import LeaderLease
from server.services.database import Database

log = logging.getLogger(__name__)

LEASE_NAME = "tierwise-scheduler"
JOB_TABLE = "apscheduler_jobs"
CATCH_UP_JOB = "evaluate:catch-up"


class SharedEngineJobStore(SQLAlchemyJobStore):  # type: ignore[misc]
    """APScheduler's SQLAlchemy job store, except that it leaves the application's engine alone
    on shutdown (the stock store disposes the engine it was given)."""

    def shutdown(self) -> None:
        return None


def trigger_of(schedule: object) -> BaseTrigger:
    """The APScheduler trigger of a feed's :class:`~server.feeds.definition.Schedule`."""
    zone = ZoneInfo(schedule.timezone)  # type: ignore[attr-defined]
    cron = schedule.cron  # type: ignore[attr-defined]
    if cron is not None:
        return CronTrigger.from_crontab(cron, timezone=zone)
    interval = schedule.interval  # type: ignore[attr-defined]
    return IntervalTrigger(seconds=interval.total_seconds(), timezone=zone)


class FeedScheduler:
    """One scheduler instance; ``start()`` joins the election, ``stop()`` leaves it."""

    def __init__(
        self, db: Database, *, catalogue: object, time_zone: str = "UTC",
        environ: Mapping[str, str] | None = None, retry: object | None = None,
        lease_seconds: float = 30.0, tick_seconds: float | None = None,
        holder: str | None = None, notify: object | None = None,
    ) -> None:
        self.db = db
        self.catalogue = catalogue
        self.holder = holder or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
        self.tick = tick_seconds if tick_seconds is not None else lease_seconds / 3
        if not 0 < self.tick < lease_seconds:
            raise ValueError(
                f"tick_seconds must be in (0, lease_seconds={lease_seconds}), got {self.tick}"
            )
        self.lease = LeaderLease(db, name=LEASE_NAME, holder=self.holder,
                                 ttl_seconds=lease_seconds)
        self.runtime = Runtime(db=db, catalogue=catalogue, time_zone=time_zone,
                               environ=dict(environ or {}), retry=retry, notify=notify)
        self._aps: BackgroundScheduler | None = None
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self.is_leader = False

    # -- life cycle ---------------------------------------------------------------------------

    def start(self) -> None:
        register(self.holder, self.runtime)
        self._stop.clear()
        self._thread = threading.Thread(target=self._watch, name="tierwise-leader", daemon=True)
        self._thread.start()

    def stop(self, *, release: bool = True) -> None:
        """Stop; ``release=False`` simulates a crash (the lease is left to expire)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=30)
            self._thread = None
        self._stop_aps()
        if release and self.is_leader:
            self.lease.release()
        elif not release:
            self.lease.abandon()  # as if the process had died
        self.is_leader = False
        unregister(self.holder)

    def step(self) -> bool:
        """One election round (the watch thread calls it every tick); returns leadership."""
        try:
            leader = self.lease.acquire()
        except Exception:  # database unreachable: certainly not the leader
            log.exception("scheduler %s: lease check failed", self.holder)
            leader = False
        if leader and self._aps is None:
            log.info("scheduler %s is now the leader", self.holder)
            self._start_aps()
        elif not leader and self._aps is not None:
            log.warning("scheduler %s lost the lease; stopping its jobs", self.holder)
            self._stop_aps()
        self.is_leader = leader
        return leader

    def _watch(self) -> None:
        while not self._stop.is_set():
            self.step()
            self._stop.wait(self.tick)

    # -- APScheduler --------------------------------------------------------------------------

    def _start_aps(self) -> None:
        aps = BackgroundScheduler(
            jobstores={"default": SharedEngineJobStore(engine=self.db.engine, tablename=JOB_TABLE)},
            job_defaults={"coalesce": True, "misfire_grace_time": None, "max_instances": 1},
            timezone=UTC,
        )
        aps.start(paused=True)
        self._sync_jobs(aps)
        aps.resume()
        self._aps = aps

    def _stop_aps(self) -> None:
        if self._aps is not None:
            try:
                self._aps.shutdown(wait=True)
            finally:
                self._aps = None

    def _sync_jobs(self, aps: BackgroundScheduler) -> None:
        wanted = {}
        for feed in self.catalogue:  # type: ignore[attr-defined]
            if feed.schedule is not None:
                wanted[f"feed:{feed.name}"] = (feed.name, trigger_of(feed.schedule))
        for job in aps.get_jobs():
            if job.id not in wanted:
                aps.remove_job(job.id)
        for job_id, (name, trigger) in wanted.items():
            existing = aps.get_job(job_id)
            if existing is not None and str(existing.trigger) == str(trigger):
                aps.modify_job(job_id, args=[self.holder, name])
                continue
            aps.add_job(
                JOB_FUNCTION, trigger=trigger, args=[self.holder, name], id=job_id,
                name=f"pull {name}", replace_existing=True,
            )
        # once, now (a date trigger without a date): evaluate what a killed process left
        aps.add_job(CATCH_UP_FUNCTION, trigger="date", args=[self.holder], id=CATCH_UP_JOB,
                    name="catch-up evaluation", replace_existing=True)

    def next_runs(self) -> dict[str, object]:
        """Job id -> next run time (only on the leader)."""
        if self._aps is None:
            return {}
        return {job.id: job.next_run_time for job in self._aps.get_jobs()}
