"""Evaluation inputs: a feed past its staleness limit makes its measure unknown to the engine."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import evaluate, parse_ruleset
from server.feeds.definition import parse_feeds
from server.feeds.sources import Payload
from server.services.district_data import feed_limits, load_district_data
from server.services.district_indicators import district_indicators
from server.services.evaluation import evaluate_districts
from server.services.ingest import ingest_payload
from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.models import Assessment, Region
from server.store.models import Ruleset as RulesetRow
from server.store.vintages import append_vintage
from tests.server.conftest import STALE_RULES

FEEDS = parse_feeds(
    "feeds:\n  - name: fast\n    source: {kind: push}\n    stale_after: 3d\n    measures: [cases]\n"
    "  - name: slow\n    source: {kind: push}\n    stale_after: 2w\n    measures: [cases]\n",
    source="t.yaml",
)
START = date(2026, 3, 1)


def _setup(session: Session) -> None:
    upsert_regions(session=session, records=[
        RegionRecord(code="Z0", name="Zephyrvale", level="county", parent=None, population=20000),
        RegionRecord(code="ZA", name="Alderholt", level="district", parent="Z0",
                     population=10000),
        RegionRecord(code="ZB", name="Birchmere", level="district", parent="Z0",
                     population=10000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name=m, unit="n", kind="count", aggregation="sum")
        for m in ("cases", "tests", "positives", "hosp_admissions", "gp_ari", "icu_occupied",
                  "icu_staffed", "ww_concentration", "ww_flow")])


def _send(session: Session, feed: str, region: str, days: range, at: datetime) -> None:
    text = "region,date,measure,value\n" + "".join(
        f"{region},{START + timedelta(days=d)},cases,20\n" for d in days)
    ingest_payload(session=session, feed=FEEDS[feed], payload=Payload.from_bytes(
        f"{feed}-{region}-{at:%H%M}", text.encode()), received_at=at, today=date(2026, 4, 1))


def test_measure_is_stale_after_its_newest_date_plus_the_feed_limit(session: Session) -> None:
    _setup(session)
    at = datetime(2026, 3, 16, 6, tzinfo=UTC)
    _send(session, "fast", "ZA", range(0, 10), at)   # newest date 10 March, limit 3 days
    _send(session, "slow", "ZB", range(0, 10), at)   # newest date 10 March, limit 14 days
    data = load_district_data(session=session, start=START, end=date(2026, 3, 15), as_of=at,
                              stale_after=feed_limits(FEEDS))
    # 13 March is 3 days after 10 March: not yet past the limit; 14 March is.
    expected = np.zeros(15, dtype=bool)
    expected[13:] = True
    assert_array_equal(data.stale["cases"][0], expected)
    assert not data.stale["cases"][1].any()
    without = load_district_data(session=session, start=START, end=date(2026, 3, 15), as_of=at)
    assert without.stale == {}


def test_newest_date_as_known_at_the_cutoff_and_its_feed_decide(session: Session) -> None:
    _setup(session)
    early = datetime(2026, 3, 8, 6, tzinfo=UTC)
    late = datetime(2026, 3, 14, 6, tzinfo=UTC)
    _send(session, "fast", "ZA", range(0, 5), early)  # to 5 March, fast feed (3 days)
    _send(session, "slow", "ZA", range(5, 12), late)  # to 12 March, slow feed (14 days)
    limits = feed_limits(FEEDS)
    known_early = load_district_data(session=session, start=START, end=date(2026, 3, 15),
                                     as_of=early, stale_after=limits)
    assert np.flatnonzero(known_early.stale["cases"][0]).tolist() == list(range(8, 15))
    known_late = load_district_data(session=session, start=START, end=date(2026, 3, 15),
                                    as_of=late, stale_after=limits)
    assert not known_late.stale["cases"][0].any()


def test_stale_feed_shows_as_stale_data_in_the_engine_explanation(session: Session) -> None:
    _setup(session)
    at = datetime(2026, 3, 16, 6, tzinfo=UTC)
    _send(session, "fast", "ZA", range(0, 10), at)
    _send(session, "slow", "ZB", range(0, 10), at)
    rs = parse_ruleset(STALE_RULES)
    data = load_district_data(session=session, start=START, end=date(2026, 3, 15), as_of=at,
                              stale_after=feed_limits(FEEDS))
    result = evaluate(rs, district_indicators(data, rs), regions=data.regions, dates=data.dates,
                      region_levels=data.levels)
    # 7-day incidence 7 x 20 / 10 000 x 100 000 = 1400 per 100 000, held after 10 March.
    status = [[c["status"] for c in result.explain(r, d).data["criteria"]]
              for r, d in ((0, 12), (0, 13), (1, 14))]
    assert status == [["ok"], ["stale"], ["ok"]]


def _ruleset_row(session: Session, text: str) -> RulesetRow:
    parsed = parse_ruleset(text)
    row = RulesetRow(name=parsed.name, version=str(parsed.version), yaml_text=text,
                     sha256=parsed.sha256, author="t", created_at=datetime.now(UTC),
                     status="draft")
    session.add(row)
    session.flush()
    return row


def test_evaluate_districts_passes_the_feed_limits_to_the_engine(session: Session) -> None:
    """End to end: a stale feed makes the newest days' stored explanation say ``stale``."""
    _setup(session)
    at = datetime(2026, 3, 16, 6, tzinfo=UTC)
    _send(session, "fast", "ZA", range(0, 10), at)   # to 10 March, limit 3 days
    _send(session, "slow", "ZB", range(0, 15), at)   # to 15 March: the evaluated range's end
    with_limits = _ruleset_row(session, STALE_RULES)
    without = _ruleset_row(session, STALE_RULES.replace("name: stale", "name: no-limits"))
    run = evaluate_districts(session=session, ruleset_row=with_limits, cutoff=at,
                             stale_after=feed_limits(FEEDS))
    plain = evaluate_districts(session=session, ruleset_row=without, cutoff=at)
    assert run is not None and plain is not None and run.end == date(2026, 3, 15)
    stored = {
        (code, day): a.explanation["data"]["criteria"][0]["status"]
        for code, day, a in session.execute(
            select(Region.code, Assessment.ref_date, Assessment)
            .join(Region, Region.id == Assessment.region_id)
            .where(Assessment.ruleset_id == with_limits.id)
        )
    }
    # 13 March is the 3rd day after 10 March (not past the limit); 14 and 15 March are.
    assert [stored["ZA", date(2026, 3, d)] for d in (13, 14, 15)] == ["ok", "stale", "stale"]
    assert stored["ZB", date(2026, 3, 15)] == "ok"
    assert plain.evaluation is not None
    za = plain.evaluation.regions.index("ZA")
    assert plain.evaluation.explain(za, 14).data["criteria"][0]["status"] == "ok"


