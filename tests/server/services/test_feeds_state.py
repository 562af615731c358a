"""Feed state and health: every way in records it alike; empty files; receipts; messages."""

from __future__ import annotations

import io
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pytest
from sqlalchemy import func, select

from server.feeds.definition import parse_feeds
from server.feeds.errors import EmptyFileError, EncodingError, HeaderError
from server.feeds.parser import read_chunks
from server.feeds.sources import Payload
from server.readmodels.feeds_page import recent_rejections
from server.services.database import Database
from server.services.evaluation import evaluate_if_behind
from server.services.feed_health import duration_text, feed_statuses
from server.services.feed_push import ingest_push, issue_token, upload_payload
from server.services.feed_state import ingest_recorded
from server.services.feeds import catalogue_limits
from server.services.ruleset_activation import store_ruleset
from server.store import (
    MeasureRecord,
    RegionRecord,
    make_sessionmaker,
    scratch_engine,
    upgrade,
    upsert_measures,
    upsert_regions,
)
from server.store.models import Assessment, FeedState, FeedToken, Region, Vintage
from tests.server.conftest import STALE_RULES
from web.feeds_api import receipt_json

CATALOGUE = parse_feeds(
    """
feeds:
  - name: long-csv
    source: {kind: push}
    measures: [cases]
  - name: semi
    source: {kind: push}
    delimiter: ";"
    measures: [cases]
  - name: records
    source: {kind: push}
    format: json
    measures: [cases]
  - name: rare
    source: {kind: push}
    cadence: irregular
    measures: [cases]
  - name: pulled
    source: {kind: file, folder: /nonexistent}
    schedule: {interval: 6h}
    stale_after: 2d
    measures: [cases]
""",
    source="t.yaml",
)
T0 = datetime(2026, 3, 10, 6, 0, tzinfo=UTC)
GOOD = b"region,date,measure,value\nSA,2026-03-09,cases,4\n"


@pytest.fixture
def db(tmp_path: Path) -> Iterator[Database]:
    with scratch_engine(f"sqlite:///{tmp_path / 'f.db'}", prefix="tw_feeds") as engine:
        upgrade(engine)
        database = Database(engine=engine, sessions=make_sessionmaker(engine))
        with database.transaction() as session:
            upsert_regions(session=session, records=[RegionRecord(
                code="SA", name="Sorrelmead", level="district", parent=None, population=100)])
            upsert_measures(session=session, records=[
                MeasureRecord(name="cases", unit="n", kind="count", aggregation="sum")])
        yield database


def state(db: Database, feed: str) -> FeedState | None:
    with db.sessions() as session:
        row = session.get(FeedState, feed)
        if row is not None:
            session.expunge(row)
        return row


def vintages(db: Database) -> int:
    with db.sessions() as session:
        return int(session.scalar(select(func.count()).select_from(Vintage)) or 0)


def statuses(db: Database, now: datetime) -> dict[str, object]:
    with db.sessions() as session:
        return {s.name: s for s in feed_statuses(session=session, catalogue=CATALOGUE, now=now)}


def upload(db: Database, content: bytes, feed: str = "long-csv", dry_run: bool = False):  # type: ignore[no-untyped-def]
    return upload_payload(db, catalogue=CATALOGUE, feed_name=feed, filename="week.csv",
                          content=content, actor="ada.analyst", dry_run=dry_run)


# --- 1. health of a feed that never delivered ------------------------------------------------

def test_a_feed_that_never_delivered_is_not_ok(db: Database) -> None:
    found = statuses(db, T0)
    assert {found[n].health for n in found} == {"no delivery yet"}  # type: ignore[attr-defined]
    assert not any(found[n].healthy for n in found)  # type: ignore[attr-defined]


def test_never_delivered_becomes_overdue_after_period_plus_limit(db: Database) -> None:
    upload(db, GOOD)  # long-csv delivers: tierwise has been taking in data since now
    with db.transaction() as session:
        first = session.scalar(select(Vintage.received_at))
    assert first is not None
    # semi: daily cadence, default limit 3 days -> overdue after first + 1 d + 3 d
    before = statuses(db, first + timedelta(days=4))
    after = statuses(db, first + timedelta(days=4, minutes=1))
    assert before["semi"].health == "no delivery yet"  # type: ignore[attr-defined]
    assert after["semi"].health == "overdue"  # type: ignore[attr-defined]
    assert after["semi"].overdue_since == first + timedelta(days=4)  # type: ignore[attr-defined]
    # pulled: every 6 h with a 2-day limit -> overdue after first + 6 h + 2 d
    assert statuses(db, first + timedelta(hours=54, minutes=1))["pulled"].health == "overdue"  # type: ignore[attr-defined]
    # an irregular feed has no expected delivery: never overdue
    assert statuses(db, first + timedelta(days=400))["rare"].health == "no delivery yet"  # type: ignore[attr-defined]
    # long-csv delivered: its health is about its data (9 March is long past its 3-day limit)
    assert after["long-csv"].health == "attention"  # type: ignore[attr-defined]
    assert after["long-csv"].stale_regions == ("SA",)  # type: ignore[attr-defined]


