"""The indicator kinds tierwise ships, computed on the demo: each against its definition or a
reference library on any measure of its kind, and the old indicator names equal to their
explicit declarations."""

from __future__ import annotations

import numpy as np
import statsmodels.api as sm
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats
from sqlalchemy.orm import Session

from rules import parse_ruleset
from server.indicators.wastewater import level, normalise, smooth
from server.services.district_data import load_district_data
from server.services.district_indicators import district_indicators
from server.services.indicator_kinds import KINDS, indicator_check, measure_needs, resolve

HEAD = """name: t
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
indicators:
"""


def _policy(indicators: str, criterion: str = "x") -> str:
    return HEAD + indicators + (
        f"criteria:\n  - {{id: c, indicator: {criterion}, enter: [1], exit: [1]}}\n")


def _demo(session: Session, text: str):  # type: ignore[no-untyped-def]
    rs = parse_ruleset(text, indicators=indicator_check())
    needs = measure_needs(rs)
    data = load_district_data(session=session, start=__import__("datetime").date(2026, 7, 4),
                              end=__import__("datetime").date(2026, 11, 30), needs=needs)
    return rs, needs, data, district_indicators(data, rs)


def test_incidence_of_admissions_matches_garwood_bounds_on_the_demo(demo_session: Session) -> None:
    text = _policy("  adm14:\n    label: a\n    kind: incidence\n    measure: hosp_admissions\n"
                   "    params: {window: 14}\n", "adm14")
    _rs, needs, data, series = _demo(demo_session, text)
    assert (needs.district, needs.area, needs.plant) == (("hosp_admissions",), (), ())
    assert set(data.district) == {"hosp_admissions"}
    s = series["adm14"]
    adm = data.district["hosp_admissions"]
    # 14-day sum by its definition; Garwood (1936) exact Poisson limits from scipy's chi-square
    # quantiles: lower chi2(0.025; 2x)/2, upper chi2(0.975; 2x + 2)/2, per 100 000 people.
    csum = np.cumsum(np.nan_to_num(adm), axis=1)
    x = csum[:, 13:] - np.concatenate([np.zeros((adm.shape[0], 1)), csum[:, :-14]], axis=1)
    complete = np.isfinite(adm).all(axis=0)
    days = np.flatnonzero(complete[13:] & np.convolve(~complete, np.ones(14), "full")[13:-13]
                          .__eq__(0)) + 13
    scale = 1e5 / data.population[:, None]
    reported = ~s.nowcast[:, days] if s.nowcast is not None else np.ones_like(days, bool)
    want = x[:, days - 13]
    assert_allclose(np.where(reported, s.count[:, days], 0), np.where(reported, want, 0))
    assert_allclose(np.where(reported, s.estimate[:, days], 0),
                    np.where(reported, want * scale, 0), rtol=1e-12)
    lower = np.where(want > 0, stats.chi2.ppf(0.025, 2 * want) / 2, 0.0) * scale
    upper = stats.chi2.ppf(0.975, 2 * want + 2) / 2 * scale
    assert_allclose(np.where(reported, s.lower[:, days], 0), np.where(reported, lower, 0),
                    rtol=1e-9)
    assert_allclose(np.where(reported, s.upper[:, days], 0), np.where(reported, upper, 0),
                    rtol=1e-9)
    assert reported.sum() > 100


def test_old_names_equal_their_explicit_declarations_on_the_demo(demo_session: Session) -> None:
    text = (HEAD + "".join(
        f"  {name}: {{label: {name}}}\n  {name}_k:\n    label: k\n    kind: {kind}\n"
        f"    measure: {measure}\n"
        for name, kind, measure in (
            ("incidence_7d", "incidence", "cases"),
            ("admissions_7d", "incidence", "hosp_admissions"),
            ("positivity_7d", "positivity", "positives"),
            ("tests_7d", "testing_rate", "tests"),
            ("icu_share", "occupancy_share", "icu_occupied"),
            ("rt", "rt", "cases"),
            ("ww_trend", "wastewater_trend", "ww_concentration"),
            ("gp_aberration", "aberration", "gp_ari"),
        )) + "criteria:\n" + "".join(
            f"  - {{id: c{i}, indicator: {n}, enter: [1], exit: [1]}}\n"
            for i, n in enumerate(("incidence_7d", "admissions_7d", "positivity_7d", "tests_7d",
                                   "icu_share", "rt", "ww_trend", "gp_aberration")))
        + "prepare:\n" + "".join(
            f"  - {{id: p{i}, indicator: {n}_k, above: 0}}\n"
            for i, n in enumerate(("incidence_7d", "admissions_7d", "positivity_7d", "tests_7d",
                                   "icu_share", "rt", "ww_trend", "gp_aberration"))))
    _rs, _needs, _data, series = _demo(demo_session, text)
    for name in ("incidence_7d", "admissions_7d", "positivity_7d", "tests_7d", "icu_share",
                 "rt", "ww_trend", "gp_aberration"):
        old, new = series[name], series[f"{name}_k"]
        assert_array_equal(old.estimate, new.estimate)
        assert np.isfinite(old.estimate).any(), name


