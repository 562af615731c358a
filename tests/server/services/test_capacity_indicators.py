"""The projected-capacity indicators: per area, from the admissions of all its districts."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import load_ruleset, parse_ruleset
from server.indicators.capacity import Scenario, projected_share
from server.indicators.growth import rolling_growth_rate
from server.indicators.hospital import length_of_stay
from server.services.capacity_indicators import (
    GROWTH_WINDOW,
    area_groups,
    days_to_share_series,
    projected_share_series,
)
from server.services.district_indicators import DistrictData, district_indicators
from server.store.models import Assessment

COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"
RULES = """\
name: c
version: "1"
tiers:
  - {name: A, staff: s, public: p}
  - {name: B, staff: s, public: p}
indicators:
  icu_share: {label: ICU share, unit: "%"}
  icu_share_projected: {label: projected, unit: "%", params: {scenario: SC, horizon: 10}}
  icu_days_to_share: {label: days, unit: days, params: {scenario: SC, share: 60, horizon: 21}}
criteria:
  - {id: icu, indicator: icu_share_projected, enter: [50], exit: [40]}
prepare:
  - {id: soon, indicator: icu_days_to_share, at_most: 10}
scenarios:
  - {name: trend, label: if the trend continues, growth: current}
  - {name: halves, label: if admissions halve, change: 0.5, within_days: 14}
