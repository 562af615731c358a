"""Use case: backtests started from the staff pages, run in the background with progress.

A job's state lives in the application database (table ``backtest_job``), so that every web
worker answers a progress poll, whichever worker runs the job. :class:`BacktestJobs` (one per
app, on ``app.state``) runs the jobs *started through it* one at a time in a worker thread, each
replay with its own database session, and writes as it goes: ``running``, the days replayed
(:func:`server.services.backtest.run_backtest`'s ``progress`` callback, summed over the
rulesets of the job), then ``done`` with the page's figures, or ``failed`` with the cause.

While a job is queued or running, its process refreshes ``heartbeat_at`` every
:data:`HEARTBEAT_SECONDS` from a small thread of its own (independent of how long a block of
days takes). A job whose heartbeat is older than :data:`ABANDON_AFTER_SECONDS` (its process
died or was killed) is shown as failed ("abandoned") instead of running forever; a server that
shuts down marks its unfinished jobs as stopped. Only the newest :data:`KEEP_JOBS` finished or
abandoned jobs are kept.

The figures of a finished job are stored as zlib-compressed JSON (format :data:`RESULTS_FORMAT`):
the summaries as numbers and the tier strip (regions x days, -1..N) as int8 bytes in base64.
"""

from __future__ import annotations

import base64
import json
import logging
import os
import socket
import threading
import uuid
import zlib
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import delete, or_, select, update
from sqlalchemy.orm import Session

from server.services.backtest import BacktestResult, data_span, run_backtest
from server.services.database import Database
from server.services.errors import ServiceError
from server.services.policies import UnknownPolicyError
from server.services.ruleset_cache import parsed
from server.store.models import BacktestJob
from server.store.models import Ruleset as RulesetRow

__all__ = [
    "ABANDON_AFTER_SECONDS",
    "HEARTBEAT_SECONDS",
    "KEEP_JOBS",
    "BacktestJobs",
    "JobStatus",
    "RegionFigures",
    "RulesetFigures",
    "TierChange",
    "UnknownJobError",
    "decode_figures",
    "encode_figures",
    "figures_of",
]

log = logging.getLogger(__name__)

#: Finished (or abandoned) jobs kept in the database; the oldest are deleted first.
KEEP_JOBS = 20
#: Seconds between two heartbeats of a queued or running job.
HEARTBEAT_SECONDS = 10.0
#: Seconds without a heartbeat after which a queued or running job counts as abandoned
#: (six missed heartbeats; common practice, no source).
ABANDON_AFTER_SECONDS = 60.0
RESULTS_FORMAT = 1
DAYS_PER_YEAR = 365.25
UNFINISHED = ("queued", "running")


class UnknownJobError(ServiceError, LookupError):
    def __init__(self, job_id: str) -> None:
        super().__init__(f"job_id: no backtest job {job_id!r}")


class _Cancelled(Exception):
    """Raised inside a job's progress callback when the registry shuts down."""


@dataclass(frozen=True, kw_only=True)
class TierChange:
    day: date
    old: int
    new: int


@dataclass(frozen=True, kw_only=True)
class RegionFigures:
    """One district's figures of a replay."""

    code: str
    name: str
    changes: int
    changes_per_year: float
    days_in_tier: tuple[int, ...]  # index 0: insufficient data, then tiers 0..N
    escalations: int
    preceded: int
    leads: tuple[int, ...]
    tier_changes: tuple[TierChange, ...]


@dataclass(frozen=True, kw_only=True, eq=False)
class RulesetFigures:
    """What the backtest page shows of one ruleset's replay.

    ``tier`` is the tier in force, shape (regions, days) over ``start..end`` (-1: insufficient
    data), rows in the order of ``regions``.
    """

    ruleset_id: int
    name: str
    version: str
    status: str
    tier_names: tuple[str, ...]
    as_known: bool
    start: date
    end: date
    seconds: float
    changes_per_year: float
    tier_shares: tuple[float, ...]  # insufficient data, then tiers 0..N
    escalations: int
    preceded_share: float
    median_lead: float
    leads: tuple[int, ...]
    episodes: int
    unfollowed: int
    regions: tuple[RegionFigures, ...]
    tier: NDArray[np.int64]

    @property
    def n_tiers(self) -> int:
        return len(self.tier_names)


