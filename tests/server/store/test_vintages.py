"""Bulk appends of vintages, revisions and as-of reads, on SQLite and PostgreSQL."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.store import (
    DuplicateKeyError,
    MeasureRecord,
    RegionRecord,
    Rejection,
    UnknownCodeError,
    append_vintage,
    checksum_of,
    read_dense,
    revision_history,
    upsert_measures,
    upsert_regions,
)
from server.store.models import Observation, RejectedRow, Vintage

T0 = datetime(2026, 3, 2, 6, 0, tzinfo=UTC)


@pytest.fixture
def catalogue(session: Session) -> Session:
    upsert_regions(
        session=session,
        records=[
            RegionRecord(
                code="X0", name="Testshire", level="county", parent=None, population=30000
            ),
            RegionRecord(
                code="XA", name="Alder Vale", level="district", parent="X0", population=20000
            ),
            RegionRecord(
                code="XB", name="Brookmere", level="district", parent="X0", population=10000
            ),
        ],
    )
    upsert_measures(
        session=session,
        records=[
            MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum"),
            MeasureRecord(name="tests", unit="tests", kind="count", aggregation="sum"),
        ],
    )
    return session


def rows(*items: tuple[str, str, str, float]) -> pd.DataFrame:
    return pd.DataFrame(items, columns=["region", "measure", "ref_date", "value"])


def append(session: Session, frame: pd.DataFrame, at: datetime, **kw) -> Vintage:
    content = frame.to_csv(index=False).encode()
    return append_vintage(
        session=session,
        feed="test",
        received_at=at,
        rows=frame,
        checksum=checksum_of(content),
        **kw,
    )


def test_append_vintage_stores_every_row(catalogue: Session) -> None:
    v = append(
        catalogue, rows(("XA", "cases", "2026-03-01", 4), ("XB", "cases", "2026-03-01", 2)), T0
    )
    assert v.rows_accepted == 2
    count = catalogue.scalar(select(func.count()).select_from(Observation))
    assert count == 2


def test_revision_creates_new_vintage_and_keeps_old_value_readable(catalogue: Session) -> None:
    first = append(catalogue, rows(("XA", "cases", "2026-03-01", 4)), T0)
    second = append(catalogue, rows(("XA", "cases", "2026-03-01", 7)), T0 + timedelta(days=1))
    assert second.id != first.id
    history = revision_history(
        session=catalogue, region="XA", measure="cases", ref_date=date(2026, 3, 1)
    )
    assert [r.value for r in history] == [4.0, 7.0]
    assert [r.vintage_id for r in history] == [first.id, second.id]


def test_as_of_read_before_revision_returns_old_value(catalogue: Session) -> None:
    append(catalogue, rows(("XA", "cases", "2026-03-01", 4)), T0)
    append(catalogue, rows(("XA", "cases", "2026-03-01", 7)), T0 + timedelta(days=1))
    dense = read_dense(
        session=catalogue,
        measures=["cases"],
        start=date(2026, 3, 1),
        end=date(2026, 3, 1),
        regions=["XA"],
        as_of=T0 + timedelta(hours=12),
    )
    assert dense["cases"][0, 0] == 4.0


def test_current_read_returns_revised_value(catalogue: Session) -> None:
    append(catalogue, rows(("XA", "cases", "2026-03-01", 4)), T0)
    append(catalogue, rows(("XA", "cases", "2026-03-01", 7)), T0 + timedelta(days=1))
    dense = read_dense(
        session=catalogue,
        measures=["cases"],
        start=date(2026, 3, 1),
        end=date(2026, 3, 1),
        regions=["XA"],
    )
    assert dense["cases"][0, 0] == 7.0


def test_as_of_read_before_any_vintage_is_all_missing(catalogue: Session) -> None:
    append(catalogue, rows(("XA", "cases", "2026-03-01", 4)), T0)
    dense = read_dense(
        session=catalogue,
        measures=["cases"],
        start=date(2026, 3, 1),
        end=date(2026, 3, 1),
        as_of=T0 - timedelta(seconds=1),
    )
    assert np.isnan(dense["cases"]).all()


def test_read_dense_is_regions_by_days_with_nan_for_missing(catalogue: Session) -> None:
    append(
        catalogue,
        rows(
            ("XA", "cases", "2026-03-01", 1),
            ("XA", "cases", "2026-03-03", 3),
            ("XB", "tests", "2026-03-02", 50),
        ),
        T0,
    )
    dense = read_dense(
        session=catalogue,
        measures=["cases", "tests"],
        start=date(2026, 3, 1),
        end=date(2026, 3, 3),
        regions=["XB", "XA"],
    )
    assert dense.regions == ("XB", "XA")
    assert_array_equal(
        dense.dates, np.array(["2026-03-01", "2026-03-02", "2026-03-03"], "datetime64[D]")
    )
    assert_array_equal(dense["cases"], [[np.nan, np.nan, np.nan], [1.0, np.nan, 3.0]])
    assert_array_equal(dense["tests"], [[np.nan, 50.0, np.nan], [np.nan, np.nan, np.nan]])


def test_read_dense_later_received_wins_over_later_inserted(catalogue: Session) -> None:
    # A backfill inserted last but received earlier must not hide the newer value.
    append(catalogue, rows(("XA", "cases", "2026-03-01", 9)), T0 + timedelta(days=2))
    append(catalogue, rows(("XA", "cases", "2026-03-01", 5)), T0)
    dense = read_dense(
        session=catalogue,
        measures=["cases"],
        start=date(2026, 3, 1),
        end=date(2026, 3, 1),
        regions=["XA"],
    )
    assert dense["cases"][0, 0] == 9.0


def test_append_vintage_unknown_region_leaves_nothing_behind(catalogue: Session) -> None:
    with pytest.raises(UnknownCodeError, match="unknown region code.*'NOPE'"):
        append(
            catalogue,
            rows(("XA", "cases", "2026-03-01", 4), ("NOPE", "cases", "2026-03-01", 1)),
            T0,
        )
    assert catalogue.scalar(select(func.count()).select_from(Vintage)) == 0
    assert catalogue.scalar(select(func.count()).select_from(Observation)) == 0


def test_append_vintage_duplicate_key_is_refused(catalogue: Session) -> None:
    with pytest.raises(DuplicateKeyError, match="1 duplicate key"):
        append(
            catalogue, rows(("XA", "cases", "2026-03-01", 4), ("XA", "cases", "2026-03-01", 5)), T0
        )
    assert catalogue.scalar(select(func.count()).select_from(Vintage)) == 0


def test_append_vintage_failure_midway_rolls_back_the_savepoint(
    catalogue: Session, monkeypatch: pytest.MonkeyPatch
) -> None:
    import server.store.vintages as vintages

    def explode(*_args, **_kwargs):
        raise RuntimeError("disk full")

    append(catalogue, rows(("XA", "cases", "2026-03-01", 4)), T0)
    monkeypatch.setattr(vintages, "_bulk_insert_observations", explode)
    with pytest.raises(RuntimeError, match="disk full"):
        append(catalogue, rows(("XA", "cases", "2026-03-02", 4)), T0 + timedelta(days=1))
    # the earlier vintage is intact, the failed one left no row
    assert catalogue.scalar(select(func.count()).select_from(Vintage)) == 1
    assert catalogue.scalar(select(func.count()).select_from(Observation)) == 1


def test_append_vintage_records_rejections(catalogue: Session) -> None:
    v = append(
        catalogue,
        rows(("XA", "cases", "2026-03-01", 4)),
        T0,
        rejections=[Rejection(line=3, raw="XQ,cases,2026-03-01,1", reason="unknown_region")],
    )
    assert v.rows_rejected == 1
    rejected = catalogue.scalars(select(RejectedRow)).all()
    assert [(r.line, r.reason) for r in rejected] == [(3, "unknown_region")]


def test_append_vintage_refuses_naive_timestamp(catalogue: Session) -> None:
    with pytest.raises(Exception, match="has no time zone"):
        append(catalogue, rows(("XA", "cases", "2026-03-01", 4)), datetime(2026, 3, 2, 6, 0))


def test_append_vintage_many_rows_round_trip(catalogue: Session) -> None:
    rng = np.random.default_rng(20260301)
    dates = pd.date_range("2025-01-01", periods=400).date
    frame = pd.DataFrame(
        {
            "region": np.repeat(["XA", "XB"], dates.size),
            "measure": "cases",
            "ref_date": np.tile(dates, 2),
            "value": rng.poisson(30, 2 * dates.size).astype(float),
        }
    )
    append(catalogue, frame, T0)
    dense = read_dense(
        session=catalogue, measures=["cases"], start=dates[0], end=dates[-1], regions=["XA", "XB"]
    )
    assert_array_equal(dense["cases"].reshape(-1), frame["value"].to_numpy())
