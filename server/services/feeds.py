"""Use cases around configured feeds: the catalogue, scheduled runs, push tokens, health, freshness.

A *run* of a pulled feed takes every waiting file of a file-drop folder (or one conditional GET of
an HTTP source), ingests each as one vintage, records the feed's state (ETag, Last-Modified, last
success or error) in the same transaction, and after commit asks for an evaluation once
(:func:`server.services.evaluation.evaluate_if_behind`, which evaluates only data not yet
evaluated, whether this run or an earlier, killed one landed them).

Freshness: for each feed and region, the newest reference date and the newest time a vintage of
that feed was received; a region is *stale* for the feed when today (in the office's time zone)
is more than the feed's ``stale_after`` past its newest reference date. The rules engine treats
stale data as unknown.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import BinaryIO

import httpx
from sqlalchemy import Date, delete, func, select, text, type_coerce, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from server.config import Settings
from server.feeds.definition import (
    FeedCatalogue,
    FeedDefinition,
    FileSource,
    HttpSource,
    load_feeds,
)
from server.feeds.errors import FeedConfigError as FeedConfigError  # for the web's handler
from server.feeds.errors import FeedFileError, FetchError
from server.feeds.sources import Payload, RetryPolicy, fetch, move_aside, pending_files
from server.services.audit import record
from server.services.database import Database
from server.services.district_indicators import feed_limits
from server.services.errors import ServiceError
from server.services.evaluation import evaluate_if_behind
from server.services.ingest import (
    IngestOutcome,
    IngestReceipt,
    ingest_and_evaluate,
    office_today,
)
from server.services.notify import NotifyConfig
from server.services.revisions import Precedence
from server.services.revisions import UnconfirmedRevisionsError as UnconfirmedRevisionsError
from server.store.models import (
    FeedState,
    FeedToken,
    Observation,
    Region,
    RejectedRow,
    SchedulerLease,
    Vintage,
)
from server.store.types import UTCDateTime


class UnknownFeedError(ServiceError, LookupError):
    def __init__(self, name: str, known: list[str]) -> None:
        self.name = name
        super().__init__(f"unknown feed {name!r}; configured feeds: {', '.join(known) or 'none'}")


def feeds_file(settings: Settings) -> Path | None:
    """The configured feed file (``TIERWISE_FEEDS_FILE``; the demo command sets the demo's)."""
    return settings.feeds_file


_CATALOGUES: dict[Path, tuple[str, FeedCatalogue]] = {}
_CATALOGUE_LOCK = threading.Lock()


def load_catalogue(settings: Settings) -> FeedCatalogue:
    """The configured feeds (an empty catalogue when no feed file is configured).

    Parsed once per content of the file (its SHA-256; reading a small file is cheap, parsing it
    is not): pages that show feed health call this on every request, and an edited file is
    picked up on the next one. A file that no longer parses raises
    :class:`~server.feeds.errors.FeedConfigError` each time.
    """
    path = feeds_file(settings)
    if path is None:
        return FeedCatalogue(path="", feeds={})
    try:
        version = hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return load_feeds(path)  # reports the file as unreadable, with its name
    with _CATALOGUE_LOCK:
        hit = _CATALOGUES.get(path)
    if hit is not None and hit[0] == version:
        return hit[1]
    catalogue = load_feeds(path)
    with _CATALOGUE_LOCK:
        _CATALOGUES[path] = (version, catalogue)
    return catalogue


def feed_named(catalogue: FeedCatalogue, name: str) -> FeedDefinition:
    if name not in catalogue:
        raise UnknownFeedError(name, sorted(catalogue.feeds))
    return catalogue[name]


# --- push tokens -------------------------------------------------------------------------------

def _digest(token: str) -> str:
    return hashlib.sha256(token.encode()).hexdigest()


def issue_token(*, session: Session, feed: str, actor: str) -> str:
    """A new random bearer token for ``feed`` (replacing any earlier one); only its hash is kept."""
    token = secrets.token_urlsafe(32)
    row = session.get(FeedToken, feed)
    if row is None:
        row = FeedToken(feed=feed, token_sha256="", created_at=datetime.now(UTC))
        session.add(row)
    row.token_sha256 = _digest(token)
    row.created_at = datetime.now(UTC)
    row.created_by = actor
    record(session=session, actor=actor, action="feed.token", subject=feed)
    session.flush()
    return token


def token_matches(*, session: Session, feed: str, token: str | None) -> bool:
    """Whether ``token`` is ``feed``'s current push token (constant-time comparison)."""
    row = session.get(FeedToken, feed)
    if row is None or not token:
        return False
    return hmac.compare_digest(row.token_sha256, _digest(token))


# --- runs ----------------------------------------------------------------------------------------

def _state(session: Session, feed: str) -> FeedState:
    """The feed's state row, created on first use; a row another ingest created meanwhile is
    taken (on SQLite the ingest's savepoint has committed the vintage by then, so two first
    pushes of a feed can race here)."""
    row = session.get(FeedState, feed)
    if row is None:
        try:
            with session.begin_nested():
                row = FeedState(feed=feed, last_error="", failures=0)
                session.add(row)
        except IntegrityError:
            row = session.get(FeedState, feed, populate_existing=True)
            if row is None:
                raise
    return row


def record_feed_state(
    session: Session, *, feed: str, at: datetime, receipt: IngestReceipt | None = None,
    error: str | None = None, etag: str | None = None, last_modified: str | None = None,
) -> None:
    """Record how an attempt to take in data for ``feed`` went: the one function every way in
    (upload, push, file drop, HTTP pull, CLI ingest) uses, in the ingest transaction.

    ``error`` (a file rejected whole, a failed fetch) sets the last error and counts a failure.
    A landed ``receipt`` (or an unchanged source: no receipt, no error) is a success and names
    the feed's last vintage, except that a file whose every row was rejected is recorded as an
    error too (its vintage with the rejected rows is still stored).
    """
    state = _state(session, feed)
    state.last_attempt_at = at
    if etag is not None:
        state.etag = etag
    if last_modified is not None:
        state.last_modified = last_modified
    if receipt is not None and receipt.vintage_id is not None:
        state.last_vintage_id = receipt.vintage_id
    if error is None and receipt is not None and receipt.whole_file_rejected:
        error = (f"{receipt.source}: every row was rejected ({receipt.rows_rejected} "
                 f"{plural(receipt.rows_rejected, 'row')}; see the rejected rows)")
    if error is not None:
        state.last_error = error[:2000]
        state.failures = (state.failures or 0) + 1
        return
    state.last_success_at = at
    state.last_error = ""
    state.failures = 0


def plural(n: int, word: str) -> str:
    """``word`` for one, ``word + "s"`` otherwise (``1 row``, ``2 rows``, ``0 rows``)."""
    return word if n == 1 else f"{word}s"


def note_failure(db: Database, *, feed: str, error: str, at: datetime) -> None:
    """Record a failed attempt in its own transaction (:func:`record_feed_state`)."""
    with db.transaction() as session:
        record_feed_state(session, feed=feed, at=at, error=error)


def _note_success(session: Session, feed: str, at: datetime, receipt: IngestReceipt | None,
                  etag: str | None = None, last_modified: str | None = None) -> None:
    record_feed_state(session, feed=feed, at=at, receipt=receipt, etag=etag,
                      last_modified=last_modified)


def ingest_recorded(
    db: Database, *, feed: FeedDefinition, payload: Payload, time_zone: str = "UTC",
    received_at: datetime | None = None, dry_run: bool = False,
    progress: Callable[[int], None] | None = None, evaluate: bool = False,
    notify: NotifyConfig | None = None, stale_after: Mapping[str, timedelta] | None = None,
    etag: str | None = None, last_modified: str | None = None,
    precedence: Precedence | None = None, confirm_other_feeds: bool = False,
    confirmed: str = "",
) -> IngestOutcome:
    """:func:`~server.services.ingest.ingest_and_evaluate` that records the feed state.

    ``precedence`` (:meth:`FeedCatalogue.precedence`), ``confirm_other_feeds`` and
    ``confirmed``: as :func:`~server.services.ingest.ingest_payload`; an upload refused for
    want of confirmation (:class:`UnconfirmedRevisionsError`) records nothing.

    Every way in uses it, so each records its outcome alike (:func:`record_feed_state`): a
    landed or unchanged payload in the ingest transaction, a file rejected whole
    (:class:`FeedFileError`, re-raised) as the feed's last error. A dry run records nothing.
    Without ``received_at`` the vintage is stamped in commit order
    (:func:`~server.services.ingest.stamp_in_commit_order`).
    """
    at = received_at or datetime.now(UTC)
    after = None if dry_run else (
        lambda s, r: record_feed_state(s, feed=feed.name, at=at, receipt=r, etag=etag,
                                       last_modified=last_modified)
    )
    try:
        return ingest_and_evaluate(
            db, feed=feed, payload=payload, time_zone=time_zone, received_at=received_at,
            dry_run=dry_run, progress=progress, evaluate=evaluate, after_landing=after,
            notify=notify, stale_after=stale_after, precedence=precedence,
            confirm_other_feeds=confirm_other_feeds, confirmed=confirmed,
        )
    except FeedFileError as exc:
        if not dry_run:
            note_failure(db, feed=feed.name, error=str(exc), at=at)
        raise


@dataclass(frozen=True, kw_only=True)
class FeedRun:
    """What one scheduled run of a feed did."""

    feed: str
    receipts: tuple[IngestReceipt, ...]
    not_modified: bool
    errors: tuple[str, ...]
    evaluated: bool

    @property
    def landed(self) -> int:
        return sum(1 for r in self.receipts if not r.unchanged and r.vintage_id is not None)


def run_feed(
    db: Database, *, feed: FeedDefinition, time_zone: str = "UTC",
    environ: Mapping[str, str] | None = None, now: datetime | None = None,
    policy: RetryPolicy | None = None, client: httpx.Client | None = None,
    evaluate: bool = True, notify: NotifyConfig | None = None,
    stale_after: Mapping[str, timedelta] | None = None, precedence: Precedence | None = None,
) -> FeedRun:
    """Run a pulled feed once: each waiting file, or one conditional GET. Errors are recorded in
    the feed state; transient fetch errors are re-raised after being recorded (the scheduler
    logs them and the next run tries again). ``stale_after``: the catalogue's feed limits for
    the evaluation (:func:`catalogue_limits`). Vintages are received at ``now`` when given,
    else stamped in commit order. With ``evaluate`` the run ends with
    :func:`~server.services.evaluation.evaluate_if_behind` (``evaluated``: there were data
    to evaluate)."""
    at = now or datetime.now(UTC)
    if isinstance(feed.source, FileSource):
        receipts, errors = _run_files(db, feed, feed.source, time_zone, at, now, precedence)
        not_modified = False
    elif isinstance(feed.source, HttpSource):
        receipts, errors, not_modified = _run_http(
            db, feed, feed.source, time_zone, at, environ or {}, policy, client, now, precedence
        )
    else:
        raise ServiceError(f"feed {feed.name!r} is a push feed; it has nothing to pull")
    evaluated = False
    if evaluate:
        evaluated = evaluate_if_behind(db, notify=notify, stale_after=stale_after) is not None
    return FeedRun(feed=feed.name, receipts=tuple(receipts), not_modified=not_modified,
                   errors=tuple(errors), evaluated=evaluated)


def _run_files(
    db: Database, feed: FeedDefinition, source: FileSource, time_zone: str, at: datetime,
    received_at: datetime | None = None, precedence: Precedence | None = None,
) -> tuple[list[IngestReceipt], list[str]]:
    receipts, errors = [], []
    files = pending_files(source)
    if not files:
        with db.transaction() as session:
            _note_success(session, feed.name, at, None)
    for path in files:
        try:
            outcome = ingest_recorded(
                db, feed=feed, payload=Payload.from_path(path), time_zone=time_zone,
                received_at=received_at, precedence=precedence,
            )
        except FeedFileError as exc:
            move_aside(path, source, outcome="rejected", now=at)
            errors.append(str(exc))
            continue
        receipts.append(outcome.receipt)
        move_aside(path, source, outcome="processed", now=at)
    return receipts, errors


def _run_http(
    db: Database, feed: FeedDefinition, source: HttpSource, time_zone: str, at: datetime,
    environ: Mapping[str, str], policy: RetryPolicy | None, client: httpx.Client | None,
    received_at: datetime | None = None, precedence: Precedence | None = None,
) -> tuple[list[IngestReceipt], list[str], bool]:
    with db.sessions() as session:
        state = session.get(FeedState, feed.name)
        etag = state.etag if state else None
        modified = state.last_modified if state else None
    try:
        got = fetch(source, etag=etag, last_modified=modified, environ=environ, policy=policy,
                    client=client)
    except FetchError as exc:
        note_failure(db, feed=feed.name, error=str(exc), at=at)
        if exc.transient:
            raise
        return [], [str(exc)], False
    if got.status == 304 or got.content is None:
        with db.transaction() as session:
            _note_success(session, feed.name, at, None)
        return [], [], True
    try:
        outcome = ingest_recorded(
            db, feed=feed, payload=Payload.from_bytes(source.url, got.content),
            time_zone=time_zone, received_at=received_at, etag=got.etag,
            last_modified=got.last_modified, precedence=precedence,
        )
    except FeedFileError as exc:
        return [], [str(exc)], False
    return [outcome.receipt], [], False


# --- health and freshness ----------------------------------------------------------------

@dataclass(frozen=True, kw_only=True)
class Freshness:
    feed: str
    region: str
    latest_ref_date: date
    received_at: datetime
    stale: bool


@dataclass(frozen=True, kw_only=True)
class FeedStatus:
    """One feed's health for the status table and the staff page."""

    name: str
    kind: str
    schedule: str
    cadence: str
    stale_after_days: float
    last_attempt_at: datetime | None
    last_success_at: datetime | None
    last_error: str
    failures: int
    vintages: int
    last_received_at: datetime | None
    last_accepted: int
    last_rejected: int
    regions: int
    stale_regions: tuple[str, ...]
    newest_ref_date: date | None
    # When a feed that never delivered is past its first expected delivery plus its staleness
    # limit (:func:`first_delivery_due`); None: not yet, or no expectation (irregular cadence).
    overdue_since: datetime | None = None
    #: the feed definition's limit on the rejected share of a delivery
    max_rejected_share: float = 0.1

    @property
    def rejected_share(self) -> float | None:
        """Rejected rows / all rows of the last delivery (None: nothing delivered)."""
        total = self.last_accepted + self.last_rejected
        return self.last_rejected / total if total else None

    @property
    def too_many_rejected(self) -> bool:
        """Whether the last delivery rejected more than ``max_rejected_share`` of its rows."""
        share = self.rejected_share
        return share is not None and share > self.max_rejected_share

    @property
    def health(self) -> str:
        """``ok``, ``attention`` (an error, stale regions, or a last delivery that rejected more
        than ``max_rejected_share`` of its rows), ``no delivery yet`` (configured, nothing
        received and not yet overdue) or ``overdue`` (nothing received past the first expected
        delivery plus the staleness limit). Never ``ok`` before a first delivery."""
        if self.last_error:
            return "attention"
        if self.vintages == 0:
            return "overdue" if self.overdue_since is not None else "no delivery yet"
        return "attention" if self.stale_regions or self.too_many_rejected else "ok"

    @property
    def healthy(self) -> bool:
        return self.health == "ok"


def freshness(
    *, session: Session, catalogue: FeedCatalogue, now: datetime, time_zone: str = "UTC"
) -> list[Freshness]:
    """For each configured feed and each region it has reported: newest date, received, stale."""
    today = office_today(now, time_zone)
    out = []
    names = [f.name for f in catalogue]
    if not names:
        return out
    query = (
        select(
            Vintage.feed, Region.code,
            type_coerce(func.max(Observation.ref_date), Date()),
            type_coerce(func.max(Vintage.received_at), UTCDateTime()),
        )
        .join(Observation, Observation.vintage_id == Vintage.id)
        .join(Region, Region.id == Observation.region_id)
        .where(Vintage.feed.in_(names))
        .group_by(Vintage.feed, Region.code)
        .order_by(Vintage.feed, Region.code)
    )
    for feed, region, ref, received in session.execute(query):
        limit = catalogue[feed].stale_after
        out.append(Freshness(feed=feed, region=region, latest_ref_date=ref, received_at=received,
                             stale=(today - ref) > limit))
    return out


def stale_regions(
    *, session: Session, catalogue: FeedCatalogue, now: datetime, time_zone: str = "UTC"
) -> dict[str, frozenset[str]]:
    """Feed name -> regions whose data from that feed are past its staleness limit."""
    found: dict[str, set[str]] = {f.name: set() for f in catalogue}
    for f in freshness(session=session, catalogue=catalogue, now=now, time_zone=time_zone):
        if f.stale:
            found[f.feed].add(f.region)
    return {k: frozenset(v) for k, v in found.items()}


def duration_text(span: timedelta) -> str:
    """A duration in the largest whole unit: ``2 d``, ``6 h``, ``90 min``, ``45 s``."""
    seconds = int(span.total_seconds())
    for unit, size in (("d", 86400), ("h", 3600), ("min", 60)):
        if seconds >= size and seconds % size == 0:
            return f"{seconds // size} {unit}"
    return f"{seconds} s"


def _schedule_text(feed: FeedDefinition) -> str:
    s = feed.schedule
    if s is None:
        return "push" if feed.kind == "push" else "manual"
    if s.cron:
        return f"cron {s.cron} ({s.timezone})"
    assert s.interval is not None  # Schedule holds exactly one of cron and interval
    return f"every {duration_text(s.interval)} ({s.timezone})"


CADENCE_PERIODS = {"daily": timedelta(days=1), "weekly": timedelta(days=7)}


def expected_period(feed: FeedDefinition) -> timedelta | None:
    """How often ``feed`` should deliver: its schedule's interval, else its cadence (a day, a
    week); None for an irregular feed without an interval."""
    if feed.schedule is not None and feed.schedule.interval is not None:
        return feed.schedule.interval
    return CADENCE_PERIODS.get(feed.cadence)


def first_delivery_due(feed: FeedDefinition, watched_since: datetime | None) -> datetime | None:
    """When a feed that never delivered becomes *overdue*: one expected period after
    ``watched_since`` plus the feed's ``stale_after`` (None: no expectation).

    ``watched_since`` is the earliest sign that tierwise was expecting data from the feed: for a
    push feed the issue of its token; otherwise its recorded attempt, else the first vintage of
    any feed (the store has no record of when a feed was added to the feed file).
    """
    period = expected_period(feed)
    if period is None or watched_since is None:
        return None
    return watched_since + period + feed.stale_after


def feed_statuses(
    *, session: Session, catalogue: FeedCatalogue, now: datetime, time_zone: str = "UTC"
) -> list[FeedStatus]:
    """Every configured feed's health: last run, last error, last vintage, stale regions."""
    fresh = freshness(session=session, catalogue=catalogue, now=now, time_zone=time_zone)
    first_vintage = session.scalar(
        select(type_coerce(func.min(Vintage.received_at), UTCDateTime()))
    )
    out = []
    for feed in catalogue:
        state = session.get(FeedState, feed.name)
        count, overdue_since = count_of(session, feed.name), None
        if not count:
            token = session.get(FeedToken, feed.name)
            since = token.created_at if token is not None else min(
                (t for t in (state.last_attempt_at if state else None, first_vintage)
                 if t is not None), default=None)
            due = first_delivery_due(feed, since)
            overdue_since = due if due is not None and now > due else None
        last = session.scalars(
            select(Vintage).where(Vintage.feed == feed.name)
            .order_by(Vintage.received_at.desc(), Vintage.id.desc()).limit(1)
        ).first()
        mine = [f for f in fresh if f.feed == feed.name]
        out.append(FeedStatus(
            name=feed.name, kind=feed.kind, schedule=_schedule_text(feed), cadence=feed.cadence,
            stale_after_days=feed.stale_after.total_seconds() / 86400,
            last_attempt_at=state.last_attempt_at if state else None,
            last_success_at=state.last_success_at if state else None,
            last_error=state.last_error if state else "", failures=state.failures if state else 0,
            vintages=count, last_received_at=last.received_at if last else None,
            last_accepted=last.rows_accepted if last else 0,
            last_rejected=last.rows_rejected if last else 0, regions=len(mine),
            stale_regions=tuple(f.region for f in mine if f.stale),
            newest_ref_date=max((f.latest_ref_date for f in mine), default=None),
            overdue_since=overdue_since, max_rejected_share=feed.max_rejected_share,
        ))
    return out


def count_of(session: Session, feed: str) -> int:
    """How many vintages ``feed`` has landed."""
    return int(session.scalar(
        select(func.count()).select_from(Vintage).where(Vintage.feed == feed)
    ) or 0)


@dataclass(frozen=True, kw_only=True)
class RejectedRowView:
    vintage_id: int
    feed: str
    received_at: datetime
    line: int
    reason: str
    message: str
    raw: str
    source: str = ""  # the vintage's source: ``upload FILE by USER``, a path, a URL, a push

    @property
    def file_name(self) -> str:
        """The uploaded file's name, else the vintage's source as stored."""
        return split_upload_source(self.source)[0]

    @property
    def uploaded_by(self) -> str:
        """Who uploaded the file ("" when it did not come through the upload form)."""
        return split_upload_source(self.source)[1]


def split_upload_source(source: str) -> tuple[str, str]:
    """(file name, uploader) of an upload's source label; (source, "") for any other source."""
    if source.startswith(UPLOAD_PREFIX) and UPLOAD_BY in source:
        name, _, actor = source[len(UPLOAD_PREFIX):].rpartition(UPLOAD_BY)
        return name, actor
    return source, ""


def recent_rejections(
    *, session: Session, feed: str | None = None, limit: int = 200
) -> list[RejectedRowView]:
    """The newest rejected rows (optionally of one feed), newest vintage first, by line."""
    query = (
        select(RejectedRow, Vintage.feed, Vintage.received_at, Vintage.source)
        .join(Vintage, Vintage.id == RejectedRow.vintage_id)
        .order_by(Vintage.received_at.desc(), Vintage.id.desc(), RejectedRow.line)
        .limit(limit)
    )
    if feed is not None:
        query = query.where(Vintage.feed == feed)
    return [
        RejectedRowView(vintage_id=r.vintage_id, feed=f, received_at=t, line=r.line,
                        reason=r.reason, message=r.message, raw=r.raw, source=src)
        for r, f, t, src in session.execute(query)
    ]


# --- scheduler leadership ----------------------------------------------------------------------

class LeaderLease:
    """Exactly one scheduler instance holds the lease; the others wait and take over.

    On PostgreSQL a session-level advisory lock (``pg_try_advisory_lock``) held on a dedicated
    connection: it goes when the holder's connection does, so a dead holder frees it at once. On
    SQLite a ``scheduler_lease`` row with an expiry that the holder renews; another instance takes
    the row once it has expired.
    """

    def __init__(self, db: Database, *, name: str, holder: str, ttl_seconds: float = 30.0) -> None:
        if ttl_seconds <= 0:
            raise ValueError(f"ttl_seconds must be positive, got {ttl_seconds}")
        self.db = db
        self.name = name
        self.holder = holder
        self.ttl = ttl_seconds
        self._pg = db.engine.dialect.name == "postgresql"
        self._connection = None  # type: ignore[var-annotated]
        self.key = int.from_bytes(hashlib.sha256(name.encode()).digest()[:8], "big", signed=True)

    def acquire(self, now: datetime | None = None) -> bool:
        """Take or renew the lease; True while this instance is the leader."""
        return self._acquire_pg() if self._pg else self._acquire_row(now or datetime.now(UTC))

    def release(self) -> None:
        if self._pg:
            if self._connection is not None:
                try:
                    self._connection.execute(
                        text("SELECT pg_advisory_unlock(:k)"), {"k": self.key}
                    )
                finally:
                    self._connection.close()
                    self._connection = None
            return
        with self.db.transaction() as session:
            session.execute(
                delete(SchedulerLease).where(
                    SchedulerLease.name == self.name, SchedulerLease.holder == self.holder
                )
            )

    def abandon(self) -> None:
        """Drop the lease as a crashed holder would: close the lock's connection, no unlock
        (PostgreSQL frees the lock); on SQLite the row is left to expire."""
        if self._connection is not None:
            self._connection.connection.dbapi_connection.close()  # type: ignore[union-attr]
            self._connection.invalidate()
            self._connection = None

    def _acquire_pg(self) -> bool:
        if self._connection is not None:
            try:
                self._connection.execute(text("SELECT 1"))
                return True
            except Exception:  # the connection died: leadership is gone with it
                self._connection = None
                return False
        connection = self.db.engine.connect().execution_options(isolation_level="AUTOCOMMIT")
        got = bool(connection.execute(
            text("SELECT pg_try_advisory_lock(:k)"), {"k": self.key}
        ).scalar())
        if got:
            self._connection = connection
        else:
            connection.close()
        return got

    def _acquire_row(self, now: datetime) -> bool:
        expires = now + timedelta(seconds=self.ttl)
        with self.db.transaction() as session:
            taken = session.execute(
                update(SchedulerLease)
                .where(
                    SchedulerLease.name == self.name,
                    (SchedulerLease.holder == self.holder) | (SchedulerLease.expires_at < now),
                )
                .values(holder=self.holder, expires_at=expires)
            ).rowcount
            if taken:
                return True
            if session.get(SchedulerLease, self.name) is not None:
                return False
            try:
                with session.begin_nested():
                    session.add(SchedulerLease(name=self.name, holder=self.holder,
                                               expires_at=expires))
            except IntegrityError:
                return False
            return True


# --- push and manual upload ----------------------------------------------------------------------

class FeedTokenError(ServiceError, PermissionError):
    def __init__(self, feed: str, given: bool) -> None:
        self.feed = feed
        problem = "wrong bearer token" if given else "missing bearer token"
        super().__init__(f"{problem} for feed {feed!r}")


class NotAPushFeedError(ServiceError, ValueError):
    def __init__(self, feed: str, kind: str) -> None:
        super().__init__(f"feed {feed!r} is a {kind} feed; only push feeds accept pushes")


def check_push(
    db: Database, *, catalogue: FeedCatalogue, feed_name: str, token: str | None
) -> FeedDefinition:
    """The push feed ``feed_name`` when ``token`` is its current push token.

    Cheap (one primary-key read), so the push route runs it before it reads the body.

    Raises
    ------
    UnknownFeedError
        No feed of that name is configured.
    NotAPushFeedError
        The feed is pulled, not pushed.
    FeedTokenError
        The bearer token is missing or wrong.
    """
    feed = feed_named(catalogue, feed_name)
    if feed.kind != "push":
        raise NotAPushFeedError(feed.name, feed.kind)
    with db.transaction() as session:
        if not token_matches(session=session, feed=feed.name, token=token):
            raise FeedTokenError(feed.name, given=bool(token))
    return feed


def ingest_push(
    db: Database, *, feed: FeedDefinition, content: bytes, content_type: str = "",
    time_zone: str = "UTC", precedence: Precedence | None = None,
) -> IngestReceipt:
    """Ingest a pushed ``content`` for an already checked ``feed`` as one vintage (committed).

    JSON bodies (``application/json``) are read as JSON records whatever the feed's format.
    The evaluation is left to the caller (the web app queues it on its evaluation worker,
    :class:`server.services.evaluation_worker.EvaluationWorker`), so the pusher gets its
    receipt without waiting for it.
    """
    if "json" in content_type.lower() and feed.format != "json":
        feed = replace(feed, format="json")
    label = f"push to {feed.name}"
    return ingest_recorded(
        db, feed=feed, payload=Payload.from_bytes(label, content), time_zone=time_zone,
        precedence=precedence,
    ).receipt


def upload_payload(
    db: Database, *, catalogue: FeedCatalogue, feed_name: str, filename: str,
    content: bytes | BinaryIO, actor: str, time_zone: str = "UTC", dry_run: bool = False,
    confirmed: str = "",
) -> IngestReceipt:
    """A file a staff member uploaded by hand (any configured feed's layout).

    ``content`` is the bytes or an open, seekable file (an upload spooled to disk, read in
    blocks). Recorded in the feed state like every other way in (:func:`ingest_recorded`); the
    vintage's source is ``upload FILENAME by ACTOR``. The catalogue's precedence applies, and
    an upload that would revise values another feed sent stores nothing and raises
    :class:`UnconfirmedRevisionsError` unless ``confirmed`` is the digest of those revisions
    (the receipt the person confirmed).
    """
    feed = feed_named(catalogue, feed_name)
    label = f"{UPLOAD_PREFIX}{filename}{UPLOAD_BY}{actor}"[:500]
    payload = (Payload.from_bytes(label, content) if isinstance(content, bytes)
               else Payload.from_file(label, content))
    return ingest_recorded(
        db, feed=feed, payload=payload, time_zone=time_zone, dry_run=dry_run,
        precedence=catalogue.precedence(), confirm_other_feeds=True, confirmed=confirmed,
    ).receipt


UPLOAD_PREFIX, UPLOAD_BY = "upload ", " by "


def catalogue_limits(catalogue: FeedCatalogue) -> dict[str, timedelta]:
    """Feed name -> ``stale_after`` of every configured feed, for the evaluation
    (:func:`server.services.district_indicators.feed_limits`)."""
    return feed_limits(catalogue)


@dataclass(frozen=True, kw_only=True)
class FeedsPage:
    statuses: list[FeedStatus]
    rejections: list[RejectedRowView]
    feeds_file: str
    upload_default: str | None = None  # the feed the upload form offers first


def default_upload_feed(catalogue: FeedCatalogue) -> str | None:
    """The feed the upload form preselects: the first push feed of the feed file (the demo's
    ``long-csv``), else the first feed; None when none is configured."""
    feeds = list(catalogue)
    push = [f.name for f in feeds if f.kind == "push"]
    return push[0] if push else (feeds[0].name if feeds else None)


def feeds_page(
    *, session: Session, catalogue: FeedCatalogue, now: datetime, time_zone: str = "UTC",
    feed: str | None = None,
) -> FeedsPage:
    """Data of the staff feeds page: each feed's health and the newest rejected rows."""
    return FeedsPage(
        statuses=feed_statuses(session=session, catalogue=catalogue, now=now,
                               time_zone=time_zone),
        rejections=recent_rejections(session=session, feed=feed, limit=200),
        # the file's name only: staff pages do not show the server's directories
        feeds_file=Path(catalogue.path).name if catalogue.path else "",
        upload_default=default_upload_feed(catalogue),
    )