@dataclass(frozen=True, kw_only=True)
class JobStatus:
    """A snapshot of a job; ``state`` is queued, running, done or failed (an abandoned job is
    failed, its ``error`` says so). ``results`` is filled by :meth:`BacktestJobs.status` of a
    finished job only."""

    id: str
    ruleset_id: int
    compare_id: int | None
    as_known: bool
    user: str
    created_at: datetime
    state: str
    done: int
    total: int
    error: str | None
    results: tuple[RulesetFigures, ...]

    @property
    def fraction(self) -> float:
        return min(1.0, self.done / self.total) if self.total else 0.0

    @property
    def versions(self) -> int:
        """How many policy versions the job replays (2 when comparing)."""
        return 1 if self.compare_id is None or self.compare_id == self.ruleset_id else 2

    @property
    def days(self) -> int:
        """Days of the replayed period (``total`` counts them once per version)."""
        return self.total // self.versions

    @property
    def finished(self) -> bool:
        return self.state in ("done", "failed")


def _tier_changes(tier: NDArray[np.int64], dates: NDArray[np.datetime64]) -> list[tuple[
        TierChange, ...]]:
    """Per region the days whose known tier differs from the known tier of the day before."""
    change = np.zeros(tier.shape, dtype=bool)
    change[:, 1:] = (tier[:, 1:] >= 0) & (tier[:, :-1] >= 0) & (tier[:, 1:] != tier[:, :-1])
    rows, cols = np.nonzero(change)
    out: list[list[TierChange]] = [[] for _ in range(tier.shape[0])]
    for r, c in zip(rows.tolist(), cols.tolist(), strict=True):
        out[r].append(TierChange(day=dates[c].item(), old=int(tier[r, c - 1]),
                                 new=int(tier[r, c])))
    return [tuple(x) for x in out]


def figures_of(
    result: BacktestResult, *, ruleset_id: int, status: str = ""
) -> RulesetFigures:
    """The page's figures of one replay: the service summary and the tier strip.

    Notes
    -----
    Changes per region per year are ``changes * 365.25 / days`` of the summarised period, as in
    :attr:`rules.timeline.TimelineSummary.changes_per_year` (its mean over regions).
    """
    ev, cols, s = result.evaluation, result.period, result.summary
    tier = np.asarray(ev.tier[:, cols], dtype=np.int64)
    changes = _tier_changes(tier, ev.dates[cols])
    years = s.days / DAYS_PER_YEAR
    regions = tuple(
        RegionFigures(
            code=x.region, name=result.names.get(x.region, x.region), changes=x.changes,
            changes_per_year=x.changes / years if years else float("nan"),
            days_in_tier=x.days_in_tier, escalations=x.escalations, preceded=x.preceded,
            leads=x.leads, tier_changes=changes[i],
        )
        for i, x in enumerate(s.regions)
    )
    rs = result.ruleset
    return RulesetFigures(
        ruleset_id=ruleset_id, name=rs.name, version=str(rs.version), status=status,
        tier_names=tuple(t.name for t in rs.tiers), as_known=result.as_known,
        start=result.start, end=result.end, seconds=result.seconds,
        changes_per_year=s.changes_per_year, tier_shares=s.tier_shares,
        escalations=s.escalations, preceded_share=s.preceded_share,
        median_lead=s.median_lead, leads=s.leads,
        episodes=sum(x.episodes for x in s.regions),
        unfollowed=sum(x.unfollowed for x in s.regions), regions=regions, tier=tier,
    )


