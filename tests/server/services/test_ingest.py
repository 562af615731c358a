"""Ingestion of feed payloads into vintages, on SQLite and PostgreSQL."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import pytest
from numpy.testing import assert_allclose
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.feeds.definition import parse_feeds
from server.feeds.errors import EncodingError, HeaderError
from server.feeds.sources import Payload
from server.services.ingest import ingest_payload
from server.store import (
    MeasureRecord,
    RegionRecord,
    read_dense,
    revision_history,
    upsert_measures,
    upsert_regions,
)
from server.store.models import Observation, RejectedRow, Vintage

T0 = datetime(2026, 3, 10, 6, 0, tzinfo=UTC)
TODAY = date(2026, 3, 10)
FEEDS = parse_feeds(
    """
feeds:
  - name: long-csv
    source: {kind: push}
    measures:
      cases: {max: 5000}
      tests: {}
      positives: {}
      ww_concentration: {}
  - name: wide-csv
    source: {kind: push}
    layout: wide
    measures:
      cases: {source: n_cases}
      tests: {source: n_tests}
  - name: weekly
    source: {kind: push}
    cadence: weekly
    regions: {OLD-A: QA}
    measures: [cases]
  - name: json-feed
    source: {kind: push}
    format: json
    measures: [cases]
""",
    source="test-feeds.yaml",
)

MESSY = (
    "region,date,measure,value\n"
    "QA,2026-03-01,cases,12\n"            # 2 good
    "QZ,2026-03-01,cases,3\n"             # 3 unknown region
    "QA,2026-03-01,deaths,1\n"            # 4 unknown measure
    "QA,01/03/2026,cases,4\n"             # 5 unparsable date
    "QA,2026-04-01,cases,4\n"             # 6 future date
    "QA,2026-03-02,cases,\n"              # 7 missing value
    "QA,2026-03-02,cases,lots\n"          # 8 non-numeric
    "QA,2026-03-03,cases,-2\n"            # 9 negative count
    "QA,2026-03-04,cases,2.5\n"           # 10 non-integer count
    "QA,2026-03-05,cases,99999\n"         # 11 out of range
    "QB,2026-03-01,tests,10\n"            # 12 tests (positives above: both rejected)
    "QB,2026-03-01,positives,14\n"        # 13
    "QB,2026-03-02,cases,5\n"             # 14 conflicting duplicate
    "QB,2026-03-02,cases,6\n"             # 15 conflicting duplicate
    "QB,2026-03-03,cases,7\n"             # 16 good
    "QB,2026-03-03,cases,7\n"             # 17 identical duplicate of 16
    "QA,2026-03-01,ww_concentration,1.5e5\n"  # 18 good (not a count)
)


@pytest.fixture
def catalogue(session: Session) -> Session:
    upsert_regions(session=session, records=[
        RegionRecord(code="Q0", name="Quillshire", level="county", parent=None, population=9000),
        RegionRecord(code="QA", name="Ashwick", level="district", parent="Q0", population=5000),
        RegionRecord(code="QB", name="Bramblecote", level="district", parent="Q0",
                     population=4000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum"),
        MeasureRecord(name="tests", unit="tests", kind="count", aggregation="sum"),
        MeasureRecord(name="positives", unit="tests", kind="count", aggregation="sum"),
        MeasureRecord(name="ww_concentration", unit="copies/L", kind="concentration",
                      aggregation="none"),
    ])
    return session


def ingest(session: Session, text: str | bytes, feed: str = "long-csv",
           at: datetime = T0, **kw):  # type: ignore[no-untyped-def]
    content = text.encode() if isinstance(text, str) else text
    return ingest_payload(session=session, feed=FEEDS[feed], payload=Payload.from_bytes(
        "messy.csv", content), received_at=at, today=at.date(), **kw)


def test_ingest_messy_file_lands_good_rows(catalogue: Session) -> None:
    receipt = ingest(catalogue, MESSY)
    assert receipt.rows_accepted == 3
    count = catalogue.scalar(select(func.count()).select_from(Observation).where(
        Observation.vintage_id == receipt.vintage_id))
    assert count == 3


def test_ingest_messy_file_names_each_reason_with_its_line(catalogue: Session) -> None:
    receipt = ingest(catalogue, MESSY)
    stored = catalogue.execute(
        select(RejectedRow.line, RejectedRow.reason).where(
            RejectedRow.vintage_id == receipt.vintage_id).order_by(RejectedRow.line)
    ).all()
    assert [tuple(r) for r in stored] == [
        (3, "unknown_region"), (4, "unknown_measure"), (5, "unparsable_date"),
        (6, "future_date"), (7, "missing_value"), (8, "non_numeric_value"),
        (9, "negative_count"), (10, "non_integer_count"), (11, "out_of_range"),
        (12, "positives_exceed_tests"), (13, "positives_exceed_tests"),
        (14, "conflicting_duplicate"), (15, "conflicting_duplicate"), (17, "duplicate_row"),
    ]


def test_ingest_rejected_row_keeps_raw_text(catalogue: Session) -> None:
    receipt = ingest(catalogue, MESSY)
    raw = catalogue.scalar(select(RejectedRow.raw).where(
        RejectedRow.vintage_id == receipt.vintage_id, RejectedRow.line == 15))
    assert raw == "QB,2026-03-02,cases,6"


def test_ingest_twice_is_a_no_op(catalogue: Session) -> None:
    first = ingest(catalogue, MESSY)
    second = ingest(catalogue, MESSY, at=T0 + timedelta(hours=1))
    assert (second.unchanged, second.vintage_id) == (True, first.vintage_id)
    assert catalogue.scalar(select(func.count()).select_from(Vintage)) == 1


def test_ingest_corrected_file_is_a_revision_visible_as_of(catalogue: Session) -> None:
    ingest(catalogue, "region,date,measure,value\nQA,2026-03-01,cases,12\n")
    later = T0 + timedelta(days=1)
    ingest(catalogue, "region,date,measure,value\nQA,2026-03-01,cases,15\n", at=later)
    history = revision_history(session=catalogue, region="QA", measure="cases",
                               ref_date=date(2026, 3, 1))
    assert [h.value for h in history] == [12.0, 15.0]
    before = read_dense(session=catalogue, measures=["cases"], start=date(2026, 3, 1),
                        end=date(2026, 3, 1), regions=["QA"], as_of=T0)
    assert_allclose(before["cases"], [[12.0]])


def test_ingest_wide_layout_one_observation_per_cell(catalogue: Session) -> None:
    text = "region;date;n_cases;n_tests\nQA;2026-03-01;3;40\nQB;2026-03-01;;20\n"
    receipt = ingest(catalogue, text, feed="wide-csv")
    assert (receipt.rows_accepted, receipt.rows_rejected) == (3, 0)


def test_ingest_iso_week_maps_to_monday_and_region_mapping(catalogue: Session) -> None:
    receipt = ingest(catalogue, "region,date,measure,value\nOLD-A,2026-W09,cases,30\n",
                     feed="weekly")
    ref = catalogue.scalar(select(Observation.ref_date).where(
        Observation.vintage_id == receipt.vintage_id))
    # ISO 8601: week 9 of 2026 starts on Monday 23 February 2026 (datetime.fromisocalendar).
    assert ref == date.fromisocalendar(2026, 9, 1) == date(2026, 2, 23)


def test_ingest_json_records(catalogue: Session) -> None:
    text = '{"records": [{"region": "QA", "date": "2026-03-01", "measure": "cases", "value": 4},'
    text += ' {"region": "QA", "date": "2026-03-02", "measure": "cases", "value": null}]}'
    receipt = ingest(catalogue, text, feed="json-feed")
    assert (receipt.rows_accepted, receipt.reasons[0].reason) == (1, "missing_value")


def test_ingest_header_without_value_rejects_whole_file(catalogue: Session) -> None:
    with pytest.raises(HeaderError, match=r"expected \['region', 'date', 'measure', 'value'\]"):
        ingest(catalogue, "region,date,measure\nQA,2026-03-01,cases\n")
    assert catalogue.scalar(select(func.count()).select_from(Vintage)) == 0


def test_ingest_latin1_bytes_rejected_with_offset(catalogue: Session) -> None:
    content = b"region,date,measure,value\nQA,2026-03-01,cases,1\n" + b"Q\xe9,x,y,z\n"
    with pytest.raises(EncodingError, match="byte 49"):
        ingest(catalogue, content)


def test_ingest_bom_and_semicolons_accepted(catalogue: Session) -> None:
    content = "\ufeffregion;date;measure;value\r\nQA;2026-03-01;cases;1\r\n".encode()
    assert ingest(catalogue, content).rows_accepted == 1


def test_ingest_dry_run_writes_nothing(catalogue: Session) -> None:
    receipt = ingest(catalogue, MESSY, dry_run=True)
    assert (receipt.rows_accepted, receipt.rows_rejected, receipt.vintage_id) == (3, 14, None)
    assert catalogue.scalar(select(func.count()).select_from(Vintage)) == 0


def _reasons(session: Session, receipt) -> list[tuple[int, str, str]]:  # type: ignore[no-untyped-def]
    return [tuple(r) for r in session.execute(
        select(RejectedRow.line, RejectedRow.reason, RejectedRow.message).where(
            RejectedRow.vintage_id == receipt.vintage_id).order_by(RejectedRow.line))]


def test_positives_above_stored_tests_rejected_naming_the_store(catalogue: Session) -> None:
    stored = ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,tests,10\n")
    later = T0 + timedelta(hours=2)
    receipt = ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,positives,14\n"
                     "QB,2026-03-02,positives,14\nQA,2026-03-01,positives,3\n", at=later)
    assert receipt.rows_accepted == 2  # no tests stored for QB on 2 March, nor for QA
    ((line, reason, message),) = _reasons(catalogue, receipt)
    assert (line, reason) == (2, "positives_exceed_tests")
    assert message == (f"positives 14 (line 2) exceed tests 10 already stored (vintage "
                       f"{stored.vintage_id}) for the same region and date")


def test_tests_below_stored_positives_rejected(catalogue: Session) -> None:
    ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,positives,9\n")
    receipt = ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,tests,5\n"
                     "QB,2026-03-01,cases,1\n", at=T0 + timedelta(hours=1))
    assert [(ln, why) for ln, why, _ in _reasons(catalogue, receipt)] == [
        (2, "positives_exceed_tests")]
    assert receipt.rows_accepted == 1


def test_stored_pair_uses_the_newest_value_and_the_file_pair_wins(catalogue: Session) -> None:
    ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,tests,10\n")
    ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,tests,20\n",
           at=T0 + timedelta(hours=1))  # a revision: 20 is the newest known value
    revised = ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,positives,14\n",
                     at=T0 + timedelta(hours=2))
    assert (revised.rows_accepted, revised.rows_rejected) == (1, 0)
    in_file = ingest(catalogue, "region,date,measure,value\nQB,2026-03-01,positives,30\n"
                     "QB,2026-03-01,tests,40\n", at=T0 + timedelta(hours=3))
    assert (in_file.rows_accepted, in_file.rows_rejected) == (2, 0)


def test_decimal_comma_feed_lands_values_and_rejects_grouped_ones(catalogue: Session) -> None:
    feeds = parse_feeds(
        "feeds:\n  - name: comma\n    source: {kind: push}\n    delimiter: ';'\n"
        "    decimal: ','\n    measures: [ww_concentration, cases]\n", source="t.yaml")
    content = (b"region;date;measure;value\nQA;2026-03-01;ww_concentration;1234,5\n"
               b"QA;2026-03-02;ww_concentration;1.234,5\n")
    receipt = ingest_payload(session=catalogue, feed=feeds["comma"], payload=Payload.from_bytes(
        "comma.csv", content), received_at=T0, today=TODAY)
    assert [(ln, why) for ln, why, _ in _reasons(catalogue, receipt)] == [
        (3, "ambiguous_number")]
    stored = read_dense(session=catalogue, measures=["ww_concentration"],
                        start=date(2026, 3, 1), end=date(2026, 3, 1), regions=["QA"])
    assert_allclose(stored["ww_concentration"], [[1234.5]])
