"""Read model of an area's or the county's page: which districts are summed, which plants serve
them, and the marks of a region above the districts (no testing screen)."""

from __future__ import annotations

from datetime import date

import pytest
from numpy.testing import assert_allclose
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.readmodels.district_marks import district_marks, members_of
from server.readmodels.dossier import PeriodError
from server.readmodels.region_breaks import NoRegionDataError, is_above_districts, region_breaks
from server.services.stream_breaks import main_plants
from server.store.models import Catchment, Region


@pytest.mark.parametrize(("code", "above"), [("R1", True), ("C0", True), ("D01", False),
                                             ("WW1", False), ("NOPE", False)],
                         ids=["area", "county", "district", "plant", "unknown"])
def test_is_above_districts_by_level(demo_session: Session, code: str, above: bool) -> None:
    assert is_above_districts(session=demo_session, code=code) is above


def test_members_of_an_area_weighs_plants_by_people_served(demo_session: Session) -> None:
    # people served = catchment share x district population, over the area's people (the
    # weighing of stream_breaks.main_plants; common practice, no source)
    area = demo_session.scalar(select(Region).where(Region.code == "R1"))
    assert area is not None
    districts = list(demo_session.scalars(select(Region).where(Region.parent_id == area.id,
                                                               Region.level == "district")))
    level, summed, plants = members_of(demo_session, "R1")
    assert level == area.level
    assert summed == tuple(sorted((d.code, d.name) for d in districts))
    people = {d.id: d.population for d in districts}
    served: dict[int, float] = {}
    for c in demo_session.scalars(select(Catchment)):
        if c.district_id in people:
            served[c.plant_id] = served.get(c.plant_id, 0.0) + c.share * people[c.district_id]
    code_of = {r.id: r.code for r in demo_session.scalars(select(Region))}
    expected = {code_of[p]: v / sum(people.values()) for p, v in served.items()}
    assert dict(plants).keys() == expected.keys()
    assert_allclose([s for _p, s in plants], [expected[p] for p, _s in plants])
    assert [s for _p, s in plants] == sorted((s for _p, s in plants), reverse=True)
    regions = {r.id: r for r in demo_session.scalars(select(Region))}
    assert plants[0][0] == main_plants(demo_session, ["R1"], regions)[0]


def test_members_of_a_district_is_itself(demo_session: Session) -> None:
    assert members_of(demo_session, "D01") == ("district", (), ())


def test_region_marks_have_no_testing_screen(demo_session: Session) -> None:
    marks = district_marks(session=demo_session, code="R1", start=date(2026, 8, 3),
                           end=date(2026, 11, 30))
    assert marks.testing == () and marks.testing_searched is False
    assert len(marks.summed) == 5 and marks.plant == marks.plants[0][0]
    district = district_marks(session=demo_session, code="D01", start=date(2026, 8, 3),
                              end=date(2026, 11, 30))
    assert district.summed == () and district.testing_searched is True


def test_region_breaks_refuses_a_district_and_a_reversed_period(demo_session: Session) -> None:
    with pytest.raises(NoRegionDataError, match="'D01'"):
        region_breaks(session=demo_session, code="D01")
    with pytest.raises(PeriodError, match="start 2026-10-02 is after end 2026-10-01"):
        region_breaks(session=demo_session, code="R1", start=date(2026, 10, 2),
                      end=date(2026, 10, 1))


def test_region_breaks_defaults_to_the_last_120_days_of_cases(demo_session: Session) -> None:
    page = region_breaks(session=demo_session, code="C0")
    assert page.end == page.last_day == date(2026, 11, 30)  # the demo's last day (conftest)
    assert (page.end - page.start).days == 119 and len(page.dates) == 120 == len(page.cases)
    assert page.parent is None and page.admissions is not None


def test_every_page_finds_the_same_breaks_of_a_region(demo_session: Session) -> None:
    # the effects page, a district's or an area's page and a briefing all search the span of
    # search_span (the year up to the newest data less the settle days), whatever period they
    # show: two pages over different periods agree on the breaks they both show, with the
    # same estimates, and a break the effects page lists in an event's windows is on the
    # region's page too (before, each page searched from 90 days before its own period, and a
    # break listed on the effects page was missing from the area's page: found by trying the
    # pages in a browser). The demo's cases start in early July 2026, so a period from
    # November searched less of them than one from September.
    from datetime import UTC, datetime

    from server.services.event_effects import effects_page
    from server.store.models import RecordedEvent

    end = date(2026, 11, 30)
    late, early = date(2026, 11, 1), date(2026, 9, 1)
    codes = ("D01", "D04", "D05", "R1", "R2", "C0")
    for code in codes:
        short = district_marks(session=demo_session, code=code, start=late, end=end)
        long = district_marks(session=demo_session, code=code, start=early, end=end)
        assert [(b.day, b.lower, b.upper, b.growth_change) for b in short.breaks] == [
            (b.day, b.lower, b.upper, b.growth_change) for b in long.breaks if b.day >= late]
    ids = {r.code: r.id for r in demo_session.scalars(select(Region))}
    for code in codes:  # an event in each region, so that the effects page searches them all
        demo_session.add(RecordedEvent(region_id=ids[code], day=date(2026, 9, 20),
                                       kind="measure_start", note="invented", recorded_by=None,
                                       recorded_at=datetime(2026, 9, 20, tzinfo=UTC)))
    demo_session.flush()
    page = effects_page(session=demo_session, start=early, end=end)
    listed = [(e.region, b) for e in page.events for b in e.breaks]
    assert listed  # the demo's regions turn in September
    for region, day in listed:
        shown = {b.day for b in district_marks(session=demo_session, code=region,
                                                start=early, end=end).breaks}
        assert day in shown, (region, day, sorted(shown))