def encode_figures(figures: list[RulesetFigures] | tuple[RulesetFigures, ...]) -> bytes:
    """The stored form of a finished job's figures (see the module notes)."""
    items = []
    for f in figures:
        tier = np.asarray(f.tier, dtype=np.int8)
        items.append({
            "ruleset_id": f.ruleset_id, "name": f.name, "version": f.version,
            "status": f.status, "tier_names": list(f.tier_names), "as_known": f.as_known,
            "start": f.start.isoformat(), "end": f.end.isoformat(), "seconds": f.seconds,
            "changes_per_year": f.changes_per_year, "tier_shares": list(f.tier_shares),
            "escalations": f.escalations, "preceded_share": f.preceded_share,
            "median_lead": f.median_lead, "leads": list(f.leads), "episodes": f.episodes,
            "unfollowed": f.unfollowed,
            "regions": [{
                "code": r.code, "name": r.name, "changes": r.changes,
                "changes_per_year": r.changes_per_year, "days_in_tier": list(r.days_in_tier),
                "escalations": r.escalations, "preceded": r.preceded, "leads": list(r.leads),
                "tier_changes": [[c.day.isoformat(), c.old, c.new] for c in r.tier_changes],
            } for r in f.regions],
            "tier": {"shape": list(tier.shape),
                     "int8": base64.b64encode(tier.tobytes()).decode("ascii")},
        })
    text = json.dumps({"format": RESULTS_FORMAT, "figures": items}, separators=(",", ":"))
    return zlib.compress(text.encode("utf-8"), 6)


def decode_figures(blob: bytes) -> tuple[RulesetFigures, ...]:
    """The figures back from :func:`encode_figures`."""
    data = json.loads(zlib.decompress(blob).decode("utf-8"))
    if data.get("format") != RESULTS_FORMAT:
        raise ServiceError(f"backtest_job.results: unknown format {data.get('format')!r}")
    out = []
    for d in data["figures"]:
        shape = tuple(d["tier"]["shape"])
        tier = np.frombuffer(base64.b64decode(d["tier"]["int8"]), dtype=np.int8)
        out.append(RulesetFigures(
            ruleset_id=d["ruleset_id"], name=d["name"], version=d["version"],
            status=d["status"], tier_names=tuple(d["tier_names"]), as_known=d["as_known"],
            start=date.fromisoformat(d["start"]), end=date.fromisoformat(d["end"]),
            seconds=d["seconds"], changes_per_year=d["changes_per_year"],
            tier_shares=tuple(d["tier_shares"]), escalations=d["escalations"],
            preceded_share=d["preceded_share"], median_lead=d["median_lead"],
            leads=tuple(d["leads"]), episodes=d["episodes"], unfollowed=d["unfollowed"],
            regions=tuple(RegionFigures(
                code=r["code"], name=r["name"], changes=r["changes"],
                changes_per_year=r["changes_per_year"], days_in_tier=tuple(r["days_in_tier"]),
                escalations=r["escalations"], preceded=r["preceded"], leads=tuple(r["leads"]),
                tier_changes=tuple(TierChange(day=date.fromisoformat(c[0]), old=c[1], new=c[2])
                                   for c in r["tier_changes"]),
            ) for r in d["regions"]),
            tier=tier.astype(np.int64).reshape(shape),
        ))
    return tuple(out)


def _worker_name() -> str:
    """This process, as named in ``backtest_job.worker``: host, process id and a random part."""
    return f"{socket.gethostname()[:120]}:{os.getpid()}:{uuid.uuid4().hex[:8]}"


