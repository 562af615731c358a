"""Backtests on a seeded demo database: latest-data replay and the as-known (vintage) replay."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta, tzinfo
from pathlib import Path
from zoneinfo import ZoneInfo

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from rules import load_ruleset, parse_ruleset
from server.services.as_known_replay import as_known_indicators
from server.services.backtest import (
    BacktestError,
    as_known_cutoff,
    data_span,
    first_known_day,
    run_backtest,
    write_timelines,
)
from server.services.district_data import store_measures
from server.services.district_indicators import district_indicators, load_district_data
from server.services.indicator_kinds import measure_needs
from server.services.review import current_run
from server.store.models import Assessment, Measure, Observation, Region, Vintage

pytestmark = pytest.mark.slow
COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"
# IANA's Etc/GMT+8 is eight hours BEHIND UTC (POSIX sign; IANA tz database, file etcetera)
# [memory]: the demo's 05:30 UTC files land at 21:30 local time the evening before
BEHIND = ZoneInfo("Etc/GMT+8")


def test_backtest_on_latest_data_matches_the_stored_evaluation(demo_session: Session) -> None:
    result = run_backtest(session=demo_session, ruleset=load_ruleset(COUNTY))
    latest = current_run(session=demo_session)
    assert latest is not None
    stored = dict(demo_session.execute(
        select(Region.code, Assessment.recommended_tier)
        .join(Region, Region.id == Assessment.region_id)
        .where(Assessment.data_cutoff == latest.data_cutoff,
               Assessment.ref_date == latest.last_day)
    ).all())
    expected = [stored[c] for c in result.evaluation.regions]
    assert_array_equal(result.evaluation.tier[:, -1], expected)


@pytest.mark.parametrize("zone", [UTC, BEHIND], ids=["utc", "utc-8"])
@pytest.mark.parametrize("day", [date(2026, 9, 15), date(2026, 11, 29)], ids=["mid", "end"])
def test_as_known_values_equal_an_as_of_read_of_that_morning(
    demo_session: Session, day: date, zone: tzinfo
) -> None:
    # the reference: the store's own as-of read at the replay cutoff, indicators on the last day
    rs = load_ruleset(COUNTY)
    result = run_backtest(session=demo_session, ruleset=rs, as_known=True, time_zone=zone)
    first = result.evaluation.dates[0].astype(date)
    data = load_district_data(
        session=demo_session, start=first, end=day, as_of=as_known_cutoff(day, zone),
        time_zone=zone,
    )
    ref = district_indicators(data, rs)
    j = (day - first).days
    for name in ("incidence_7d", "positivity_7d", "admissions_7d", "icu_share", "rt"):
        got = result.evaluation.indicators[name].estimate[:, j]
        # rt: the replay sees WINDOW_DAYS (56) days of history, the serial interval keeps lags to
        # 69 days (mass beyond 49 days ~1e-9), so the two agree to ~1e-8, not to rounding
        rtol = 1e-7 if name == "rt" else 1e-9
        assert_allclose(got, ref[name].estimate[:, -1], rtol=rtol, err_msg=name)
    # the nowcast of that morning too: the same days flagged, the same interval
    inc = result.evaluation.indicators["incidence_7d"]
    assert ref["incidence_7d"].nowcast is not None and inc.nowcast is not None
    assert_array_equal(inc.nowcast[:, j], ref["incidence_7d"].nowcast[:, -1])
    assert inc.nowcast[:, j].any()
    assert_allclose(inc.lower[:, j], ref["incidence_7d"].lower[:, -1], rtol=1e-9)


TWO_TRENDS = """\
name: two-trends
version: "1"
tiers:
  - {{name: Quiet, staff: s0, public: p0}}
  - {{name: Raised, staff: s1, public: p1}}
