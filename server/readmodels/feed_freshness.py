"""Read model: how fresh each source of data is, for the morning overview.

Every configured feed with the Feeds page's verdict (:func:`server.services.feeds.feed_statuses`),
then every other source that delivered (no definition, so no verdict). The verdicts are kept per
worker for the rest of the minute while no vintage landed and no feed run was recorded.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import func, select, type_coerce
from sqlalchemy.orm import Session

from server.feeds.definition import FeedCatalogue
from server.readmodels.cache import BoundedCache
from server.services.feeds import FeedStatus, feed_statuses
from server.store.models import FeedState, Vintage
from server.store.types import UTCDateTime

__all__ = ["FeedFreshness", "feed_freshness"]


@dataclass(frozen=True, kw_only=True)
class FeedFreshness:
    """One source of data on the overview: a configured feed, or another source that delivered.

    ``status`` is the Feeds page's verdict for a configured feed (:attr:`FeedStatus.health`:
    ``ok``, ``attention``, ``no delivery yet``, ``overdue``), judged by the feed's own staleness
    limit and cadence; ``not configured`` for a source without a definition (no limit to judge
    by). ``received_at`` and ``age_hours`` are None before a first delivery.
    """

    feed: str
    configured: bool
    status: str
    received_at: datetime | None
    age_hours: float | None
    rows_accepted: int
    rows_rejected: int
    stale_regions: int = 0
    stale_after_days: float | None = None

    @property
    def late(self) -> bool:
        """Whether the feed needs attention (anything but ``ok`` for a configured feed)."""
        return self.configured and self.status != "ok"


#: the newest minute's verdicts, per worker
_STATUSES: BoundedCache[tuple[object, ...], tuple[FeedStatus, ...]] = BoundedCache(size=1)


def _statuses(
    session: Session, now: datetime, catalogue: FeedCatalogue, time_zone: str
) -> tuple[FeedStatus, ...]:
    """:func:`feed_statuses`, kept for the rest of the minute while no vintage landed and no
    feed run was recorded (its freshness query reads every observation's vintage: ~0.1 s at
    3 000 regions). Its verdicts depend on the clock only through the office day and the
    overdue instant, so they are at most a minute behind the Feeds page's."""
    newest = session.scalar(select(func.max(Vintage.id)))
    states = session.execute(
        select(func.count(), type_coerce(func.max(FeedState.last_attempt_at), UTCDateTime()),
               func.sum(FeedState.failures)).select_from(FeedState)
    ).one()
    key = (str(catalogue.path), tuple(sorted(catalogue.feeds)), time_zone, newest, *states,
           int(now.timestamp() // 60))
    return _STATUSES.get_or_build(key, lambda: tuple(feed_statuses(
        session=session, catalogue=catalogue, now=now, time_zone=time_zone)))


def feed_freshness(
    session: Session, now: datetime, catalogue: FeedCatalogue | None, time_zone: str
) -> tuple[FeedFreshness, ...]:
    """Every configured feed with the Feeds page's verdict (:func:`feed_statuses`), then every
    other source that delivered (no definition, so no verdict), each by name."""
    out = []
    if catalogue is not None:
        for st in _statuses(session, now, catalogue, time_zone):
            received = st.last_received_at
            out.append(FeedFreshness(
                feed=st.name, configured=True, status=st.health, received_at=received,
                age_hours=None if received is None else (now - received).total_seconds() / 3600,
                rows_accepted=st.last_accepted, rows_rejected=st.last_rejected,
                stale_regions=len(st.stale_regions), stale_after_days=st.stale_after_days,
            ))
    known = {f.feed for f in out}
    newest = (
        select(Vintage.feed, func.max(Vintage.id).label("vid")).group_by(Vintage.feed).subquery()
    )
    rows = session.execute(
        select(Vintage.feed, type_coerce(Vintage.received_at, UTCDateTime()),
               Vintage.rows_accepted, Vintage.rows_rejected)
        .join(newest, newest.c.vid == Vintage.id)
        .order_by(Vintage.feed)
    ).all()
    for feed, received, accepted, rejected in rows:
        if feed in known:
            continue
        out.append(FeedFreshness(
            feed=feed, configured=False, status="not configured", received_at=received,
            age_hours=(now - received).total_seconds() / 3600, rows_accepted=accepted,
            rows_rejected=rejected,
        ))
    return tuple(out)
