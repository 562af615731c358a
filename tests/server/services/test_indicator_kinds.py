"""The registry of indicator kinds: declarations checked with line and key, any kind on any
measure of the right kind, and the old indicator names as default declarations."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose, assert_array_equal
from scipy import stats
from sqlalchemy.orm import Session

from rules import IndicatorSeries, RulesetError, load_ruleset, parse_ruleset
from server.indicators.wastewater import level, normalise, smooth
from server.services.district_data import load_district_data
from server.services.district_indicators import district_indicators
from server.services.indicator_kinds import (
    DEFAULTS,
    KINDS,
    Kind,
    Param,
    UnknownIndicatorError,
    compute,
    from_named_builder,
    indicator_check,
    measure_kind,
    measure_needs,
    register,
    resolve,
)

POLICIES = Path(__file__).resolve().parents[3] / "rules" / "policies"

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


def _problems(text: str) -> list[tuple[int, str, str]]:
    """(line, key path, message) of every problem the checked loader reports."""
    with pytest.raises(RulesetError) as info:
        parse_ruleset(text, source="p.yaml", indicators=indicator_check())
    return [(e.line, e.path, e.message) for e in info.value.errors]


@pytest.mark.parametrize("policy", sorted(POLICIES.glob("*.yaml")), ids=lambda p: p.stem)
def test_check_shipped_policies_load_unchanged(policy: Path) -> None:
    plain = load_ruleset(policy)
    checked = load_ruleset(policy, indicators=indicator_check())
    assert checked.sha256 == plain.sha256 and checked.indicators == plain.indicators


@pytest.mark.parametrize(("declaration", "line", "path", "message"), [
    ("  x: {label: x, kind: incidense}\n", 7, "indicators.x.kind",
     "unknown indicator kind 'incidense'"),
    ("  x:\n    label: x\n    kind: incidence\n    measure: ww_concentration\n", 10,
     "indicators.x.measure", "'ww_concentration' is a concentration measure; this kind takes "
                             "count measures"),
    ("  x:\n    label: x\n    kind: incidence\n    measure: casez\n", 10,
     "indicators.x.measure", "'casez' is not a known measure"),
    ("  x:\n    label: x\n    kind: incidence\n    params:\n      window: 400\n", 11,
     "indicators.x.params.window", "400 is above the maximum 366"),
    ("  x:\n    label: x\n    kind: incidence\n    params: {window: 7, bogus: 2}\n", 10,
     "indicators.x.params.bogus", "unknown parameter 'bogus' of kind 'incidence'"),
    ("  x:\n    label: x\n    kind: positivity\n    params: {denominator: ww_flow}\n", 10,
     "indicators.x.params.denominator", "'ww_flow' is a level measure; this kind takes count"),
    ("  x:\n    label: x\n    kind: aberration\n    params: {method: C4}\n", 10,
     "indicators.x.params.method", "expected one of C1, C2, C3, got 'C4'"),
    ("  x:\n    label: x\n    kind: growth_rate\n    params: {window: 7}\n", 10,
     "indicators.x.params.window", "7 days are too few for the fit (at least 9"),
    ("  x:\n    label: x\n    kind: rt\n    params: {serial_interval_mean: 1}\n", 10,
     "indicators.x.params.serial_interval_mean", "expected a number above 1, got 1"),
    ("  x:\n    label: x\n    measure: cases\n", 9,
     "indicators.x.measure", "measure 'cases' given without a kind"),
    # an old name keeps its default kind; its parameters are checked against that kind
    ("  x:\n    label: x\n    kind: incidence\n  rt:\n    label: i\n"
     "    params: {serial_interval_mean: 0.5, note: free}\n", 12,
     "indicators.rt.params.serial_interval_mean", "expected a number above 1, got 0.5"),
], ids=["kind", "measure-kind", "measure-name", "bound", "unknown-param", "denominator",
        "choice", "cross-param", "exclusive-bound", "measure-without-kind", "default-name"])
def test_check_reports_line_and_key(declaration: str, line: int, path: str, message: str) -> None:
    problems = _problems(_policy(declaration))
    assert len(problems) == 1
    got_line, got_path, got_message = problems[0]
    assert (got_line, got_path) == (line, path)
    assert got_message.startswith(message)


def test_check_collects_problems_of_several_indicators() -> None:
    text = _policy("  x: {label: x, kind: nope}\n  y: {label: y, kind: rt, params: {window: -1}}\n")
    assert [(p[0], p[1]) for p in _problems(text)] == [
        (7, "indicators.x.kind"), (8, "indicators.y.params.window")]


def test_check_without_registry_still_loads_names_it_does_not_know() -> None:
    # A framework written for other tools (EU 2020/1475's 14-day rate) loads and checks; only
    # computing it fails, naming the kinds that would do.
    rs = load_ruleset(POLICIES / "eu-2020-1475.yaml", indicators=indicator_check())
    assert resolve(rs.indicator("rate_14d")) is None
    assert measure_needs(rs).district == ("positives", "tests")  # positivity_7d, tests_7d
    with pytest.raises(UnknownIndicatorError, match=r"rate_14d.*declare a kind \(known kinds: "
                                                    r"aberration"):
        compute(None, rs, {})  # type: ignore[arg-type]


def test_resolve_old_names_are_default_declarations() -> None:
    rs = load_ruleset(POLICIES / "county.yaml", indicators=indicator_check())
    got = {n: (i.kind.name, i.measure, dict(i.params)) for n in rs.used_indicators()
           if (i := resolve(rs.indicator(n))) is not None}
    assert got["incidence_7d"] == ("incidence", "cases", {"window": 7, "per": 100_000})
    assert got["admissions_7d"][:2] == ("incidence", "hosp_admissions")
    assert got["positivity_7d"] == ("positivity", "positives", {"window": 7,
                                                                "denominator": "tests"})
    assert got["rt"][2]["serial_interval_mean"] == 4.7
    assert got["ww_trend"] == ("wastewater_trend", "ww_concentration",
                               {"window": 15, "flow": "ww_flow", "samples": 4})


def test_measure_kind_of_a_qualified_measure_is_its_base_kind() -> None:
    known = {"cases": "count", "ww_concentration": "concentration"}
    assert measure_kind("cases.influenza", known) == "count"
    assert measure_kind("ww_concentration.rsv", known) == "concentration"
    assert measure_kind("deaths.influenza", known) is None
    assert measure_kind("cases", known) == "count"


def test_register_refuses_a_second_kind_of_the_same_name() -> None:
    kind = Kind(name="incidence", help="h", default_measure="cases", measure_kinds=("count",),
                builder=KINDS["incidence"].builder)
    with pytest.raises(ValueError, match="registered already"):
        register(kind)


def test_param_refuses_booleans_for_numbers() -> None:
    p = Param(name="window", type=int, default=7, minimum=1, help="h")
    with pytest.raises(ValueError, match="expected an integer, got True"):
        p.check(True, {})


# -- on the demo: any kind on any measure of its kind ----------------------------------------


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


def test_resolve_a_wastewater_target_per_pathogen() -> None:
    # one wastewater target per pathogen: the qualified concentration has its base's kind
    spec = parse_ruleset(_policy("  flu_ww:\n    label: w\n    kind: wastewater_trend\n"
                                 "    measure: ww_concentration.influenza\n", "flu_ww"),
                         indicators=indicator_check()).indicator("flu_ww")
    ind = resolve(spec)
    assert ind is not None and ind.measures() == ("ww_concentration.influenza", "ww_flow")
    assert _problems(_policy("  flu:\n    label: w\n    kind: incidence\n"
                             "    measure: ww_concentration.influenza\n", "flu"))[0][2] == (
        "'ww_concentration.influenza' is a concentration measure; this kind takes count "
        "measures")


def test_a_named_builder_registers_as_a_kind_in_one_line(demo_session: Session) -> None:
    # A BUILDERS-style function reads its parameters as ruleset.indicator(NAME).params and a
    # fixed measure (as the wave-phase, capacity and seasonal builders of other branches do).
    def doubled_cases(d, ruleset):  # type: ignore[no-untyped-def]
        window = int(ruleset.indicator("doubled").params.get("window", 7))
        counts = d.district["cases"]
        return IndicatorSeries(estimate=2 * np.cumsum(np.nan_to_num(counts), axis=1) / window)

    kind = from_named_builder(doubled_cases, name="doubled", help="test", default_measure="cases",
                              measure_kinds=("count",))
    register(kind, default=True)
    try:
        text = (HEAD + "  doubled: {label: d, params: {window: 2}}\n"
                "  other:\n    label: o\n    kind: doubled\n    params: {window: 4}\n"
                "criteria:\n  - {id: a, indicator: doubled, enter: [1], exit: [1]}\n"
                "  - {id: b, indicator: other, enter: [1], exit: [1]}\n")
        _rs, needs, data, series = _demo(demo_session, text)
        assert "cases" in needs.district and needs.area  # the measures of earlier releases
        total = np.cumsum(np.nan_to_num(data.district["cases"]), axis=1)
        assert_allclose(series["doubled"].estimate, total)  # 2 x total / 2
        assert_allclose(series["other"].estimate, total / 2)  # 2 x total / 4
    finally:
        KINDS.pop("doubled")
        DEFAULTS.pop("doubled")


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
