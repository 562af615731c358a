"""Read model: what the district page marks on its charts and lists under them, for a district
or for a region above the districts (an area, the county; :mod:`server.readmodels.region_breaks`).

* *Breaks*: change points of the district's daily cases, hospital admissions and the
  wastewater of its main plant, searched over the span every page searches
  (:func:`server.services.stream_breaks.search_span`: the year up to the newest data less the
  days late reports still arrive, so the effects page and the briefing find the same breaks;
  :func:`server.indicators.changepoints.detect_changepoints`, default settings), with the
  interval of each date and the change of the growth rate, those in the period shown; and for
  each case break whether those streams have a break near it in the same direction after
  allowing for their delays (:mod:`server.services.stream_breaks`).
* *Events*: published tier changes and recorded events of the district, its area and the county
  in the period, with their before/after estimates (:func:`server.services.event_effects.
  effects_page`; "too early to tell" until the data allow).
* *A region above the districts*: its cases and admissions are those of its districts summed
  (:func:`server.services.stream_breaks.daily_counts`, a day known only when every district
  reported), listed in ``summed``; its wastewater is *not* summed over plants but that of the
  one plant serving most of its people, the plants serving it listed with their shares in
  ``plants``; no testing changes (the ``testing_change`` screen runs per district).
* *Testing changes*: the changes the ``testing_change`` screen knew over the period
  (:func:`server.indicators.testing_known.testing_changes_as_known`, as of the day each was
  detected plus its estimation days), with the newest analyst verdict on each
  (:mod:`server.services.testing_reviews`).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from server.indicators.testing_known import testing_changes_as_known
from server.services.event_effects import DEFAULT_SETTLE, EventEffect, effects_page
from server.services.hierarchy import membership, parents_of
from server.services.stream_breaks import (
    STREAMS,
    Agreement,
    StreamBreak,
    StreamOptions,
    StreamsOfRegion,
    search_span,
    stream_breaks,
)
from server.services.testing_reviews import SAME_CHANGE_DAYS, Verdict, verdicts_of
from server.store.models import Catchment, Region
from server.store.reads import read_dense

__all__ = ["BreakMark", "DistrictMarks", "TestingMark", "district_marks", "members_of"]

#: Days before the period the case-break search and the testing screen also read.
LEAD_DAYS = 90


@dataclass(frozen=True, kw_only=True)
class BreakMark:
    """A detected break in the district's cases: its day (first day of the new segment) with
    its interval, and the change of the daily growth rate with its interval."""

    day: dt.date
    lower: dt.date
    upper: dt.date
    growth_change: tuple[float, float, float]
    #: one per stream of :data:`server.services.stream_breaks.STREAMS`
    agreement: tuple[Agreement, ...] = ()


@dataclass(frozen=True, kw_only=True)
class TestingMark:
    """A testing change the screen knew: its first day, the day it was detected, tests after /
    before (with interval) and the odds ratio of a positive test; the newest verdict on it."""

    day: dt.date
    detected_on: dt.date
    tests_ratio: tuple[float, float, float]
    odds_ratio: float
    verdict: Verdict | None


@dataclass(frozen=True, kw_only=True)
class DistrictMarks:
    breaks: tuple[BreakMark, ...]
    #: False when the break search could not run (too few days of cases)
    breaks_known: bool
    events: tuple[EventEffect, ...]
    testing: tuple[TestingMark, ...]
    #: breaks of admissions and wastewater in the period
    stream_breaks: tuple[StreamBreak, ...] = ()
    #: per stream of STREAMS: whether its breaks were searched (enough data)
    streams_searched: tuple[tuple[str, bool], ...] = ()
    #: the plant whose wastewater stands for the district
    plant: str | None = None
    options: StreamOptions = StreamOptions()
    #: the region's level: "district", or that of an area or the county
    level: str = "district"
    #: districts (code, name) whose cases and admissions were summed: empty for a district
    summed: tuple[tuple[str, str], ...] = ()
    #: plants (code, share of the summed districts' people served) serving a region above the
    #: districts, largest share first; its wastewater is that of ``plant``, not their sum
    plants: tuple[tuple[str, float], ...] = ()
    #: False when the testing screen does not run for the region (above the districts)
    testing_searched: bool = True


def members_of(session: Session, code: str
               ) -> tuple[str, tuple[tuple[str, str], ...], tuple[tuple[str, float], ...]]:
    """The level of region ``code``; for a region above the districts its districts (code, name)
    and the plants serving them with the share of their people each serves (catchment share
    times population, as :func:`server.services.stream_breaks.main_plants` weighs them)."""
    regions = {r.id: r for r in session.scalars(select(Region))}
    me = next((r for r in regions.values() if r.code == code), None)
    if me is None or me.level in ("district", "plant"):
        return (me.level if me is not None else "district"), (), ()

    all_districts = sorted((r for r in regions.values() if r.level == "district"),
                           key=lambda r: r.code)
    parent_of = parents_of(regions)
    under = membership([r.code for r in all_districts], parent_of, [code])[0]
    districts = [r for r, inside in zip(all_districts, under, strict=True) if inside]
    people = {r.id: float(r.population or 0) for r in districts}
    served: dict[str, float] = {}
    for plant, district, share in session.execute(
            select(Catchment.plant_id, Catchment.district_id, Catchment.share)):
        if district in people and plant in regions:
            name = regions[plant].code
            served[name] = served.get(name, 0.0) + float(share) * people[district]
    total = sum(people.values())
    plants = tuple((p, v / total if total > 0 else float("nan"))
                   for p, v in sorted(served.items(), key=lambda x: (-x[1], x[0])))
    return me.level, tuple((r.code, r.name) for r in districts), plants


def _dense(session: Session, measure: str, code: str, first: dt.date, last: dt.date
           ) -> np.ndarray | None:
    try:
        return read_dense(session=session, measures=[measure], start=first, end=last,
                          regions=[code])[measure][0]
    except LookupError:  # a measure the store does not hold
        return None


def _breaks(streams: StreamsOfRegion, start: dt.date) -> tuple[tuple[BreakMark, ...], bool]:
    out = tuple(BreakMark(day=b.day, lower=b.lower, upper=b.upper,
                          growth_change=b.growth_change, agreement=a)
                for b, a in zip(streams.breaks["cases"], streams.agreement, strict=True)
                if b.day >= start)
    return out, streams.searched["cases"]


def _testing(tests: np.ndarray | None, positives: np.ndarray | None, first: dt.date,
             start: dt.date, verdicts: tuple[Verdict, ...]) -> tuple[TestingMark, ...]:
    if tests is None or positives is None or tests.size < 28:
        return ()
    with np.errstate(invalid="ignore"):
        over = positives > tests
    t, p = np.where(over, np.nan, tests), np.where(over, np.nan, positives)
    known = testing_changes_as_known(t[None, :], p[None, :])
    found = known.detected_day[0]
    out = []
    for detected in np.unique(found[found >= 0]):
        days = np.flatnonzero(found == detected)
        at = int(days[-1])  # the change as known on the last day it was the newest
        change = first + dt.timedelta(days=int(known.change_day[0, at]))
        if change < start:
            continue
        verdict = next((v for v in reversed(verdicts)
                        if abs((v.change_day - change).days) <= SAME_CHANGE_DAYS), None)
        out.append(TestingMark(
            day=change, detected_on=first + dt.timedelta(days=int(detected)),
            tests_ratio=(float(known.tests_ratio[0, at]), float(known.tests_ratio_lower[0, at]),
                         float(known.tests_ratio_upper[0, at])),
            odds_ratio=float(known.odds_ratio[0, at]), verdict=verdict))
    return tuple(out)


def district_marks(*, session: Session, code: str, start: dt.date, end: dt.date,
                   options: StreamOptions | None = None) -> DistrictMarks:
    """Breaks (of every stream), events and testing changes of district ``code`` from
    ``start`` to ``end``; for an area or the county (``code`` above the districts) the breaks
    of its summed cases and admissions and of its main plant, and its and the county's events.
    """
    level, summed, plants = members_of(session, code)
    first = start - dt.timedelta(days=LEAD_DAYS)
    search_first, search_last = search_span(session, start, end, DEFAULT_SETTLE)
    streams = stream_breaks(session=session, codes=[code], first=search_first,
                            last=search_last, options=options)[0]
    breaks, known = _breaks(streams, start)
    others = tuple(sorted((b for s in STREAMS for b in streams.breaks[s] if b.day >= start),
                          key=lambda b: (b.day, b.stream)))
    parent = aliased(Region)
    county = aliased(Region)
    row = session.execute(
        select(parent.code, county.code).select_from(Region)
        .outerjoin(parent, parent.id == Region.parent_id)
        .outerjoin(county, county.id == parent.parent_id)
        .where(Region.code == code)).first()
    mine = {code} | ({c for c in row if c is not None} if row is not None else set())
    events = tuple(e for e in effects_page(session=session, start=start, end=end).events
                   if e.region in mine)
    testing = () if summed else _testing(
        _dense(session, "tests", code, first, end), _dense(session, "positives", code, first, end),
        first, start, verdicts_of(session=session, code=code))
    return DistrictMarks(breaks=breaks, breaks_known=known, events=events, testing=testing,
                         stream_breaks=others,
                         streams_searched=tuple((s, streams.searched[s]) for s in STREAMS),
                         plant=streams.plant, options=streams.options, level=level,
                         summed=summed, plants=plants, testing_searched=not summed)