indicators:
  ww_trend: {{label: wastewater, params: {{window: 15}}}}
{extra}
criteria:
  - {{id: ww, indicator: ww_trend, enter: [5], exit: [2]}}
{more}
"""


def test_as_known_samples_of_one_indicator_do_not_depend_on_another(
    demo_session: Session,
) -> None:
    # common practice, no source: a second wastewater trend declared beside the first leaves
    # the first's as-known samples as they are alone (each keeps its own newest sample day)
    alone = parse_ruleset(TWO_TRENDS.format(extra="", more=""))
    both = parse_ruleset(TWO_TRENDS.format(
        extra="  ww_long: {label: long, kind: wastewater_trend, params: {window: 29}}",
        more="  - {id: ww2, indicator: ww_long, enter: [5], exit: [2]}"))
    first, last = data_span(session=demo_session, measures=("ww_concentration", "ww_flow"))
    got = {}
    for name, rs in (("alone", alone), ("both", both)):
        got[name] = as_known_indicators(demo_session, rs, first, last, lambda _n: None, BEHIND)[1]
    one, two = got["alone"]["ww_trend"], got["both"]["ww_trend"]
    assert np.isfinite(one.estimate).sum() > 100
    assert_allclose(two.estimate, one.estimate, rtol=0, atol=0, equal_nan=True)
    assert_allclose(two.age_days, one.age_days, rtol=0, atol=0, equal_nan=True)
    assert np.isfinite(got["both"]["ww_long"].estimate).sum() > 100


def test_as_known_replay_differs_from_latest_only_through_revisions(demo_session: Session) -> None:
    rs = load_ruleset(COUNTY)
    latest = run_backtest(session=demo_session, ruleset=rs)
    known = run_backtest(session=demo_session, ruleset=rs, as_known=True)
    same = np.mean(latest.evaluation.tier == known.evaluation.tier)
    assert 0.5 < same < 1.0  # invented reporting delays revise recent days, not the whole record


def test_backtest_summary_period_and_csv(demo_session: Session, tmp_path: Path) -> None:
    result = run_backtest(session=demo_session, ruleset=load_ruleset(COUNTY),
                          start=date(2026, 10, 1), end=date(2026, 10, 31))
    assert result.summary.days == 31
    path = write_timelines(result, tmp_path)
    lines = path.read_text().splitlines()
    assert len(lines) == 1 + 31 * 14
    assert lines[1].startswith("2026-10-01,")


def test_backtest_rejects_a_period_outside_the_data(demo_session: Session) -> None:
    with pytest.raises(BacktestError, match="stored data cover"):
        run_backtest(session=demo_session, ruleset=load_ruleset(COUNTY), start=date(2020, 1, 1))


def test_as_known_cutoff_ends_the_next_local_day() -> None:
    # the end of 16 Sep in UTC-8 is 17 Sep 08:00 UTC (less one microsecond)
    got = as_known_cutoff(date(2026, 9, 15), BEHIND)
    assert got == datetime(2026, 9, 17, 8, 0, tzinfo=UTC) - timedelta(microseconds=1)
    assert got.astimezone(BEHIND).date() == date(2026, 9, 16)


def test_as_known_cutoff_defaults_to_utc_days() -> None:
    got = as_known_cutoff(date(2026, 9, 15))
    assert got == datetime(2026, 9, 17, tzinfo=UTC) - timedelta(microseconds=1)


def test_as_known_replay_counts_a_file_on_its_local_day(demo_session: Session) -> None:
    # a file received at 21:30 local time counts on that local day, so in a zone behind UTC each
    # day's file is known one replay day earlier than in UTC: the as-known values differ
    rs = load_ruleset(COUNTY)
    utc = run_backtest(session=demo_session, ruleset=rs, as_known=True)
    behind = run_backtest(session=demo_session, ruleset=rs, as_known=True, time_zone=BEHIND)
    a = utc.evaluation.indicators["incidence_7d"].estimate
    b = behind.evaluation.indicators["incidence_7d"].estimate
    assert not np.allclose(a[:, 60:], b[:, 60:], equal_nan=True)


def test_as_known_summary_starts_on_the_first_morning_that_knew_the_policys_data(
    demo_session: Session,
) -> None:
    # the morning before the summary's first day knew nothing of the policy's measures (its
    # cutoff is before the first vintage holding them arrived), the first day knew some; a
    # latest-data backtest still summarises from the first stored day
    rs = load_ruleset(COUNTY)
    known = run_backtest(session=demo_session, ruleset=rs, as_known=True, time_zone=BEHIND)
    latest = run_backtest(session=demo_session, ruleset=rs)
    needs = measure_needs(rs, store_measures(session=demo_session))
    read = [*needs.district, *needs.area, *needs.plant]
    arrived = demo_session.scalar(
        select(func.min(Vintage.received_at))
        .join(Observation, Observation.vintage_id == Vintage.id)
        .join(Measure, Measure.id == Observation.measure_id).where(Measure.name.in_(read)))
    assert known.start >= latest.start
    if known.start > latest.start:
        assert as_known_cutoff(known.start - timedelta(days=1), BEHIND) < arrived
    assert arrived <= as_known_cutoff(known.start, BEHIND)
    assert known.start == max(latest.start, first_known_day(demo_session, read, BEHIND))