def _legacy(session: Session, rows: list[tuple[str, str, date, float]]) -> None:
    """Values as an earlier release could store them (no check: ``append_vintage`` as is)."""
    append_vintage(session=session, feed="old", received_at=datetime(2026, 3, 16, 7, tzinfo=UTC),
                   checksum=f"legacy-{len(rows)}-{rows[0][3]!r}",
                   rows=pd.DataFrame(rows, columns=["region", "measure", "ref_date", "value"]))


@pytest.mark.parametrize("bad", [5.0000000001, 4.5, -3.0, 1e300],
                         ids=["residue", "fraction", "negative", "huge"])
def test_bad_stored_count_is_invalid_in_its_district_only(session: Session, bad: float) -> None:
    """One unusable stored count never stops the evaluation: that district's incidence is
    unknown (``invalid``) on the 7 days whose window holds it; the other district is evaluated.
    A count within 1e-9 of a whole number is rounded instead, as validation stores it."""
    _setup(session)
    at = datetime(2026, 3, 16, 6, tzinfo=UTC)
    _send(session, "fast", "ZA", range(0, 15), at)
    _send(session, "fast", "ZB", range(0, 15), at)
    _legacy(session, [("ZA", "cases", date(2026, 3, 5), bad)])
    rs = parse_ruleset(STALE_RULES)
    data = load_district_data(session=session, start=START, end=date(2026, 3, 15))
    result = evaluate(rs, district_indicators(data, rs), regions=data.regions, dates=data.dates,
                      region_levels=data.levels)
    status = [result.explain(0, d).data["criteria"][0]["status"] for d in range(15)]
    other = {result.explain(1, d).data["criteria"][0]["status"] for d in range(6, 15)}
    assert other == {"ok"}
    if bad == 5.0000000001:
        assert data.bad_values == () and data.district["cases"][0, 4] == 5.0
        assert status[6:] == ["ok"] * 9
        return
    # 5 March is day 4: windows ending on days 4 .. 10 hold it.
    assert status[4:11] == ["invalid"] * 7 and status[11:] == ["ok"] * 4
    assert [(b.region, b.measure, b.ref_date) for b in data.bad_values] == [
        ("ZA", "cases", date(2026, 3, 5))]
    sentence = result.explain(0, 8).sentence
    assert "7-day incidence data invalid (a stored value cannot be used)" in sentence


def test_stored_positives_above_tests_make_positivity_invalid_not_an_error(
    session: Session,
) -> None:
    _setup(session)
    rows = [(code, m, START + timedelta(days=d), v) for code in ("ZA", "ZB") for d in range(15)
            for m, v in (("tests", 100.0), ("positives", 10.0))]
    rows = [r if (r[0], r[1], r[2]) != ("ZA", "positives", date(2026, 3, 5))
            else (r[0], r[1], r[2], 500.0) for r in rows]
    _legacy(session, rows)
    data = load_district_data(session=session, start=START, end=date(2026, 3, 15))
    text = STALE_RULES.replace("incidence_7d: {label: 7-day incidence, unit: per 100 000, "
                               "decimals: 0}", "positivity_7d: {label: positivity, unit: '%', "
                               "decimals: 1}").replace("indicator: incidence_7d",
                                                       "indicator: positivity_7d")
    rs = parse_ruleset(text)
    series = district_indicators(data, rs)["positivity_7d"]
    assert series.invalid is not None
    assert np.flatnonzero(series.invalid[0]).tolist() == list(range(4, 11))
    assert not series.invalid[1].any()
    # 10 of 100 tests positive in ZB: 10% (7 days of 10 / 100).
    assert series.estimate[1, 14] == pytest.approx(10.0)