class BacktestJobs:
    """Starts backtests and reports on them from the database (see the module notes).

    ``clock`` gives the current UTC time (tests move it to make a job look abandoned).
    """

    def __init__(
        self, database: Database, *, time_zone: tzinfo = UTC,
        heartbeat: float = HEARTBEAT_SECONDS, abandon_after: float = ABANDON_AFTER_SECONDS,
        clock: Callable[[], datetime] = lambda: datetime.now(UTC),
    ) -> None:
        if heartbeat <= 0 or abandon_after <= heartbeat:
            raise ValueError(f"need 0 < heartbeat ({heartbeat}) < abandon_after "
                             f"({abandon_after})")
        self._db = database
        self._zone = time_zone
        self._heartbeat = heartbeat
        self._abandon_after = timedelta(seconds=abandon_after)
        self._clock = clock
        self.worker = _worker_name()
        self._lock = threading.Lock()
        self._closed = threading.Event()
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="backtest")
        self._beater: threading.Thread | None = None
        self._active: set[str] = set()  # queued or running here; the heartbeat keeps them alive

    # -- starting and reading -------------------------------------------------------------------
    def start(
        self, *, session: Session, ruleset_id: int, compare_id: int | None = None,
        as_known: bool = False, user: str = "",
    ) -> str:
        """Queue a replay of version ``ruleset_id`` (and of version ``compare_id`` beside it,
        unless it is the same version); returns the job id.

        The job's row is committed in a transaction of its own before the job is queued, so
        that the running thread and every worker see it at once.
        """
        ids = [ruleset_id]
        if compare_id is not None and compare_id != ruleset_id:
            ids.append(compare_id)
        for rid in ids:
            if session.get(RulesetRow, rid) is None:
                raise UnknownPolicyError(rid)
        first, last = data_span(session=session)
        per_run = (last - first).days + 1
        now = self._clock()
        job_id = uuid.uuid4().hex
        with self._lock:
            if self._closed.is_set():
                raise ServiceError("backtests: the server is shutting down")
            with self._db.transaction() as own:
                own.add(BacktestJob(
                    id=job_id, ruleset_id=ids[0], compare_id=ids[1] if len(ids) > 1 else None,
                    as_known=as_known, user_name=user[:100], created_at=now, state="queued",
                    done=0, total=per_run * len(ids), error=None, worker=self.worker,
                    heartbeat_at=now,
                ))
                self._prune(own, now)
            self._active.add(job_id)
            self._pool.submit(self._run, job_id, tuple(ids), as_known)
            if self._beater is None:
                self._beater = threading.Thread(target=self._beat, name="backtest-heartbeat",
                                                daemon=True)
                self._beater.start()
        return job_id

    def status(self, *, session: Session, job_id: str) -> JobStatus:
        """A snapshot of job ``job_id`` with its figures when done; :class:`UnknownJobError`
        when there is no such job."""
        row = session.get(BacktestJob, job_id)
        if row is None:
            raise UnknownJobError(job_id)
        return self._snapshot(row, results=True)

    def recent(self, *, session: Session) -> list[JobStatus]:
        """Snapshots of the kept jobs, newest first (without their figures)."""
        rows = session.execute(
            select(*_SUMMARY).order_by(BacktestJob.created_at.desc()).limit(KEEP_JOBS)
        ).all()
        return [self._snapshot(r, results=False) for r in rows]

    def _snapshot(self, row: Any, *, results: bool) -> JobStatus:
        state, error = row.state, row.error
        if state in UNFINISHED and self._clock() - row.heartbeat_at > self._abandon_after:
            state = "failed"
            error = (f"abandoned: the server process running it stopped (no sign of life "
                     f"since {row.heartbeat_at:%Y-%m-%d %H:%M:%S} UTC); start it again")
        figures: tuple[RulesetFigures, ...] = ()
        if results and state == "done" and row.results is not None:
            figures = decode_figures(row.results)
        return JobStatus(
            id=row.id, ruleset_id=row.ruleset_id, compare_id=row.compare_id,
            as_known=row.as_known, user=row.user_name, created_at=row.created_at, state=state,
            done=row.done, total=row.total, error=error, results=figures,
        )

    def _prune(self, session: Session, now: datetime) -> None:
        stale = now - self._abandon_after
        old = session.scalars(
            select(BacktestJob.id)
            .where(or_(BacktestJob.state.not_in(UNFINISHED), BacktestJob.heartbeat_at < stale))
            .order_by(BacktestJob.created_at.desc())
            .offset(KEEP_JOBS)
        ).all()
        if old:
            session.execute(delete(BacktestJob).where(BacktestJob.id.in_(old)))

    # -- running ----------------------------------------------------------------------------------
    def close(self) -> None:
        """Stop: queued jobs are dropped, a running one stops at its next progress report; both
        are marked as stopped in the database."""
        self._closed.set()
        self._pool.shutdown(wait=True, cancel_futures=True)
        try:
            self._finish_unfinished("stopped: the server shut down")
        except Exception:  # noqa: BLE001 - shutting down: the heartbeat timeout covers it
            log.exception("backtests: could not mark unfinished jobs as stopped")

    def _finish_unfinished(self, error: str) -> None:
        with self._db.transaction() as session:
            session.execute(
                update(BacktestJob)
                .where(BacktestJob.worker == self.worker, BacktestJob.state.in_(UNFINISHED))
                .values(state="failed", error=error, finished_at=self._clock())
            )

    def _beat(self) -> None:
        while not self._closed.wait(self._heartbeat):
            with self._lock:
                active = list(self._active)
            if not active:
                continue
            try:
                with self._db.transaction() as session:
                    session.execute(
                        update(BacktestJob)
                        .where(BacktestJob.id.in_(active), BacktestJob.state.in_(UNFINISHED))
                        .values(heartbeat_at=self._clock())
                    )
            except Exception:  # noqa: BLE001 - try again at the next beat
                log.exception("backtests: heartbeat failed")

    def _write(self, job_id: str, **values: Any) -> None:
        with self._db.transaction() as session:
            session.execute(update(BacktestJob).where(BacktestJob.id == job_id).values(**values))

    def _advance(self, job_id: str, n: int) -> None:
        if self._closed.is_set():
            raise _Cancelled
        self._write(job_id, done=BacktestJob.done + n, heartbeat_at=self._clock())

    def _run(self, job_id: str, ruleset_ids: tuple[int, ...], as_known: bool) -> None:
        try:
            self._write(job_id, state="running", heartbeat_at=self._clock())
            figures = []
            for rid in ruleset_ids:
                with self._db.transaction() as session:
                    row = session.get(RulesetRow, rid)
                    if row is None:
                        raise UnknownPolicyError(rid)
                    status = row.status
                    result = run_backtest(
                        session=session, ruleset=parsed(row), as_known=as_known,
                        progress=lambda n: self._advance(job_id, n), time_zone=self._zone,
                    )
                figures.append(figures_of(result, ruleset_id=rid, status=status))
            self._write(job_id, state="done", done=BacktestJob.total,
                        results=encode_figures(figures), finished_at=self._clock())
        except _Cancelled:
            self._write(job_id, state="failed", error="stopped: the server shut down",
                        finished_at=self._clock())
        except Exception as exc:  # any failure is shown on the job page
            log.exception("backtest %s failed", job_id)
            try:
                self._write(job_id, state="failed", error=f"{type(exc).__name__}: {exc}",
                            finished_at=self._clock())
            except Exception:  # noqa: BLE001 - the database failed: shown abandoned later
                log.exception("backtest %s: could not record the failure", job_id)
        finally:
            with self._lock:
                self._active.discard(job_id)


_SUMMARY = (
    BacktestJob.id, BacktestJob.ruleset_id, BacktestJob.compare_id, BacktestJob.as_known,
    BacktestJob.user_name, BacktestJob.created_at, BacktestJob.state, BacktestJob.done,
    BacktestJob.total, BacktestJob.error, BacktestJob.heartbeat_at,
)
