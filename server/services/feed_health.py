"""Freshness and each configured feed's health (the status table and the staff feeds page).

Freshness: for each feed and region, the newest reference date and the newest time a vintage of
that feed was received; a region is *stale* for the feed when today (in the office's time zone)
is more than the feed's ``stale_after`` past its newest reference date. The rules engine treats
stale data as unknown.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta

from sqlalchemy import Date, func, select, type_coerce
from sqlalchemy.orm import Session

from server.feeds.definition import FeedCatalogue, FeedDefinition
from server.services.ingest import office_today
from server.store.models import FeedState, FeedToken, Observation, Region, Vintage
from server.store.types import UTCDateTime


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
