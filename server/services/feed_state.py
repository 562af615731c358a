"""What every way in records about a feed: its state row (last attempt, success, error, ETag).

Upload, push, file drop, HTTP pull and the CLI's ingest all go through :func:`ingest_recorded`,
so each records its outcome alike, in the ingest transaction.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from datetime import UTC, datetime, timedelta

from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from server.feeds.definition import FeedDefinition
from server.feeds.errors import FeedFileError
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.ingest import IngestOutcome, IngestReceipt, ingest_and_evaluate
from server.services.notify import NotifyConfig
from server.services.revisions import Precedence
from server.store.models import FeedState


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
