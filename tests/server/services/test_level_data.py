"""Policies above the districts (server/services/level_data.py): indicators of areas and of the
county from counts summed over their districts, as known at a cutoff, stored as the areas' and
the county's assessments.

The oracle is arithmetic written out here on the generated counts: an area's 7-day incidence is
its districts' summed cases over its summed population (the definition of incidence per
100 000, e.g. Rothman, Greenland & Lash 2008, "Modern Epidemiology", ch. 3, from memory), its
positivity the summed positives over the summed tests, the county's ICU share its areas'
summed beds in use over summed staffed beds.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import parse_ruleset
from server.services.backtest import run_backtest
from server.services.district_indicators import district_indicators
from server.services.evaluation import evaluate_districts
from server.services.level_data import policy_data
from server.store.catalogue import (
    MeasureRecord,
    RegionRecord,
    replace_catchments,
    upsert_measures,
    upsert_regions,
)
from server.store.models import Assessment, Region
from server.store.models import Ruleset as RulesetRow
from server.store.vintages import append_vintage

FIRST = date(2031, 3, 2)
DAYS = 40
DISTRICTS = {"D0": ("A0", 100_000), "D1": ("A0", 4_000), "D2": ("A1", 60_000),
             "D3": ("A1", 40_000)}
POLICY = """\
name: area-test
version: "1"
level: {level}
tiers:
  - {{name: Quiet, staff: s0, public: p0}}
  - {{name: Loud, staff: s1, public: p1}}
indicators:
  incidence_7d: {{label: incidence}}
  positivity_7d: {{label: positivity, unit: "%"}}
  icu_share: {{label: ICU share, unit: "%"}}
criteria:
  - {{id: incidence, indicator: incidence_7d, enter: [100], exit: [80], use_nowcast: false}}
  - {{id: positivity, indicator: positivity_7d, enter: [20], exit: [15]}}
  - {{id: icu, indicator: icu_share, enter: [50], exit: [40]}}
