"""Use case: backtests started from the staff pages, run in the background with progress.

A small in-memory job registry (:class:`BacktestJobs`), one per app (kept on ``app.state``):
jobs run one at a time in a single worker thread, each with its own database session from the
app's :class:`~server.services.database.Database`, and report progress through
:func:`server.services.backtest.run_backtest`'s ``progress`` callback (days replayed / days to
replay, summed over the rulesets of the job).

Limits (acceptable for now): the registry lives in the memory of one worker process, so a job
is lost when the server restarts, and with several workers a job page shows only the jobs of
the worker that answers the request (a job started on another worker is "unknown"). Only the
newest :data:`KEEP_JOBS` jobs are kept.
"""

from __future__ import annotations

import threading
import uuid
from collections import OrderedDict
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, tzinfo

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from server.services.backtest import BacktestResult, data_span, run_backtest
from server.services.database import Database
from server.services.errors import ServiceError
from server.services.policies import UnknownPolicyError, parsed
from server.store.models import Ruleset as RulesetRow

__all__ = [
    "KEEP_JOBS",
    "BacktestJobs",
    "JobStatus",
    "RegionFigures",
    "RulesetFigures",
    "TierChange",
    "UnknownJobError",
    "figures_of",
]

#: Jobs kept in memory (the oldest are forgotten first).
KEEP_JOBS = 20
DAYS_PER_YEAR = 365.25


class UnknownJobError(ServiceError, LookupError):
    def __init__(self, job_id: str) -> None:
        super().__init__(f"job_id: no backtest job {job_id!r} on this server process")


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
    """A snapshot of a job; ``state`` is queued, running, done or failed."""

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
    def finished(self) -> bool:
        return self.state in ("done", "failed")


@dataclass(kw_only=True, eq=False)
class _Job:
    """The mutable job record; read and written under the registry's lock only."""

    id: str
    ruleset_ids: tuple[int, ...]
    as_known: bool
    user: str
    created_at: datetime
    total: int
    state: str = "queued"
    done: int = 0
    error: str | None = None
    results: list[RulesetFigures] = field(default_factory=list)


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


class BacktestJobs:
    """The in-memory registry of background backtests of one app (see the module notes)."""

    def __init__(self, database: Database, *, time_zone: tzinfo = UTC) -> None:
        self._db = database
        self._zone = time_zone
        self._lock = threading.Lock()
        self._jobs: OrderedDict[str, _Job] = OrderedDict()
        self._closed = threading.Event()
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="backtest")

    def start(
        self, *, session: Session, ruleset_id: int, compare_id: int | None = None,
        as_known: bool = False, user: str = "",
    ) -> str:
        """Queue a replay of version ``ruleset_id`` (and of version ``compare_id`` beside it,
        unless it is the same version); returns the job id."""
        ids = [ruleset_id]
        if compare_id is not None and compare_id != ruleset_id:
            ids.append(compare_id)
        for rid in ids:
            if session.get(RulesetRow, rid) is None:
                raise UnknownPolicyError(rid)
        first, last = data_span(session=session)
        per_run = (last - first).days + 1
        job = _Job(id=uuid.uuid4().hex, ruleset_ids=tuple(ids), as_known=as_known, user=user,
                   created_at=datetime.now(UTC), total=per_run * len(ids))
        with self._lock:
            if self._closed.is_set():
                raise ServiceError("backtests: the server is shutting down")
            self._jobs[job.id] = job
            while len(self._jobs) > KEEP_JOBS:
                self._jobs.popitem(last=False)
        self._pool.submit(self._run, job)
        return job.id

    def status(self, job_id: str) -> JobStatus:
        """A snapshot of job ``job_id``; :class:`UnknownJobError` when this process has none."""
        with self._lock:
            job = self._jobs.get(job_id)
            if job is None:
                raise UnknownJobError(job_id)
            return JobStatus(
                id=job.id, ruleset_id=job.ruleset_ids[0],
                compare_id=job.ruleset_ids[1] if len(job.ruleset_ids) > 1 else None,
                as_known=job.as_known, user=job.user, created_at=job.created_at,
                state=job.state, done=job.done, total=job.total, error=job.error,
                results=tuple(job.results),
            )

    def recent(self) -> list[JobStatus]:
        """Snapshots of the jobs this process keeps, newest first."""
        with self._lock:
            ids = list(reversed(self._jobs))
        out = []
        for job_id in ids:
            try:
                out.append(self.status(job_id))
            except UnknownJobError:  # forgotten meanwhile
                continue
        return out

    def close(self) -> None:
        """Stop: queued jobs are dropped, a running one stops at its next progress report."""
        self._closed.set()
        self._pool.shutdown(wait=True, cancel_futures=True)

    def _advance(self, job: _Job, n: int) -> None:
        if self._closed.is_set():
            raise _Cancelled
        with self._lock:
            job.done += n

    def _run(self, job: _Job) -> None:
        with self._lock:
            job.state = "running"
        try:
            for rid in job.ruleset_ids:
                with self._db.transaction() as session:
                    row = session.get(RulesetRow, rid)
                    if row is None:
                        raise UnknownPolicyError(rid)
                    status = row.status
                    result = run_backtest(
                        session=session, ruleset=parsed(row), as_known=job.as_known,
                        progress=lambda n: self._advance(job, n), time_zone=self._zone,
                    )
                figures = figures_of(result, ruleset_id=rid, status=status)
                with self._lock:
                    job.results.append(figures)
        except _Cancelled:
            with self._lock:
                job.state, job.error = "failed", "stopped: the server shut down"
            return
        except Exception as exc:  # any failure is shown on the job page
            with self._lock:
                job.state, job.error = "failed", f"{type(exc).__name__}: {exc}"
            return
        with self._lock:
            job.state, job.done = "done", job.total
