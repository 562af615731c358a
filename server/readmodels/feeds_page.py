"""Data of the staff feeds page: each feed's health and the newest rejected rows."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.feeds.definition import FeedCatalogue
from server.services.feed_health import FeedStatus, feed_statuses
from server.services.feed_push import split_upload_source
from server.store.models import RejectedRow, Vintage


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
