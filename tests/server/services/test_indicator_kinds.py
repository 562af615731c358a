"""The registry of indicator kinds: declarations checked with line and key, the old indicator
names as default declarations, and a kind registered from another module. The kinds themselves
are computed in test_builtin_kinds.py."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from sqlalchemy.orm import Session

from rules import IndicatorSeries, RulesetError, load_ruleset, parse_ruleset
from server.services.district_data import load_district_data
from server.services.district_indicators import district_indicators
from server.services.indicator_kinds import (
    DEFAULTS,
    KINDS,
    UnknownIndicatorError,
    compute,
    indicator_check,
    measure_needs,
    register,
    resolve,
)
from server.services.kind_model import Kind, from_named_builder

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


def test_register_refuses_a_second_kind_of_the_same_name() -> None:
    kind = Kind(name="incidence", help="h", default_measure="cases", measure_kinds=("count",),
                builder=KINDS["incidence"].builder)
    with pytest.raises(ValueError, match="registered already"):
        register(kind)


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


# -- on the demo: a kind registered from another module ----------------------------------


def _demo(session: Session, text: str):  # type: ignore[no-untyped-def]
    rs = parse_ruleset(text, indicators=indicator_check())
    needs = measure_needs(rs)
    data = load_district_data(session=session, start=__import__("datetime").date(2026, 7, 4),
                              end=__import__("datetime").date(2026, 11, 30), needs=needs)
    return rs, needs, data, district_indicators(data, rs)


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
