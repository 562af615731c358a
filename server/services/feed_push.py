"""Push tokens, pushed deliveries and files staff upload by hand.

A push feed's bearer token is random and only its SHA-256 is kept. An upload's vintage source is
``upload FILENAME by ACTOR`` (:func:`split_upload_source` reads it back).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
from dataclasses import replace
from datetime import UTC, datetime
from typing import BinaryIO

from sqlalchemy.orm import Session

from server.feeds.definition import FeedCatalogue, FeedDefinition
from server.feeds.sources import Payload
from server.services.audit import record
from server.services.database import Database
from server.services.errors import ServiceError
from server.services.feed_state import ingest_recorded
from server.services.feeds import feed_named
from server.services.ingest import IngestReceipt
from server.services.revisions import Precedence
from server.store.models import FeedToken


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


def split_upload_source(source: str) -> tuple[str, str]:
    """(file name, uploader) of an upload's source label; (source, "") for any other source."""
    if source.startswith(UPLOAD_PREFIX) and UPLOAD_BY in source:
        name, _, actor = source[len(UPLOAD_PREFIX):].rpartition(UPLOAD_BY)
        return name, actor
    return source, ""