"""


def _arrival(day: date) -> datetime:
    return datetime.combine(day + timedelta(days=1), time(5), UTC)


@pytest.fixture
def store(session: Session) -> dict[str, np.ndarray]:
    """County C with areas A0 (D0, D1) and A1 (D2, D3): daily cases, tests, positives per
    district (A0 grows, A1 stays low), ICU beds per area; each day received the next morning."""
    upsert_regions(session=session, records=[
        RegionRecord(code="C", name="Testshire", level="county", parent=None, population=204_000),
        RegionRecord(code="A0", name="Upper Vale", level="region", parent="C", population=104_000),
        RegionRecord(code="A1", name="Lower Vale", level="region", parent="C", population=100_000),
        *(RegionRecord(code=d, name=f"Parish {d}", level="district", parent=a, population=p)
          for d, (a, p) in DISTRICTS.items()),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name=m, unit="count", kind=k, aggregation="sum")
        for m, k in (("cases", "count"), ("tests", "count"), ("positives", "count"),
                     ("hosp_admissions", "count"), ("icu_occupied", "level"),
                     ("icu_staffed", "level"))])
    rng = np.random.default_rng(404)
    t = np.arange(DAYS)
    lam = np.array([20 * np.exp(0.06 * t), 3 * np.exp(0.06 * t), 5 + 0 * t, 4 + 0 * t])
    cases = rng.poisson(lam).astype(float)
    tests = rng.poisson(lam * 4 + 200).astype(float)
    positives = np.minimum(rng.poisson(cases * 0.9), tests)
    occ = np.array([np.round(10 + 0.8 * t), np.full(DAYS, 5.0)])
    staffed = np.array([np.full(DAYS, 40.0), np.full(DAYS, 30.0)])
    codes = list(DISTRICTS)
    for j in range(DAYS):
        ref = FIRST + timedelta(days=j)
        rows = [(c, m, ref, arr[i, j]) for m, arr in (("cases", cases), ("tests", tests),
                                                      ("positives", positives))
                for i, c in enumerate(codes)]
        rows += [(a, m, ref, arr[k, j]) for m, arr in (("icu_occupied", occ),
                                                       ("icu_staffed", staffed))
                 for k, a in enumerate(("A0", "A1"))]
        append_vintage(session=session, feed="daily", received_at=_arrival(ref),
                       checksum=f"d{j:063d}",
                       rows=pd.DataFrame(rows, columns=["region", "measure", "ref_date", "value"]))
    return {"cases": cases, "tests": tests, "positives": positives, "occ": occ,
            "staffed": staffed}


def _ruleset(session: Session, level: str) -> RulesetRow:
    text = POLICY.format(level=level)
    rs = parse_ruleset(text)
    row = RulesetRow(name=rs.name, version=level, yaml_text=text, sha256=rs.sha256,
                     author="test", created_at=datetime(2031, 5, 1, tzinfo=UTC), status="draft")
    session.add(row)
    session.flush()
    return row


def _week(values: np.ndarray) -> np.ndarray:
    """Trailing 7-day sums per row (NaN for the first six days)."""
    c = np.cumsum(values, axis=1)
    out = np.full(values.shape, np.nan)
    out[:, 6:] = c[:, 6:] - np.concatenate([np.zeros((values.shape[0], 1)), c[:, :-7]], axis=1)
    return out


def test_area_indicators_come_from_summed_counts(session: Session, store: dict) -> None:
    rs = parse_ruleset(POLICY.format(level="areas"))
    end = FIRST + timedelta(days=DAYS - 1)
    data = policy_data(session=session, ruleset=rs, start=FIRST, end=end, as_of=_arrival(end))
    assert data.regions == ("A0", "A1") and data.levels == ("area", "area")
    assert_allclose(data.population, [104_000, 100_000])
    series = district_indicators(data, rs)
    area_cases = np.array([store["cases"][:2].sum(0), store["cases"][2:].sum(0)])
    expected = _week(area_cases) / np.array([[104_000], [100_000]]) * 1e5
    assert_allclose(series["incidence_7d"].estimate[:, 6:], expected[:, 6:], rtol=1e-12)
    pos = np.array([store["positives"][:2].sum(0), store["positives"][2:].sum(0)])
    tests = np.array([store["tests"][:2].sum(0), store["tests"][2:].sum(0)])
    assert_allclose(series["positivity_7d"].estimate[:, 6:],
                    (100 * _week(pos) / _week(tests))[:, 6:], rtol=1e-12)
    # not the mean of the districts' positivity
    district = 100 * _week(store["positives"]) / _week(store["tests"])
    assert not np.allclose(series["positivity_7d"].estimate[0, 6:],
                           district[:2, 6:].mean(0))
    assert_allclose(series["icu_share"].estimate, 100 * store["occ"] / store["staffed"])


def test_county_icu_share_sums_the_areas_beds(session: Session, store: dict) -> None:
    rs = parse_ruleset(POLICY.format(level="county"))
    end = FIRST + timedelta(days=DAYS - 1)
    data = policy_data(session=session, ruleset=rs, start=FIRST, end=end, as_of=_arrival(end))
    assert data.regions == ("C",) and data.levels == ("county",)
    share = district_indicators(data, rs)["icu_share"].estimate[0]
    assert_allclose(share, 100 * store["occ"].sum(0) / store["staffed"].sum(0))


def test_a_small_district_missing_a_day_is_scaled_in_a_large_one_is_not(
    session: Session, store: dict
) -> None:
    # D1 holds 4 000 of A0's 104 000 people (3.8 % <= 5 %): A0's cases on the day are D0's
    # scaled by 104 000 / 100 000 and rounded. D3 holds 40 % of A1: A1 is missing that day.
    last = FIRST + timedelta(days=DAYS)
    append_vintage(session=session, feed="daily", received_at=_arrival(last), checksum="x" * 64,
                   rows=pd.DataFrame([("D0", "cases", last, 50.0), ("D2", "cases", last, 9.0)],
                                     columns=["region", "measure", "ref_date", "value"]))
    rs = parse_ruleset(POLICY.format(level="areas"))
    data = policy_data(session=session, ruleset=rs, start=FIRST, end=last, as_of=_arrival(last))
    assert data.district["cases"][0, -1] == round(50 * 104_000 / 100_000)  # 52
    assert np.isnan(data.district["cases"][1, -1])


def test_an_area_policy_stores_area_assessments_as_of_its_cutoff(
    session: Session, store: dict
) -> None:
    row = _ruleset(session, "areas")
    end = FIRST + timedelta(days=DAYS - 1)
    early = _arrival(FIRST + timedelta(days=DAYS - 11))
    run = evaluate_districts(session=session, ruleset_row=row, cutoff=early)
    assert run is not None and run.evaluation is not None
    assert run.evaluation.regions == ("A0", "A1")
    late = evaluate_districts(session=session, ruleset_row=row, cutoff=_arrival(end))
    assert late is not None and late.evaluation is not None
    codes = dict(session.execute(select(Region.id, Region.code)).all())
    stored = {codes[r] for r in session.scalars(
        select(Assessment.region_id).where(Assessment.ruleset_id == row.id))}
    assert stored == {"A0", "A1"}
    # A0 grows into the upper tier, A1 stays quiet (ICU 5 of 30, few cases)
    assert late.evaluation.tier[0, -1] == 1 and late.evaluation.tier[1, -1] == 0
    # the early run saw only the data known at its cutoff: 10 days fewer
    assert run.end == end - timedelta(days=10)
    # the stored explanation of A0's last day carries the area's ICU share
    a0 = next(i for i, c in codes.items() if c == "A0")
    stored_row = session.scalar(select(Assessment).where(
        Assessment.ruleset_id == row.id, Assessment.region_id == a0,
        Assessment.ref_date == end).order_by(Assessment.data_cutoff.desc()).limit(1))
    assert stored_row is not None
    icu = next(c for c in stored_row.explanation["data"]["criteria"] if c["id"] == "icu")
    assert_allclose(icu["value"], 100 * store["occ"][0, -1] / 40.0)


def test_backtests_of_an_area_policy_replay_the_areas(session: Session, store: dict) -> None:
    # Every day is received the next morning and never revised, so the as-known replay (each
    # morning sees the days received by then, in stacked windows summed block by block) must
    # give the areas the same indicators and tiers as the replay on the final data.
    rs = parse_ruleset(POLICY.format(level="areas"))
    plain = run_backtest(session=session, ruleset=rs)
    known = run_backtest(session=session, ruleset=rs, as_known=True)
    for result in (plain, known):
        assert result.evaluation.regions == ("A0", "A1")
    assert_array_equal(plain.evaluation.tier, known.evaluation.tier)
    assert set(plain.evaluation.tier[:, -1].tolist()) == {0, 1}
    for name in ("incidence_7d", "positivity_7d", "icu_share"):
        assert_allclose(known.evaluation.indicators[name].estimate[:, 6:],
                        plain.evaluation.indicators[name].estimate[:, 6:], rtol=1e-12,
                        equal_nan=True)


WW_POLICY = """\
name: ww-test
version: "1"
level: {level}
tiers:
  - {{name: Quiet, staff: s0, public: p0}}
  - {{name: Loud, staff: s1, public: p1}}
