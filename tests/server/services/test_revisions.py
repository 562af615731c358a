"""Revisions an upload makes, confirmation before revising another feed's values, per-measure
precedence, and the rejected share in a feed's health (issue 16, item 3).

Scenario of the report: a nightly feed sent 47 cases for a district's newest day; a one-row hand
upload to another feed would replace it by 12. Invented numbers and feeds. These are checks of
bookkeeping (what is stored, what is listed), not of a statistic: no outside reference applies.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import pytest
from sqlalchemy import func, select

from server.feeds.definition import parse_feeds
from server.feeds.errors import FeedConfigError
from server.services.database import Database
from server.services.feed_health import FeedStatus
from server.services.feed_push import ingest_push, upload_payload
from server.services.revisions import UnconfirmedRevisionsError
from server.store.models import (
    AuditEntry,
    FeedState,
    Measure,
    Observation,
    Region,
    RejectedRow,
    Vintage,
)
from server.store.reads import newest_values

pytestmark = pytest.mark.slow
DAY = date(2026, 11, 29)  # inside the seeded demo (ends 2026-11-30)

FEEDS = """\
feeds:
  - name: nightly
    source: {{kind: push}}
    measures:
      cases: {{precedence: {nightly}}}
      tests: {{}}
  - name: hand
    source: {{kind: push}}
    measures: [cases, tests]
    max_rejected_share: 0.25