def test_a_push_feed_is_expected_from_the_issue_of_its_token(db: Database) -> None:
    upload(db, GOOD)  # tierwise has been taking in data since now (long-csv)
    with db.transaction() as session:
        first = session.scalar(select(Vintage.received_at))
        assert first is not None
        issue_token(session=session, feed="semi", actor="ines.admin")
        token = session.get(FeedToken, "semi")
        assert token is not None
        token.created_at = first + timedelta(days=30)  # the office set up pushes a month later
    # without the token semi would be overdue 4 days after the first vintage; with it, 4 days
    # after the token was issued (daily cadence, default limit 3 days)
    assert statuses(db, first + timedelta(days=34))["semi"].health == "no delivery yet"  # type: ignore[attr-defined]
    later = statuses(db, first + timedelta(days=34, minutes=1))["semi"]
    assert later.health == "overdue"  # type: ignore[attr-defined]
    assert later.overdue_since == first + timedelta(days=34)  # type: ignore[attr-defined]


def test_schedule_interval_is_written_in_whole_units() -> None:
    assert [duration_text(timedelta(hours=h)) for h in (6, 48)] == ["6 h", "2 d"]
    assert duration_text(timedelta(minutes=90)) == "90 min"
    assert duration_text(timedelta(seconds=45)) == "45 s"


def test_status_shows_the_interval_as_hours(db: Database) -> None:
    assert statuses(db, T0)["pulled"].schedule == "every 6 h (UTC)"  # type: ignore[attr-defined]


# --- 2. every way in records the feed state --------------------------------------------------

def test_upload_sets_last_success_and_last_vintage(db: Database) -> None:
    receipt = upload(db, GOOD)
    got = state(db, "long-csv")
    assert got is not None and got.last_success_at is not None and got.last_error == ""
    assert got.last_vintage_id == receipt.vintage_id


def test_upload_rejected_whole_sets_last_error(db: Database) -> None:
    upload(db, GOOD)
    with pytest.raises(HeaderError):
        upload(db, b"region,date,value\nSA,2026-03-09,4\n")
    got = state(db, "long-csv")
    assert got is not None and "header lacks column(s) ['measure']" in got.last_error
    assert got.failures == 1
    assert statuses(db, T0)["long-csv"].health == "attention"  # type: ignore[attr-defined]


def test_dry_run_upload_records_nothing(db: Database) -> None:
    upload(db, GOOD, dry_run=True)
    with pytest.raises(HeaderError):
        upload(db, b"region,date,value\n", dry_run=True)
    assert state(db, "long-csv") is None


def test_push_rejected_whole_sets_last_error(db: Database) -> None:
    with pytest.raises(EncodingError):
        ingest_push(db, feed=CATALOGUE["long-csv"], content=b"region,date,measure,value\n\xff\n")
    got = state(db, "long-csv")
    assert got is not None and "not valid utf-8 text" in got.last_error and got.failures == 1
    ingest_push(db, feed=CATALOGUE["long-csv"], content=GOOD)
    got = state(db, "long-csv")
    assert got is not None and got.last_error == "" and got.last_success_at is not None


def test_cli_path_records_the_state(db: Database) -> None:
    outcome = ingest_recorded(db, feed=CATALOGUE["long-csv"],
                              payload=Payload.from_bytes("week.csv", GOOD), received_at=T0)
    got = state(db, "long-csv")
    assert got is not None and got.last_success_at == T0
    assert got.last_vintage_id == outcome.receipt.vintage_id


def test_a_file_whose_every_row_is_rejected_is_an_error(db: Database) -> None:
    upload(db, b"region,date,measure,value\nZZ,2026-03-09,cases,4\n")
    got = state(db, "long-csv")
    assert got is not None and "every row was rejected (1 row;" in got.last_error
    assert got.last_success_at is None and vintages(db) == 1  # the rejected row is kept


# --- 3. empty files ----------------------------------------------------------------------------

def test_header_only_file_is_rejected_whole_without_a_vintage(db: Database) -> None:
    with pytest.raises(EmptyFileError, match="no data rows"):
        upload(db, b"region,date,measure,value\n")
    with pytest.raises(EmptyFileError, match="no data rows"):
        ingest_push(db, feed=CATALOGUE["records"], content=b"[]",
                    content_type="application/json")
    assert vintages(db) == 0
    got = state(db, "long-csv")
    assert got is not None and "no data rows" in got.last_error


def test_zero_byte_file_says_it_is_empty(db: Database) -> None:
    for feed in ("long-csv", "records"):
        with pytest.raises(EmptyFileError) as caught:
            upload(db, b"", feed=feed)
        assert str(caught.value) == "upload week.csv by ada.analyst: the file is empty"
    assert vintages(db) == 0