"""


def _data() -> DistrictData:
    """Three districts: D1 and D2 in one area (40 of 100 beds), D3 in another (10 of 50)."""
    days = 40
    rng = np.random.default_rng(8)
    adm = rng.poisson(np.array([[6.0], [9.0], [4.0]]) * np.exp(0.04 * np.arange(days)))
    occ = np.array([[40.0] * days, [40.0] * days, [10.0] * days])
    staffed = np.array([[100.0] * days, [100.0] * days, [50.0] * days])
    return DistrictData(
        regions=("D1", "D2", "D3"), levels=("district",) * 3,
        population=np.full(3, 50_000.0),
        dates=np.arange(days) + np.datetime64("2031-01-01"),
        district={"hosp_admissions": adm.astype(float)},
        area_of_district={"icu_occupied": occ, "icu_staffed": staffed},
        plant={}, plant_population=np.zeros(0), served=np.zeros((3, 0)), as_of=None,
    )


def test_area_groups_join_districts_with_the_same_icu_rows() -> None:
    d = _data()
    group = area_groups(d.area_of_district["icu_occupied"], d.area_of_district["icu_staffed"])
    assert group[0] == group[1] != group[2]


@pytest.mark.parametrize("scenario", ["trend", "halves"])
def test_projection_uses_the_areas_summed_admissions(scenario: str) -> None:
    # Reference: the same projection computed by hand on the area's summed admissions.
    d = _data()
    rs = parse_ruleset(RULES.replace("SC", scenario))
    got = projected_share_series(d, rs)
    area = d.district["hosp_admissions"][:2].sum(axis=0, keepdims=True)
    fit = rolling_growth_rate(area, GROWTH_WINDOW, day_of_week=False, max_missing=2)
    # the fitted rate combined with the N(0, 0.1^2) prior (precision-weighted, by hand)
    tau2, v = 0.1**2, fit.std_error**2
    r, se = fit.estimate * tau2 / (tau2 + v), np.sqrt(tau2 * v / (tau2 + v))
    sc = rs.scenario(scenario)
    want = projected_share(
        d.area_of_district["icu_occupied"][:1], d.area_of_district["icu_staffed"][:1],
        r, se, los=length_of_stay(), horizon=10,
        scenario=Scenario(name=sc.name, kind=sc.kind, value=sc.value,
                          within_days=sc.within_days))
    assert_allclose(got.estimate[0], want.share_estimate[0], equal_nan=True)
    assert_allclose(got.estimate[1], got.estimate[0], equal_nan=True)
    assert_allclose(got.lower[0], want.share_lower[0], equal_nan=True)
    assert np.isnan(got.estimate[:, : GROWTH_WINDOW - 1]).all()


def test_days_to_share_beyond_the_horizon_read_horizon_plus_one() -> None:
    d = _data()
    got = days_to_share_series(d, parse_ruleset(RULES.replace("SC", "halves")))
    last = got.estimate[:, -1]
    assert last[2] == 22  # 20 % of beds and halving admissions: never 60 % within 21 days
    assert np.isfinite(got.upper[:, GROWTH_WINDOW:]).all()


def test_builders_are_registered_for_rulesets() -> None:
    d = _data()
    out = district_indicators(d, parse_ruleset(RULES.replace("SC", "trend")))
    assert set(out) == {"icu_share_projected", "icu_days_to_share"}


def test_demo_policy_capacity_signal_raises_no_alarm_in_a_quiet_autumn(
    demo_session: Session,
) -> None:
    """On the 150-day test demo (July to November) no area's ICU share comes near the policy's
    85 %: the projected-capacity signal is evaluated every day and never fires. Its lead before
    a real crossing is checked on a constructed store (test_capacity_leads.py) and measured on
    the 548-day demo, where it fired 20 days before Grennwater crossed (docs/estimate.md)."""
    rs = load_ruleset(COUNTY)
    icu = [c.id for c in rs.criteria].index("icu")
    rows = demo_session.scalars(select(Assessment).order_by(Assessment.ref_date)).all()
    shares = [a.explanation["data"]["criteria"][icu].get("value") for a in rows]
    known = [v for v in shares if v is not None]
    assert len(known) > 0.9 * len(rows) and max(known) < 0.5 * 85
    signals = [p for a in rows for p in a.explanation["data"]["prepare"]
               if p["id"] == "icu-capacity"]
    assert len(signals) == len(rows)  # evaluated every day
    assert not any(a.prepare_signals.get("icu-capacity") for a in rows)


def test_forecasts_at_a_cutoff_cover_every_district_and_area(demo_session: Session) -> None:
    """The record's forecaster (the policy's first scenario) forecasts admissions for every
    district and every area, and ICU beds and their share for every area."""
    from datetime import date

    from server.services.backtest import as_known_cutoff
    from server.services.capacity_forecaster import record_forecaster
    from server.services.forecast_known import read_known

    fc = record_forecaster(demo_session)
    assert fc is not None and fc.scenario.name == "trend"
    known = read_known(session=demo_session, cutoff=as_known_cutoff(date(2026, 11, 20)),
                       measures=fc.measures)
    assert known is not None
    got = fc(known)
    # a district is forecast when its last week of admissions up to the origin is complete (as
    # reported that morning: no nowcast here) and its 14 days hold an admission to fit a growth
    # rate on; areas sum all their districts' reports
    end = known.last_day("hosp_admissions")
    adm = known.values["hosp_admissions"]
    complete = {c for c, week, fit in zip(known.regions, adm[:, end - 6: end + 1],
                                          adm[:, end - 13: end + 1], strict=True)
                if c.startswith("D") and np.isfinite(week).all() and np.nansum(fit) > 0}
    assert len(complete) >= 12
    districts = next(f for f in got if f.target == "hosp_admissions" and len(f.regions) > 3)
    assert set(districts.regions) == complete
    kinds = sorted((f.target, f.scenario, len(f.regions)) for f in got)
    assert kinds == sorted([("hosp_admissions", "trend", len(complete)),
                            ("hosp_admissions", "trend", 3), ("icu_occupied", "trend", 3),
                            ("icu_share", "trend", 3)])
    share = next(f for f in got if f.target == "icu_share")
    assert share.regions == ("R1", "R2", "R3")
    assert share.origin == known.dates[known.last_day("hosp_admissions")].astype(date)
    assert np.isfinite(share.values).all()
