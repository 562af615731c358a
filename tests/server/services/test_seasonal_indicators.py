"""A policy on the seasonal intensity (moving epidemic method) of a district measure.

The policy below grades districts by the MEM level of GP consultations for acute respiratory
illness with RSV (``gp_ari.rsv``, :data:`MEASURE`); any other count measure is the same one line.
The thresholds themselves are checked against the published definitions in
``tests/server/indicators/test_seasonal.py``; here the wiring is: daily counts -> ISO weeks ->
weekly rates per 100 000 -> levels -> the engine's tiers and sentences.
"""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from rules import evaluate, parse_ruleset
from rules.formatting import number_text
from server.indicators.seasonal import season_layout
from server.services.district_data import DistrictData
from server.services.district_indicators import district_indicators
from server.services.seasonal_indicators import (
    SeasonalParamError,
    seasonal_params,
    weekly_intensity,
)

MEASURE = "gp_ari.rsv"  # GP consultations with RSV (a pathogen-specific measure)

POLICY = f"""\
name: seasonal
version: "1"
tiers:
  - {{name: Quiet, staff: s, public: p}}
  - {{name: Busy, staff: s, public: p}}
  - {{name: Strained, staff: s, public: p}}
indicators:
  seasonal_intensity:
    label: Respiratory intensity
    decimals: 0
    max_age_days: 13
    params: {{measure: {MEASURE}, start_week: 40, end_week: 20, seasons: 10, min_seasons: 3}}
criteria:
  - {{id: season, indicator: seasonal_intensity, enter: [2, 3], exit: [1, 2]}}
timing: {{confirm_days: 1, release_days: 1, min_days_in_tier: 0, effective_delay_days: 0}}
"""

START = date(2019, 9, 2)  # a Monday
DAYS = 5 * 365 + 200


def _data(seed: int = 1) -> DistrictData:
    """Two invented districts, five and a half years of daily counts with a winter wave."""
    rng = np.random.default_rng(seed)
    dates = np.datetime64(START) + np.arange(DAYS).astype("timedelta64[D]")
    mondays = dates - ((dates.astype("datetime64[D]").view("int64") - 4) % 7).astype(
        "timedelta64[D]")
    lay = season_layout(np.unique(mondays))
    pos = lay.position[np.searchsorted(np.unique(mondays), mondays)]
    inside = pos >= 0
    wave = np.where(inside, np.exp(-0.5 * ((pos - 15) / 3.0) ** 2), 0.0)
    mean = np.array([[2.0], [6.0]]) * (1 + 12 * wave)[None, :]
    counts = rng.poisson(mean).astype(float)
    zeros = np.zeros((2, DAYS))
    district = {m: zeros.copy() for m in ("cases", "tests", "positives", "hosp_admissions")}
    district[MEASURE] = counts
    return DistrictData(
        regions=("QA", "QB"), levels=("district", "district"),
        population=np.array([20_000.0, 60_000.0]), dates=dates, district=district,
        area_of_district={}, plant={}, plant_population=np.zeros(0), served=np.zeros((2, 0)),
        as_of=None,
    )


def test_policy_grades_districts_by_seasonal_intensity() -> None:
    rs = parse_ruleset(POLICY)
    data = _data()
    series = district_indicators(data, rs)["seasonal_intensity"]
    result = evaluate(rs, {"seasonal_intensity": series}, regions=data.regions,
                      dates=data.dates, region_levels=data.levels)
    # Before three seasons have ended (2019/20, 2020/21, 2021/22) there is no baseline.
    first_known = np.flatnonzero(np.isfinite(series.estimate[0]))[0]
    assert data.dates[first_known] > np.datetime64("2022-05-22")
    # The engine's tier follows the level: medium or more (>= 2) enters Busy, high (3) Strained.
    level = series.estimate[0]
    tiers = result.tier[0]
    known = np.isfinite(level)
    assert_array_equal(tiers[known & (level >= 3)], 2)
    assert np.all(tiers[known & (level <= 0)] == 0)
    assert (tiers == 2).any() and (tiers == 0).any()


def test_days_read_the_newest_complete_iso_week() -> None:
    rs = parse_ruleset(POLICY)
    data = _data()
    series = district_indicators(data, rs)["seasonal_intensity"]
    p = seasonal_params(rs.indicator("seasonal_intensity").params, data.district)
    weekly = weekly_intensity(data.district[MEASURE], data.dates[0], data.population, p)
    # a Sunday carries its own week's level (age 0), the next Saturday still that week (age 6)
    sunday = np.flatnonzero(data.dates == np.datetime64("2023-01-15"))[0]
    week = np.flatnonzero(weekly.week_starts == np.datetime64("2023-01-09"))[0]
    assert_allclose(series.estimate[:, sunday], weekly.result.level[:, week])
    assert_allclose(series.estimate[:, sunday + 6], weekly.result.level[:, week])
    assert_allclose(series.age_days[:, [sunday, sunday + 6]], [[0, 6], [0, 6]])
    # weekly rates per 100 000 from the daily counts
    days = slice(sunday - 6, sunday + 1)
    assert_allclose(weekly.rates[:, week],
                    data.district[MEASURE][:, days].sum(axis=1) / data.population * 100_000)