# --- 4. the receipt of an identical file --------------------------------------------------------

def test_identical_push_counts_nothing_and_names_the_vintage(db: Database) -> None:
    messy = GOOD + b"ZZ,2026-03-09,cases,4\n"
    first = ingest_push(db, feed=CATALOGUE["long-csv"], content=messy)
    again = ingest_push(db, feed=CATALOGUE["long-csv"], content=messy)
    body = receipt_json(again)
    assert (body["unchanged"], body["identical_to_vintage"]) == (True, first.vintage_id)
    assert (body["rows_accepted"], body["rows_rejected"], body["reasons"], body["rejected"]) == (
        0, 0, {}, [])
    assert receipt_json(first)["identical_to_vintage"] is None


# --- 5. messages ---------------------------------------------------------------------------------

def test_encoding_error_is_plain_text_with_line_and_byte(db: Database) -> None:
    content = "region,date,measure,value\nSA,2026-03-09,cases,4\nSÄ,2026-03-09,cases,4\n"
    with pytest.raises(EncodingError) as caught:
        upload(db, content.encode("latin-1"))
    text = str(caught.value)
    offset = len(b"region,date,measure,value\nSA,2026-03-09,cases,4\nS")
    assert f"line 3, byte {offset}:" in text
    assert "`" not in text and "save it as utf-8" in text


def test_header_error_hints_at_the_delimiter() -> None:
    with pytest.raises(HeaderError) as caught:
        read_all(b"region,date,measure,value\nSA,2026-03-09,cases,4\n", "semi")
    assert "separated by commas (,) but this feed expects semicolons (;)" in str(caught.value)


def read_all(content: bytes, feed: str) -> None:
    for _ in read_chunks(io.BytesIO(content), CATALOGUE[feed], label="f.csv"):
        pass


def test_json_rejections_count_records_not_lines(db: Database) -> None:
    body = (b'[{"region": "SA", "date": "2026-03-09", "measure": "cases", "value": 4},\n'
            b' {"region": "SA", "date": "2026-03-09", "measure": "cases", "value": 5}]')
    receipt = ingest_push(db, feed=CATALOGUE["records"], content=body,
                          content_type="application/json")
    rejected = receipt_json(receipt)["rejected"]
    assert [r["record"] for r in rejected] == [1, 2]
    assert all("line" not in r for r in rejected)
    assert "record 1 says 4" in rejected[1]["message"]


def test_rejected_rows_name_the_file_and_the_uploader(db: Database) -> None:
    upload(db, GOOD + b"ZZ,2026-03-09,cases,4\n")
    ingest_push(db, feed=CATALOGUE["long-csv"], content=b"region,date,measure,value\n"
                b"QQ,2026-03-09,cases,1\nSA,2026-03-08,cases,2\n")
    with db.sessions() as session:
        rows = recent_rejections(session=session)
    assert [(r.file_name, r.uploaded_by) for r in rows] == [
        ("push to long-csv", ""), ("week.csv", "ada.analyst")]


# --- 0. the evaluation after an upload uses the feeds' staleness limits -------------------------



def test_evaluation_after_upload_marks_a_stale_feed(db: Database, tmp_path: Path) -> None:
    (tmp_path / "rules.yaml").write_text(STALE_RULES)
    with db.transaction() as session:
        upsert_regions(session=session, records=[RegionRecord(
            code="SB", name="Saltmarsh", level="district", parent=None, population=100)])
        upsert_measures(session=session, records=[  # every measure the evaluation reads
            MeasureRecord(name=m, unit="n", kind="count", aggregation="sum")
            for m in ("tests", "positives", "hosp_admissions", "gp_ari", "icu_occupied",
                      "icu_staffed", "ww_concentration", "ww_flow")])
        store_ruleset(session=session, path=tmp_path / "rules.yaml", activate=True)
    days = [date(2026, 3, 1) + timedelta(days=k) for k in range(15)]
    upload(db, b"region,date,measure,value\n" + b"".join(
        f"SA,{d},cases,2\n".encode() for d in days[:10]))          # to 10 March, limit 3 days
    upload(db, b"region,date,measure,value\n" + b"".join(
        f"SB,{d},cases,2\n".encode() for d in days), feed="rare")  # to 15 March
    evaluate_if_behind(db, stale_after=catalogue_limits(CATALOGUE))
    with db.sessions() as session:
        status = {
            (code, day): a.explanation["data"]["criteria"][0]["status"]
            for code, day, a in session.execute(
                select(Region.code, Assessment.ref_date, Assessment)
                .join(Region, Region.id == Assessment.region_id))
        }
    assert [status["SA", d] for d in days[12:]] == ["ok", "stale", "stale"]
    assert status["SB", days[-1]] == "ok"
