"""Measures and their effects: dated events with transmission estimated before and after.

Events are of two sources: every published tier change (read from ``decision``: a published
decision whose tier differs from the region's previous published tier; never copied) and events
recorded by staff in ``recorded_event`` (a measure starts or ends, school holidays, a change of
testing criteria) for a district, an area or the county. Recording one writes the audit log.

For each event of the chosen period the reported ``cases`` of its region (a parent's summed from
its districts, :mod:`server.services.hierarchy`) go through
:func:`server.indicators.before_after.before_after`; the change points of the same series
(:func:`server.indicators.changepoints.detect_changepoints`) say whether a detected break falls
between the start of the before window and the end of the after window, and for each such break
whether hospital admissions and wastewater have a break near it after allowing for their delays
(:mod:`server.services.stream_breaks`).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.indicators.before_after import (
    DEFAULT_DELAY,
    DEFAULT_LEAD,
    DEFAULT_TRANSITION,
    DEFAULT_WINDOW,
    before_after,
)
from server.services import audit
from server.services.errors import FormFieldError, checked_note
from server.services.hierarchy import membership, parents_of
from server.services.stream_breaks import (
    Agreement,
    StreamOptions,
    daily_counts,
    newest_cases_day,
    search_span,
    stream_breaks,
)
from server.services.users import permitted_account
from server.store.models import Decision, RecordedEvent, Region, User

__all__ = [
    "EVENT_KINDS",
    "EffectOptions",
    "EffectsPage",
    "EventEffect",
    "EventError",
    "effects_page",
    "record_event",
]

#: Kinds of recorded events (``tier_change`` is reserved for published decisions).
EVENT_KINDS = ("measure_start", "measure_end", "school_holidays", "testing_change", "other")
CASES = "cases"
DEFAULT_SETTLE = 3
NOTE_MAX = 2000


class EventError(FormFieldError):
    """A recorded event or a period is refused; names the field."""


@dataclass(frozen=True, kw_only=True)
class EffectOptions:
    """Windows of the estimate (days); defaults and their sources in
    :mod:`server.indicators.before_after`."""

    window: int = DEFAULT_WINDOW
    delay: int = DEFAULT_DELAY
    transition: int = DEFAULT_TRANSITION
    lead: int = DEFAULT_LEAD
    #: Newest days left out because late reports are still arriving; an estimate can be told
    #: ``settle`` days after its window's last day (common practice, no source).
    settle: int = DEFAULT_SETTLE

    def __post_init__(self) -> None:
        for name, low, high in (("window", 7, 56), ("delay", 0, 42), ("transition", 0, 28),
                                ("lead", 0, 28), ("settle", 0, 28)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
                raise EventError(name, f"expected a whole number of days in {low}..{high}, "
                                       f"got {value!r}")


@dataclass(frozen=True, kw_only=True)
class EventEffect:
    """One event and what the data say about transmission before and after it."""

    day: dt.date
    region: str
    region_name: str
    level: str
    kind: str  # tier_change or one of EVENT_KINDS
    note: str
    recorded_by: str
    status: str  # ready, too_early, no_history, unfit, no_data
    ready_on: dt.date
    before: tuple[dt.date, dt.date]  # first and last report day of each window
    after: tuple[dt.date, dt.date]
    r_before: tuple[float, float, float]  # estimate, lower, upper
    r_after: tuple[float, float, float]
    r_change: tuple[float, float, float]
    rt_before: tuple[float, float, float]
    rt_after: tuple[float, float, float]
    rt_ratio: tuple[float, float, float]
    breaks: tuple[dt.date, ...]  # detected breaks within the windows' span
    breaks_known: bool  # False when the change-point search could not run
    #: per break in ``breaks``: one Agreement per stream (admissions, wastewater)
    agreement: tuple[tuple[Agreement, ...], ...] = ()


@dataclass(frozen=True, kw_only=True)
class EffectsPage:
    start: dt.date
    end: dt.date
    data_end: dt.date | None  # newest day with cases; the estimates use up to data_end - settle
    options: EffectOptions
    events: tuple[EventEffect, ...]
    regions: tuple[tuple[str, str], ...]  # (code, name) that events can be recorded for
    kinds: tuple[str, ...]
    #: delays and tolerance of the agreement of breaks between streams
    streams: StreamOptions = StreamOptions()
    #: (code, name) of the regions above the districts (the county, its areas), whose pages
    #: show the breaks of counts summed over their districts
    summed_regions: tuple[tuple[str, str], ...] = ()


def _region_by_code(session: Session, code: str) -> Region:
    region = session.scalar(select(Region).where(Region.code == code))
    if region is None or region.level == "plant":
        raise EventError("region", f"no district, area or county with code {code!r}")
    return region


def record_event(
    *, session: Session, user: str, region: str, day: dt.date, kind: str, note: str,
    now: dt.datetime | None = None,
) -> RecordedEvent:
    """Store one event and its audit entry (the caller commits)."""
    account = permitted_account(session=session, name=user, action="record_event")
    if account is None:
        raise EventError("user", f"{user!r} may not record events")
    if kind not in EVENT_KINDS:
        raise EventError("kind", f"{kind!r} is not one of {', '.join(EVENT_KINDS)}")
    text = checked_note(note, limit=NOTE_MAX, missing="an event needs a note", error=EventError)
    target = _region_by_code(session, region.strip())
    at = now or dt.datetime.now(dt.UTC)
    row = RecordedEvent(region_id=target.id, day=day, kind=kind, note=text,
                        recorded_by=account.id, recorded_at=at)
    session.add(row)
    session.flush()
    audit.record(session=session, actor=user, action="record_event", subject=target.code,
                 details={"event_id": row.id, "day": day.isoformat(), "kind": kind,
                          "note": text}, at=at)
    return row


@dataclass(frozen=True)
class _Raw:
    day: dt.date
    region_id: int
    kind: str
    note: str
    by: str


def _tier_changes(session: Session, start: dt.date, end: dt.date) -> list[_Raw]:
    """Published decisions that changed the region's published tier, effective in the period."""
    names = dict(session.execute(select(User.id, User.name)).all())
    rows = session.scalars(
        select(Decision).where(Decision.published_at.is_not(None))
        .order_by(Decision.region_id, Decision.effective_date, Decision.decided_at, Decision.id))
    out, last = [], {}
    for row in rows:
        previous = last.get(row.region_id)
        last[row.region_id] = row.tier
        if previous is None or previous == row.tier or not start <= row.effective_date <= end:
            continue
        out.append(_Raw(row.effective_date, row.region_id, "tier_change",
                        f"tier {previous} -> {row.tier} ({row.kind}): {row.reason}",
                        names.get(row.decided_by, "") if row.decided_by else ""))
    return out