def test_growth_rate_of_cases_matches_a_statsmodels_quasi_poisson_fit(
    demo_session: Session,
) -> None:
    text = _policy("  g:\n    label: g\n    kind: growth_rate\n    measure: cases\n", "g")
    _rs, _needs, data, series = _demo(demo_session, text)
    cases, g = data.district["cases"], series["g"]
    compared = 0
    for day in (60, 100, 140):
        weekday = (data.dates[day - 13: day + 1].astype("datetime64[D]").view("int64") + 3) % 7
        dummies = (weekday[:, None] == np.arange(1, 7)[None, :]).astype(float)
        X = np.column_stack([np.ones(14), np.arange(14.0), dummies])
        for i in range(cases.shape[0]):
            y = cases[i, day - 13: day + 1]
            if not (np.isfinite(y).all() and np.isfinite(g.estimate[i, day])
                    and g.age_days[i, day] == 0):
                continue  # no fit that day (the newest estimate is held): nothing to compare
            # Log-linear Poisson GLM with weekday effects (statsmodels 0.15, GLM Poisson, log
            # link): the slope is the daily growth rate r; the kind gives it in % per day.
            fit = sm.GLM(y, X, family=sm.families.Poisson()).fit()
            assert_allclose(g.estimate[i, day], 100 * fit.params[1], rtol=1e-6, atol=1e-8)
            compared += 1
    assert compared >= 20


def test_aberration_c1_follows_the_ears_definition_on_another_measure(
    demo_session: Session,
) -> None:
    text = _policy("  a:\n    label: a\n    kind: aberration\n    measure: hosp_admissions\n"
                   "    params: {method: C1}\n", "a")
    _rs, _needs, data, series = _demo(demo_session, text)
    y = data.district["hosp_admissions"]
    # EARS C1 (Hutwagner et al. 2003, from memory; threshold 3 as REFERENCES.md lists):
    # (Y_t - mean) / sd over t-7..t-1, the sd floored at 0.2 as docs/estimate.md states.
    alarms = []
    for t in range(7, y.shape[1]):
        base = y[:, t - 7: t]
        ok = np.isfinite(base).all(axis=1) & np.isfinite(y[:, t])
        sd = np.maximum(np.std(base, axis=1, ddof=1), 0.2)
        c1 = (y[:, t] - base.mean(axis=1)) / sd
        got = series["a"].estimate[:, t]
        assert_array_equal(got[ok], (c1[ok] > 3).astype(float))
        alarms.append(got[ok].sum())
    assert sum(alarms) > 0  # the check saw alarms, not only quiet days


def test_wastewater_level_of_a_one_plant_district_is_its_plants_level(
    demo_session: Session,
) -> None:
    # Wiring only: the level method itself is checked against its definition in
    # tests/server/indicators/test_wastewater.py.
    text = _policy("  lvl:\n    label: l\n    kind: wastewater_level\n"
                   "    params: {baseline_days: 90, min_samples: 10, quantile: 0.2}\n", "lvl")
    _rs, needs, data, series = _demo(demo_session, text)
    assert needs.plant == ("ww_concentration", "ww_flow") and needs.district == ()
    conc, flow = data.plant["ww_concentration"], data.plant["ww_flow"]
    norm = normalise(conc, ["flow"] * conc.shape[0], flow=flow,
                     population_served=data.plant_population)
    lvl = level(norm.log_value, current=smooth(norm.log_value, neighbours=5).estimate,
                baseline_days=90, quantile=0.2, min_samples=10).estimate
    one = np.flatnonzero((data.served > 0).sum(axis=1) == 1)
    assert one.size
    for i in one:
        j = int(np.flatnonzero(data.served[i])[0])
        on = np.isfinite(norm.log_value[j])
        assert_allclose(series["lvl"].estimate[i, on], lvl[j, on])
        assert np.isfinite(lvl[j, on]).sum() > 10


def test_each_wastewater_target_is_judged_on_its_own_plant_measures() -> None:
    from server.services.district_data import DistrictData

    days = 40
    rng = np.random.default_rng(3)
    conc = np.where(np.arange(days) % 2 == 0, np.exp(8 + rng.normal(0, 0.1, days)), np.nan)
    bad = np.zeros((1, days), dtype=bool)
    bad[0, 20] = True  # one unusable influenza value at the plant
    data = DistrictData(
        regions=("D1",), levels=("district",), population=np.array([1e4]),
        dates=np.arange(np.datetime64("2026-01-01"), np.datetime64("2026-01-01") + days),
        district={}, area_of_district={},
        plant={"ww_concentration": conc[None], "ww_concentration.influenza": conc[None],
               "ww_flow": np.full((1, days), 1e6)},
        plant_population=np.array([1e4]), served=np.array([[1e4]]), as_of=None,
        plant_invalid={"ww_concentration": np.zeros((1, days), bool),
                       "ww_concentration.influenza": bad, "ww_flow": np.zeros((1, days), bool)},
    )
    text = _policy("  sars:\n    label: s\n    kind: wastewater_trend\n"
                   "  flu:\n    label: f\n    kind: wastewater_trend\n"
                   "    measure: ww_concentration.influenza\n", "sars")
    rs = parse_ruleset(text, indicators=indicator_check())
    sars, flu = (KINDS["wastewater_trend"].build(data, resolve(rs.indicator(n)))  # type: ignore[arg-type]
                 for n in ("sars", "flu"))
    assert sars.invalid is None
    # the bad day reaches the 15-day trend window after it
    assert np.flatnonzero(flu.invalid[0]).tolist() == list(range(20, 35))
    assert_array_equal(sars.estimate, flu.estimate)