"""


def _catalogue(nightly_rank: int = 0):  # type: ignore[no-untyped-def]
    return parse_feeds(FEEDS.format(nightly=nightly_rank), source="feeds.yaml")


def _csv(*rows: tuple[str, date, str, float]) -> bytes:
    lines = ["region,date,measure,value"]
    lines += [f"{r},{d.isoformat()},{m},{v:g}" for r, d, m, v in rows]
    return ("\n".join(lines) + "\n").encode()


def _counts(db: Database) -> tuple[int, ...]:
    with db.sessions() as s:
        return tuple(int(s.scalar(select(func.count()).select_from(model)) or 0)
                     for model in (Vintage, Observation, RejectedRow, FeedState, AuditEntry))


def _current(db: Database, code: str, day: date) -> tuple[float, str]:
    with db.sessions() as s:
        rid = s.scalar(select(Region.id).where(Region.code == code))
        mid = s.scalar(select(Measure.id).where(Measure.name == "cases"))
        got = newest_values(session=s, measure_id=mid, region_ids=[rid], start=day, end=day)
        feed = s.scalar(select(Vintage.feed).where(Vintage.id == int(got.vintage_id[0])))
        return float(got.value[0]), str(feed)


def _nightly(db: Database, value: float, catalogue=None) -> None:  # type: ignore[no-untyped-def]
    cat = catalogue or _catalogue()
    ingest_push(db, feed=cat["nightly"], content=_csv(("D01", DAY, "cases", value)),
                precedence=cat.precedence())


def _upload(db: Database, content: bytes, catalogue=None, confirmed: str = "",  # type: ignore[no-untyped-def]
            dry_run: bool = False):
    return upload_payload(db, catalogue=catalogue or _catalogue(), feed_name="hand",
                          filename="one-row.csv", content=content, actor="ada.analyst",
                          confirmed=confirmed, dry_run=dry_run)


def test_upload_revising_another_feeds_value_stores_nothing_and_lists_it(
    demo_db: Database,
) -> None:
    _nightly(demo_db, 47)
    before = _counts(demo_db)
    with pytest.raises(UnconfirmedRevisionsError, match="would revise 1 value") as refused:
        _upload(demo_db, _csv(("D01", DAY, "cases", 12)))
    assert _counts(demo_db) == before  # no vintage, row, rejection, feed state or audit entry
    assert _current(demo_db, "D01", DAY) == (47.0, "nightly")
    (v,) = refused.value.receipt.revisions  # type: ignore[attr-defined]
    assert (v.region, v.measure, v.day, v.old, v.new, v.old_feed, v.other_feed, v.line) == (
        "D01", "cases", DAY, 47.0, 12.0, "nightly", True, 2)


def test_confirmed_upload_lands_and_its_receipt_lists_the_revision(demo_db: Database) -> None:
    _nightly(demo_db, 47)
    with pytest.raises(UnconfirmedRevisionsError) as refused:
        _upload(demo_db, _csv(("D01", DAY, "cases", 12)))
    receipt = _upload(demo_db, _csv(("D01", DAY, "cases", 12)), confirmed=refused.value.digest)
    assert (receipt.rows_accepted, receipt.revised, receipt.revised_other_feeds) == (1, 1, 1)
    assert (receipt.revisions[0].old, receipt.revisions[0].new) == (47.0, 12.0)
    assert _current(demo_db, "D01", DAY) == (12.0, "hand")
    with demo_db.sessions() as s:
        details = s.scalars(select(AuditEntry.details).where(AuditEntry.action == "feed.ingest")
                            .order_by(AuditEntry.id.desc())).first()
    assert details is not None
    assert details["confirmed_revisions"] == refused.value.digest
    assert details["revised_other_feeds"] == 1


def test_confirmation_of_an_older_list_is_asked_again(demo_db: Database) -> None:
    _nightly(demo_db, 47)
    with pytest.raises(UnconfirmedRevisionsError) as first:
        _upload(demo_db, _csv(("D01", DAY, "cases", 12)))
    _nightly(demo_db, 50)  # the nightly feed corrected itself while the page was open
    before = _counts(demo_db)
    with pytest.raises(UnconfirmedRevisionsError) as second:
        _upload(demo_db, _csv(("D01", DAY, "cases", 12)), confirmed=first.value.digest)
    assert _counts(demo_db) == before
    assert second.value.digest != first.value.digest
    assert second.value.receipt.revisions[0].old == 50.0  # type: ignore[attr-defined]


def test_a_row_repeating_the_stored_value_is_no_revision(demo_db: Database) -> None:
    _nightly(demo_db, 47)
    receipt = _upload(demo_db, _csv(("D01", DAY, "cases", 47)))
    assert (receipt.rows_accepted, receipt.revised, receipt.revisions) == (1, 0, ())


def test_dry_run_lists_revisions_without_asking(demo_db: Database) -> None:
    _nightly(demo_db, 47)
    before = _counts(demo_db)
    receipt = _upload(demo_db, _csv(("D01", DAY, "cases", 12)), dry_run=True)
    assert (receipt.dry_run, receipt.revised_other_feeds) == (True, 1)
    assert _counts(demo_db) == before


def test_precedence_keeps_the_higher_ranked_value(demo_db: Database) -> None:
    catalogue = _catalogue(nightly_rank=1)
    _nightly(demo_db, 47, catalogue)
    receipt = _upload(demo_db, _csv(("D01", DAY, "cases", 12)), catalogue=catalogue)
    assert (receipt.rows_accepted, receipt.rows_rejected, receipt.revised) == (0, 1, 0)
    (rejected,) = receipt.rejections
    assert rejected.reason == "outranked"
    assert "sent by feed 'nightly'" in rejected.message and "(1 over 0)" in rejected.message
    assert _current(demo_db, "D01", DAY) == (47.0, "nightly")


def test_a_push_lists_revisions_of_other_feeds_without_asking(demo_db: Database) -> None:
    # a machine cannot confirm: pushes land (precedence still applies) and say what they revised
    _nightly(demo_db, 47)
    cat = _catalogue()
    receipt = ingest_push(demo_db, feed=cat["hand"], content=_csv(("D01", DAY, "cases", 12)),
                          precedence=cat.precedence())
    assert (receipt.revised_other_feeds, receipt.revisions[0].old_feed) == (1, "nightly")


def _status(accepted: int, rejected: int, limit: float = 0.1) -> FeedStatus:
    at = datetime(2026, 12, 1, 6, tzinfo=UTC)
    return FeedStatus(
        name="hand", kind="push", schedule="push", cadence="daily", stale_after_days=3,
        last_attempt_at=at, last_success_at=at, last_error="", failures=0, vintages=1,
        last_received_at=at, last_accepted=accepted, last_rejected=rejected, regions=1,
        stale_regions=(), newest_ref_date=at.date() - timedelta(days=1),
        max_rejected_share=limit,
    )


@pytest.mark.parametrize(
    ("accepted", "rejected", "limit", "health"),
    [(1, 9, 0.1, "attention"), (9, 1, 0.1, "ok"), (8, 2, 0.1, "attention"),
     (8, 2, 0.25, "ok"), (10, 0, 0.0, "ok")],
    ids=["9-of-10", "1-of-10-at-limit", "2-of-10", "2-of-10-limit-25", "none"],
)
def test_health_counts_the_rejected_share(
    accepted: int, rejected: int, limit: float, health: str,
) -> None:
    status = _status(accepted, rejected, limit)
    assert status.rejected_share == pytest.approx(rejected / (accepted + rejected))
    assert status.health == health


def test_precedence_and_rejected_share_are_read_from_the_feed_file() -> None:
    catalogue = _catalogue(nightly_rank=2)
    assert catalogue.precedence() == {"cases": {"nightly": 2, "hand": 0}}
    assert catalogue["hand"].max_rejected_share == 0.25
    assert catalogue["nightly"].max_rejected_share == 0.1


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (FEEDS.format(nightly="high"),
         r"feeds.yaml:5:\d+: feeds\[0\].measures.cases: precedence must be a whole number"),
        (FEEDS.format(nightly=0).replace("0.25", "1.5"),
         r"feeds.yaml:\d+:\d+: feeds\[1\]: max_rejected_share must be a share from 0 to 1"),
    ],
    ids=["precedence-not-a-number", "share-over-one"],
)
def test_bad_precedence_or_share_names_file_line_and_key(text: str, message: str) -> None:
    with pytest.raises(FeedConfigError, match=message):
        parse_feeds(text, source="feeds.yaml")