def test_explanation_names_the_level() -> None:
    rs = parse_ruleset(POLICY)
    data = _data()
    series = district_indicators(data, rs)["seasonal_intensity"]
    result = evaluate(rs, {"seasonal_intensity": series}, regions=data.regions,
                      dates=data.dates, region_levels=data.levels)
    day = int(np.flatnonzero(series.estimate[0] == 2)[0])
    sentence = result.explain(0, day).sentence
    assert "Respiratory intensity medium (2)" in sentence
    # a day with a complete week but fewer than three past seasons: no baseline yet
    early = int(np.flatnonzero(data.dates == np.datetime64("2021-01-10"))[0])
    assert np.isnan(series.estimate[0, early]) and series.no_baseline[0, early]
    item = result.explain(0, early).data["criteria"][0]
    assert item["status"] == "no baseline"
    assert ("Respiratory intensity has no baseline yet (not enough past seasons)"
            in result.explain(0, early).sentence)
    assert number_text(rs.indicator("seasonal_intensity"), 4.0) == "very high (4)"
    assert number_text(rs.indicator("seasonal_intensity"), 2.5) == "2"  # not a level: a number


@pytest.mark.parametrize(("params", "match"), [
    ({"measure": "rsv_unknown"}, "measure: 'rsv_unknown' is not a district count measure"),
    ({"min_seasons": 2}, "min_seasons: the baseline needs 3 seasons"),
    ({"seasons": 3, "min_seasons": 5}, "seasons: 3 is fewer than min_seasons 5"),
    ({"start_week": 53}, "start_week: expected an ISO week 1..52"),
    ({"interval": "median"}, "interval: expected 'mean' or 'point'"),
    ({"high_level": 1.5}, "high_level: expected a confidence level"),
], ids=["measure", "min", "max", "week", "interval", "level"])
def test_bad_parameters_name_the_key(params: dict, match: str) -> None:
    with pytest.raises(SeasonalParamError, match=match):
        seasonal_params(params, {"gp_ari": None, "cases": None})


def test_policy_runs_on_stored_observations(session) -> None:  # type: ignore[no-untyped-def]
    """End to end through the store: stored daily counts -> evaluate_districts -> the stored
    explanation names the level."""
    from datetime import UTC, datetime

    import pandas as pd
    from sqlalchemy import select

    from server.services.evaluation import evaluate_districts
    from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
    from server.store.models import Assessment, Region
    from server.store.models import Ruleset as RulesetRow
    from server.store.vintages import append_vintage

    data = _data(seed=4)
    upsert_regions(session=session, records=[
        RegionRecord(code=code, name=f"Quillby {code}", level="district", parent=None,
                     population=int(pop)) for code, pop in zip(data.regions, data.population,
                                                               strict=True)])
    upsert_measures(session=session, records=[
        *(MeasureRecord(name=m, unit="n", kind="count", aggregation="sum")
          for m in ("cases", "tests", "positives", "hosp_admissions", "gp_ari", "icu_occupied",
                    "icu_staffed", "ww_concentration", "ww_flow")),
        MeasureRecord(name=MEASURE, unit="n", kind="count", aggregation="sum",
                      pathogen=MEASURE.partition(".")[2] or None)])
    days = pd.to_datetime(data.dates).date
    rows = pd.DataFrame(
        [(code, MEASURE, day, float(v)) for r, code in enumerate(data.regions)
         for day, v in zip(days, data.district[MEASURE][r], strict=True)],
        columns=["region", "measure", "ref_date", "value"])
    append_vintage(session=session, feed="gp", received_at=datetime(2025, 3, 20, tzinfo=UTC),
                   checksum="seasonal-test", rows=rows)
    rs = parse_ruleset(POLICY)
    row = RulesetRow(name=rs.name, version=str(rs.version), yaml_text=POLICY, sha256=rs.sha256,
                     author="t", created_at=datetime.now(UTC), status="draft")
    session.add(row)
    session.flush()
    run = evaluate_districts(session=session, ruleset_row=row)
    assert run is not None and run.evaluation is not None
    expected = district_indicators(data, rs)["seasonal_intensity"].estimate
    qa = run.evaluation.regions.index("QA")
    assert_allclose(run.evaluation.indicators["seasonal_intensity"].estimate[qa], expected[0])
    sentences = [a.explanation["sentence"] for a in session.scalars(
        select(Assessment).join(Region, Region.id == Assessment.region_id)
        .where(Region.code == "QA"))]
    assert any("Respiratory intensity very high (4)" in s for s in sentences)


def test_policy_with_a_non_integer_season_week_is_refused_with_its_line() -> None:
    from rules.errors import RulesetError

    bad = POLICY.replace("start_week: 40", "start_week: 40.5")
    with pytest.raises(RulesetError, match=r":\d+:\d+: .*params\.start_week.*positive int"):
        parse_ruleset(bad, source="seasonal.yaml")