indicators:
  ww_trend: {{label: wastewater, params: {{window: 15}}}}
criteria:
  - {{id: ww, indicator: ww_trend, enter: [5], exit: [2]}}
"""


def test_area_wastewater_is_weighted_by_the_people_each_plant_serves(
    session: Session, store: dict
) -> None:
    # P0 serves all of D0 (100 000) and half of D1 (2 000 of 4 000); P1 the other half of D1,
    # all of D2 (60 000) and a quarter of D3 (10 000). Area A0 = {D0, D1} is served 102 000 by
    # P0 and 2 000 by P1, A1 = {D2, D3} 70 000 by P1 alone. D0 reads P0's trend alone, D2 P1's,
    # so A0's trend is (102 000 x D0 + 2 000 x D2) / 104 000 and A1's is D2's.
    upsert_regions(session=session, records=[
        RegionRecord(code=p, name=f"Works {p}", level="plant", parent=None, population=n)
        for p, n in (("P0", 102_000), ("P1", 72_000))])
    upsert_measures(session=session, records=[
        MeasureRecord(name="ww_concentration", unit="gc/l", kind="concentration",
                      aggregation="mean"),
        MeasureRecord(name="ww_flow", unit="m3", kind="level", aggregation="sum")])
    replace_catchments(session=session, shares=[("P0", "D0", 1.0), ("P0", "D1", 0.5),
                                                ("P1", "D1", 0.5), ("P1", "D2", 1.0),
                                                ("P1", "D3", 0.25)])
    rng = np.random.default_rng(7)
    t = np.arange(0, DAYS, 2)
    conc = {"P0": 1e5 * np.exp(0.05 * t + rng.normal(0, 0.1, t.size)),
            "P1": 4e4 * np.exp(-0.02 * t + rng.normal(0, 0.1, t.size))}
    rows = [(p, m, FIRST + timedelta(days=int(d)), v)
            for p in ("P0", "P1") for d, c in zip(t, conc[p], strict=True)
            for m, v in (("ww_concentration", float(c)), ("ww_flow", 20_000.0))]
    end = FIRST + timedelta(days=DAYS - 1)
    append_vintage(session=session, feed="ww", received_at=_arrival(end), checksum="w" * 64,
                   rows=pd.DataFrame(rows, columns=["region", "measure", "ref_date", "value"]))
    series = {}
    for level in ("districts", "areas"):
        rs = parse_ruleset(WW_POLICY.format(level=level))
        data = policy_data(session=session, ruleset=rs, start=FIRST, end=end,
                           as_of=_arrival(end))
        series[level] = dict(zip(data.regions,
                                 district_indicators(data, rs)["ww_trend"].estimate, strict=True))
    d0, d2 = series["districts"]["D0"], series["districts"]["D2"]
    both = np.isfinite(d0) & np.isfinite(d2)
    assert both.sum() >= 10
    assert_allclose(series["areas"]["A0"][both], (102_000 * d0 + 2_000 * d2)[both] / 104_000,
                    rtol=1e-12)
    assert_allclose(series["areas"]["A1"][both], d2[both], rtol=1e-12)
