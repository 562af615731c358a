"""Scheduled runs of pulled feeds.

A *run* of a pulled feed takes every waiting file of a file-drop folder (or one conditional GET of
an HTTP source), ingests each as one vintage, records the feed's state (ETag, Last-Modified, last
success or error) in the same transaction, and after commit asks for an evaluation once
(:func:`server.services.evaluation.evaluate_if_behind`, which evaluates only data not yet
evaluated, whether this run or an earlier, killed one landed them).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

import httpx

from server.feeds.definition import FeedDefinition, FileSource, HttpSource
from server.feeds.errors import FeedFileError, FetchError
from server.feeds.sources import Payload, RetryPolicy, fetch, move_aside, pending_files
from server.services.database import Database
from server.services.errors import ServiceError
from server.services.evaluation import evaluate_if_behind
from server.services.feed_state import _note_success, ingest_recorded, note_failure
from server.services.ingest import IngestReceipt
from server.services.notify import NotifyConfig
from server.services.revisions import Precedence
from server.store.models import FeedState


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
