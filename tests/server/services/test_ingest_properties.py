"""Property: arbitrary bytes never crash an ingest and never change observations already stored."""

from __future__ import annotations

from datetime import UTC, datetime

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.feeds.definition import parse_feeds
from server.feeds.errors import FeedFileError
from server.feeds.sources import Payload
from server.services.ingest import ingest_payload
from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.models import Observation

FEED = parse_feeds("feeds:\n  - name: long-csv\n    source: {kind: push}\n"
                   "    measures: [cases, tests, positives]\n", source="t.yaml")["long-csv"]
T0 = datetime(2026, 3, 10, 6, tzinfo=UTC)
HEADER = b"region,date,measure,value\n"
LINES = st.lists(st.sampled_from([
    b"PA,2026-03-01,cases,5", b"PA,2026-03-01,cases,6", b"PB,2026-03-02,tests,3",
    b"PB,2026-03-02,positives,9", b"PA,2026-03-0x,cases,1", b"PZ,2026-03-01,cases,1",
    b"PA,2026-03-01,tests,-1", b"", b"PA,2026-03-01", b'"PA,2026', b"\xff\xfe",
]), max_size=12).map(lambda ls: b"\n".join(ls))


def snapshot(session: Session) -> list[tuple]:
    return [tuple(r) for r in session.execute(select(
        Observation.vintage_id, Observation.region_id, Observation.measure_id,
        Observation.ref_date, Observation.value).order_by(
            Observation.vintage_id, Observation.region_id, Observation.measure_id,
            Observation.ref_date))]


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(body=st.one_of(LINES, st.binary(max_size=200)), with_header=st.booleans())
def test_ingest_arbitrary_content_keeps_stored_rows(session: Session, body: bytes,
                                                    with_header: bool) -> None:
    if not snapshot(session):
        upsert_regions(session=session, records=[
            RegionRecord(code="PA", name="Pinewold", level="district", parent=None,
                         population=100),
            RegionRecord(code="PB", name="Pebbleford", level="district", parent=None,
                         population=100)])
        upsert_measures(session=session, records=[
            MeasureRecord(name=m, unit="n", kind="count", aggregation="sum")
            for m in ("cases", "tests", "positives")])
        ingest_payload(session=session, feed=FEED, payload=Payload.from_bytes(
            "seed", HEADER + b"PA,2026-03-01,cases,5\nPB,2026-03-01,tests,8\n"),
            received_at=T0, today=T0.date())
    before = snapshot(session)
    content = (HEADER if with_header else b"") + body
    try:
        receipt = ingest_payload(session=session, feed=FEED,
                                 payload=Payload.from_bytes("fuzz", content),
                                 received_at=T0, today=T0.date())
    except FeedFileError:
        receipt = None
    after = snapshot(session)
    assert after[: len(before)] == before
    new = after[len(before):]
    assert len(new) == (0 if receipt is None or receipt.unchanged else receipt.rows_accepted)
