"""Nowcasts in the evaluation: delayed reports ingested as vintages, the newest days' incidence
computed on the nowcast, flagged, and explained; ``use_nowcast: false`` makes them unknown."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import evaluate, load_ruleset, parse_ruleset
from rules.levels import REASON_NOWCAST
from server.feeds.definition import parse_feeds
from server.feeds.sources import Payload
from server.services.backtest import run_backtest
from server.services.district_data import load_district_data
from server.services.district_indicators import district_indicators
from server.services.evaluation import evaluate_districts
from server.services.ingest import ingest_payload
from server.services.nowcast_scores import nowcast_accuracy_report
from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.models import Assessment, Region
from server.store.models import Ruleset as RulesetRow

FEEDS = parse_feeds(
    "feeds:\n  - name: lab\n    source: {kind: push}\n    measures: [cases]\n", source="t.yaml"
)
START = date(2026, 3, 1)
DAYS = 45
FINAL = 8  # cases per district and day, all reported within 3 days
SHARE = {0: 0.0, 1: 0.5, 2: 0.75}  # share known by delay (receipt day minus reference day)
RULES = """\
name: delayed
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
indicators:
  incidence_7d: {label: 7-day incidence, unit: per 100 000, decimals: 0}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [530], exit: [400], use_nowcast: USE}
timing: {confirm_days: 1, release_days: 1, min_days_in_tier: 0, effective_delay_days: 0}
"""
COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"


def _ingest_delayed(session: Session) -> datetime:
    """One vintage a day at 06:00 UTC: every day so far, as much of it as has been reported."""
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
    at = datetime(2026, 3, 1, 6, tzinfo=UTC)
    for v in range(DAYS):
        at = datetime.combine(START + timedelta(days=v + 1), datetime.min.time(),
                              tzinfo=UTC) + timedelta(hours=6)
        lines = [
            f"{code},{START + timedelta(days=d)},cases,{round(FINAL * SHARE.get(v + 1 - d, 1))}\n"
            for code in ("ZA", "ZB") for d in range(v + 1)
        ]
        ingest_payload(session=session, feed=FEEDS["lab"], payload=Payload.from_bytes(
            f"lab-{v}.csv", ("region,date,measure,value\n" + "".join(lines)).encode()),
            received_at=at, today=START + timedelta(days=v + 1))
    return at


def _ruleset_row(session: Session, text: str) -> RulesetRow:
    parsed = parse_ruleset(text)
    row = RulesetRow(name=parsed.name, version=str(parsed.version), yaml_text=text,
                     sha256=parsed.sha256, author="t", created_at=datetime.now(UTC),
                     status="draft")
    session.add(row)
    session.flush()
    return row


def test_incidence_of_the_last_days_rests_on_the_nowcast_and_says_so(session: Session) -> None:
    at = _ingest_delayed(session)
    row = _ruleset_row(session, RULES.replace("USE", "true"))
    run = evaluate_districts(session=session, ruleset_row=row, cutoff=at)
    assert run is not None and run.end == START + timedelta(days=DAYS - 1)
    last = session.scalars(
        select(Assessment).join(Region, Region.id == Assessment.region_id)
        .where(Region.code == "ZA", Assessment.ref_date == run.end)
    ).one()
    item = last.explanation["data"]["criteria"][0]
    # reported so far: 5 full days, then 6 and 4 of 8 -> 50 per 10 000; the chain ladder
    # recovers the delays exactly (0.75 and 0.5 known) -> 7 x 8 = 56 -> 560 per 100 000
    assert item["nowcast"] is True and item["nowcast_days"] == 2
    assert_allclose(item["value"], 560.0)
    assert item["lower"] < 560.0 < item["upper"]
    sentence = last.explanation["sentence"]
    assert "Nowcast: 7-day incidence rests on a nowcast of 2 incomplete days" in sentence
    # about 350 reports in the window are too few for a district's own delays (400)
    assert "pooled over Zephyrvale" in sentence
    assert last.recommended_tier == 1  # 560 enters; the reports so far (500) would not


def test_use_nowcast_false_makes_incomplete_days_unknown(session: Session) -> None:
    at = _ingest_delayed(session)
    rs = parse_ruleset(RULES.replace("USE", "false"))
    data = load_district_data(session=session, start=START,
                              end=START + timedelta(days=DAYS - 1), as_of=at)
    series = district_indicators(data, rs)["incidence_7d"]
    assert series.nowcast is not None
    assert series.nowcast[0].tolist()[-3:] == [False, True, True]
    ev = evaluate(rs, {"incidence_7d": series}, regions=data.regions, dates=data.dates,
                  region_levels=data.levels)
    assert ev.reason[0, 0, -2:].tolist() == [REASON_NOWCAST] * 2
    sentence = ev.explain(0, DAYS - 1).sentence
    assert "7-day incidence still incomplete (nowcasts not used)" in sentence


@pytest.mark.slow
def test_backtest_with_use_nowcast_false_differs_from_true(demo_session: Session) -> None:
    with_nowcast = load_ruleset(COUNTY)
    text = COUNTY.read_text(encoding="utf-8")
    without = parse_ruleset(text.replace("    min_count: 20               # fewer than 20 cases "
                                         "in 7 days: criterion inactive\n    use_nowcast: true",
                                         "    min_count: 20\n    use_nowcast: false"))
    assert not without.criteria[0].use_nowcast
    a = run_backtest(session=demo_session, ruleset=with_nowcast, as_known=True)
    b = run_backtest(session=demo_session, ruleset=without, as_known=True)
    flagged = a.evaluation.indicators["incidence_7d"].nowcast
    assert flagged is not None and flagged.mean() > 0.5  # as known, the newest days are open
    assert (b.evaluation.reason[0] == REASON_NOWCAST).any()
    assert not (a.evaluation.reason[0] == REASON_NOWCAST).any()
    assert not np.array_equal(a.evaluation.tier, b.evaluation.tier)


@pytest.mark.slow
def test_nowcast_accuracy_on_the_demo_beats_the_unadjusted_counts(demo_session: Session) -> None:
    scores = nowcast_accuracy_report(session=demo_session, measures=("cases",))
    total = next(s for s in scores if s.region is None)
    assert total.mornings > 1000
    # the 150-day test demo has few mornings after the delays settle (measured on the storyline
    # demo: 14.6 % against 24.6 %, covered 99.9 % of 1568 mornings; the 548-day demo: 9.9 %
    # against 24.0 %, covered 94.8 % of 7154 mornings, nominal 95 %)
    assert total.error < 0.6 * total.unadjusted_error
    assert total.coverage >= 0.9
    assert len([s for s in scores if s.region is not None]) == 14
    assert total.line.startswith("nowcast of the last 7 days: median error ")


@pytest.mark.slow
@pytest.mark.xfail(strict=True, reason=(
    "on the 150-day storyline demo the 95 % intervals cover 99.9 % of 1568 mornings (the "
    "548-day demo: 94.8 %); too wide on short histories, a nowcast matter left open"))
def test_nowcast_intervals_on_the_short_demo_are_not_far_wider_than_nominal(
    demo_session: Session,
) -> None:
    scores = nowcast_accuracy_report(session=demo_session, measures=("cases",))
    total = next(s for s in scores if s.region is None)
    assert total.coverage <= 0.995  # nominal 0.95; the old demo measured 99.3 %
