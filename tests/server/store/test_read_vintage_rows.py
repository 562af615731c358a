"""The triangle read (``read_vintage_rows`` in server/store/reads.py): every vintage's value in
arrival order, on SQLite and PostgreSQL."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pandas as pd
import pytest
from sqlalchemy.orm import Session

from server.store import (
    MeasureRecord,
    RegionRecord,
    UnknownCodeError,
    append_vintage,
    checksum_of,
    upsert_measures,
    upsert_regions,
)
from server.store.reads import read_vintage_rows

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC)


@pytest.fixture
def store(session: Session) -> Session:
    upsert_regions(session=session, records=[
        RegionRecord(code="X0", name="Testshire", level="county", parent=None, population=30000),
        RegionRecord(code="XA", name="Alder Vale", level="district", parent="X0",
                     population=20000),
        RegionRecord(code="XB", name="Brookmere", level="district", parent="X0",
                     population=10000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum"),
        MeasureRecord(name="tests", unit="tests", kind="count", aggregation="sum"),
    ])
    return session


def _append(session: Session, items: list[tuple[str, str, str, float]], at: datetime) -> None:
    frame = pd.DataFrame(items, columns=["region", "measure", "ref_date", "value"])
    append_vintage(session=session, feed="t", received_at=at, rows=frame,
                   checksum=checksum_of(frame.to_csv(index=False).encode() + str(at).encode()))


def test_read_vintage_rows_in_arrival_order_with_receipt_times(store: Session) -> None:
    # inserted out of arrival order: the later-received vintage first
    _append(store, [("XA", "cases", "2026-03-01", 7.0)], T0 + timedelta(days=1))
    _append(store, [("XA", "cases", "2026-03-01", 4.0), ("XB", "tests", "2026-03-01", 30.0)],
            T0)
    got = read_vintage_rows(session=store, measures=["tests", "cases"], regions=["XB", "XA"],
                            start=date(2026, 2, 28), end=date(2026, 3, 1))
    assert got.value.tolist()[-1] == 7.0 and sorted(got.value.tolist()[:2]) == [4.0, 30.0]
    assert got.received_at[-1] == np.datetime64("2026-03-03T06:00:00", "us")
    assert (np.diff(got.received_at.astype(np.int64)) >= 0).all()
    assert got.ref_day.tolist() == [1, 1, 1]
    pairs = sorted(zip(got.measure.tolist(), got.region.tolist(), strict=True))
    assert pairs == [(0, 0), (1, 1), (1, 1)]  # tests of XB, cases of XA (in the given orders)


def test_read_vintage_rows_as_of_leaves_later_vintages_out(store: Session) -> None:
    _append(store, [("XA", "cases", "2026-03-01", 4.0)], T0)
    _append(store, [("XA", "cases", "2026-03-01", 7.0)], T0 + timedelta(days=1))
    got = read_vintage_rows(session=store, measures=["cases"], regions=["XA"],
                            start=date(2026, 3, 1), end=date(2026, 3, 1), as_of=T0)
    assert got.value.tolist() == [4.0]
    empty = read_vintage_rows(session=store, measures=["cases"], regions=["XA"],
                              start=date(2026, 3, 1), end=date(2026, 3, 1),
                              as_of=T0 - timedelta(hours=1))
    assert len(empty) == 0


def test_read_vintage_rows_names_unknown_measures(store: Session) -> None:
    with pytest.raises(UnknownCodeError, match="wastewater"):
        read_vintage_rows(session=store, measures=["wastewater"], regions=["XA"],
                          start=date(2026, 3, 1), end=date(2026, 3, 1))