def _recorded(session: Session, start: dt.date, end: dt.date) -> list[_Raw]:
    names = dict(session.execute(select(User.id, User.name)).all())
    rows = session.scalars(select(RecordedEvent).where(
        RecordedEvent.day >= start, RecordedEvent.day <= end).order_by(RecordedEvent.id))
    return [_Raw(r.day, r.region_id, r.kind, r.note,
                 names.get(r.recorded_by, "") if r.recorded_by else "") for r in rows]


def _series(session: Session, codes: list[str], first: dt.date, last: dt.date,
            regions: dict[int, Region]) -> np.ndarray:
    """Daily cases (codes, days): districts as stored, other levels summed from districts."""
    counts = daily_counts(session, CASES, codes, first, last, regions)
    if counts is None:
        raise LookupError(f"no measure {CASES!r} in the store")
    return counts


def _triple(res, name: str, k: int) -> tuple[float, float, float]:  # type: ignore[no-untyped-def]
    return (float(getattr(res, name)[k]), float(getattr(res, f"{name}_lower")[k]),
            float(getattr(res, f"{name}_upper")[k]))


def effects_page(
    *, session: Session, start: dt.date, end: dt.date, options: EffectOptions | None = None,
    streams: StreamOptions | None = None,
) -> EffectsPage:
    """Events effective from ``start`` to ``end`` with their before/after estimates."""
    if end < start:
        raise EventError("end", f"{end.isoformat()} is before the start {start.isoformat()}")
    if (end - start).days > 3 * 366:
        raise EventError("end", "a period of at most three years")
    o = options or EffectOptions()
    regions = {r.id: r for r in session.scalars(select(Region))}
    ordered = [r for r in sorted(
        regions.values(), key=lambda r: ({"county": 0, "region": 1}.get(r.level, 2), r.code))
        if r.level != "plant"]
    choices = tuple((r.code, r.name) for r in ordered)
    # the regions with a district somewhere below them
    parent_of = parents_of(regions)
    below = membership([r.code for r in regions.values() if r.level == "district"], parent_of,
                       [r.code for r in ordered])
    summed = tuple((r.code, r.name) for r, row in zip(ordered, below, strict=True) if row.any())
    raw = sorted(_tier_changes(session, start, end) + _recorded(session, start, end),
                 key=lambda e: (e.day, regions[e.region_id].code, e.kind))
    data_end = newest_cases_day(session)
    if not raw:
        return EffectsPage(start=start, end=end, data_end=data_end, options=o, events=(),
                           regions=choices, kinds=EVENT_KINDS, streams=streams or StreamOptions(),
                           summed_regions=summed)
    codes = sorted({regions[e.region_id].code for e in raw})
    row_of = {c: i for i, c in enumerate(codes)}
    first = start - dt.timedelta(days=o.window + o.delay + 90)
    usable = None if data_end is None else data_end - dt.timedelta(days=o.settle)
    last = usable if usable is not None and usable >= first else first
    counts = _series(session, codes, first, last, regions)
    day_index = np.array([(e.day - first).days for e in raw])
    rows = np.array([row_of[regions[e.region_id].code] for e in raw])
    res = before_after(counts, rows, day_index, window=o.window, delay=o.delay,
                       transition=o.transition, lead=o.lead)
    search_first, search_last = search_span(session, start, None, o.settle)
    searched = stream_breaks(session=session, codes=codes, first=search_first,
                             last=search_last, options=streams)
    breaks = {i: [((b.day - first).days, a) for b, a in zip(
        r.breaks["cases"], r.agreement, strict=True)] for i, r in enumerate(searched)
        if r.searched["cases"]}
    known = np.isfinite(counts).sum(axis=1) > 0
    out = []
    for k, e in enumerate(raw):
        region = regions[e.region_id]
        i = rows[k]

        def day(j: int) -> dt.date:
            return first + dt.timedelta(days=int(j))

        span = (int(res.before_start[k]), int(res.after_end[k]))
        found = breaks.get(i)
        status = str(res.status[k]) if known[i] else "no_data"
        out.append(EventEffect(
            day=e.day, region=region.code, region_name=region.name, level=region.level,
            kind=e.kind, note=e.note, recorded_by=e.by, status=status,
            ready_on=day(res.ready_day[k] + o.settle),
            before=(day(span[0]), day(span[0] + o.window - 1)),
            after=(day(res.after_start[k]), day(span[1] - 1)),
            r_before=_triple(res, "r_before", k), r_after=_triple(res, "r_after", k),
            r_change=_triple(res, "r_change", k), rt_before=_triple(res, "rt_before", k),
            rt_after=_triple(res, "rt_after", k), rt_ratio=_triple(res, "rt_ratio", k),
            breaks=tuple(day(b) for b, _ in (found or ()) if span[0] <= b < span[1]),
            breaks_known=found is not None,
            agreement=tuple(a for b, a in (found or ()) if span[0] <= b < span[1]),
        ))
    return EffectsPage(start=start, end=end, data_end=data_end, options=o, events=tuple(out),
                       regions=choices, kinds=EVENT_KINDS, streams=streams or StreamOptions(),
                       summed_regions=summed)
