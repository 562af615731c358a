"""Freshness and newest-value reads of the store (server/store/reads.py), on every back end.

The dense current/as-of reads and the revision history are tested with the appends in
test_vintages.py; this module covers the reads the feeds and the ingest checks use.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import pandas as pd
import pytest
from numpy.testing import assert_array_equal
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.store import (
    MeasureRecord,
    RegionRecord,
    append_vintage,
    latest_dates,
    upsert_measures,
    upsert_regions,
)
from server.store.models import Measure, Region
from server.store.reads import FeedLastDate, LatestDate, feed_last_dates, newest_values

T0 = datetime(2031, 5, 4, 6, 0, tzinfo=UTC)  # invented dates and places throughout
DAY = date(2031, 5, 1)


@pytest.fixture
def stored(session: Session) -> Session:
    upsert_regions(session=session, records=[
        RegionRecord(code="Q0", name="Quillshire", level="county", parent=None, population=9000),
        RegionRecord(code="QA", name="Ashgrove", level="district", parent="Q0", population=5000),
        RegionRecord(code="QB", name="Birchmoor", level="district", parent="Q0", population=4000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum"),
        MeasureRecord(name="tests", unit="tests", kind="count", aggregation="sum"),
    ])
    _append(session, "lab", T0, [("QA", "cases", DAY, 4), ("QA", "cases", DAY + timedelta(1), 5),
                                  ("QB", "cases", DAY, 2), ("Q0", "tests", DAY, 90)])
    _append(session, "lab", T0 + timedelta(days=1),
            [("QA", "cases", DAY + timedelta(1), 7), ("QA", "cases", DAY + timedelta(2), 3)])
    _append(session, "hospital", T0 + timedelta(days=2), [("QB", "cases", DAY + timedelta(5), 1)])
    return session


def _append(
    session: Session, feed: str, at: datetime, items: list[tuple[str, str, date, float]]
) -> int:
    frame = pd.DataFrame(items, columns=["region", "measure", "ref_date", "value"])
    return append_vintage(session=session, feed=feed, received_at=at, rows=frame,
                          checksum=f"{feed}-{at.isoformat()}-{len(items)}").id


def _id(session: Session, model: type[Region] | type[Measure], field: str, value: str) -> int:
    found = session.scalar(select(model.id).where(getattr(model, field) == value))
    assert found is not None
    return found


def test_latest_dates_newest_day_and_newest_arrival_per_key(stored: Session) -> None:
    assert latest_dates(session=stored) == [
        LatestDate(region="Q0", measure="tests", ref_date=DAY, received_at=T0),
        LatestDate(region="QA", measure="cases", ref_date=DAY + timedelta(2),
                   received_at=T0 + timedelta(days=1)),
        LatestDate(region="QB", measure="cases", ref_date=DAY + timedelta(5),
                   received_at=T0 + timedelta(days=2)),
    ]


def test_latest_dates_filters_by_level_and_reads_aware_times(stored: Session) -> None:
    found = latest_dates(session=stored, level="county")
    assert [(d.region, d.measure) for d in found] == [("Q0", "tests")]
    assert found[0].received_at.tzinfo is not None


def test_newest_values_take_the_latest_vintage_per_day(stored: Session) -> None:
    cases = _id(stored, Measure, "name", "cases")
    qa, qb = _id(stored, Region, "code", "QA"), _id(stored, Region, "code", "QB")
    got = newest_values(session=stored, measure_id=cases, region_ids=[qa, qb], start=DAY,
                        end=DAY + timedelta(2))
    order = sorted(range(len(got)), key=lambda i: (got.region_id[i], got.day[i]))
    epoch = (DAY - date(1970, 1, 1)).days
    found = [(int(got.region_id[i]), int(got.day[i]) - epoch, float(got.value[i])) for i in order]
    assert found == [(qa, 0, 4.0), (qa, 1, 7.0), (qa, 2, 3.0), (qb, 0, 2.0)]


def test_newest_values_tie_in_arrival_goes_to_the_later_vintage(stored: Session) -> None:
    cases = _id(stored, Measure, "name", "cases")
    qb = _id(stored, Region, "code", "QB")
    at = T0 + timedelta(days=3)
    _append(stored, "lab", at, [("QB", "cases", DAY, 20)])
    later = _append(stored, "lab", at, [("QB", "cases", DAY, 21)])
    got = newest_values(session=stored, measure_id=cases, region_ids=[qb], start=DAY, end=DAY)
    assert_array_equal(got.value, [21.0])
    assert_array_equal(got.vintage_id, [later])


def test_newest_values_empty_regions_or_range_read_nothing(stored: Session) -> None:
    cases = _id(stored, Measure, "name", "cases")
    qa = _id(stored, Region, "code", "QA")
    assert len(newest_values(session=stored, measure_id=cases, region_ids=[], start=DAY,
                             end=DAY)) == 0
    assert len(newest_values(session=stored, measure_id=cases, region_ids=[qa],
                             start=DAY + timedelta(10), end=DAY + timedelta(20))) == 0


def test_feed_last_dates_per_feed_and_as_of(stored: Session) -> None:
    assert feed_last_dates(session=stored, measures=["cases"]) == [
        FeedLastDate(feed="hospital", region="QB", measure="cases", ref_date=DAY + timedelta(5)),
        FeedLastDate(feed="lab", region="QA", measure="cases", ref_date=DAY + timedelta(2)),
        FeedLastDate(feed="lab", region="QB", measure="cases", ref_date=DAY),
    ]
    # as known on the first morning: only the first vintage
    assert feed_last_dates(session=stored, measures=["cases", "tests"], as_of=T0) == [
        FeedLastDate(feed="lab", region="Q0", measure="tests", ref_date=DAY),
        FeedLastDate(feed="lab", region="QA", measure="cases", ref_date=DAY + timedelta(1)),
        FeedLastDate(feed="lab", region="QB", measure="cases", ref_date=DAY),
    ]
