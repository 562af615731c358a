"""Scenarios in policy YAML (rules.model.Scenario, the loader) and projected-capacity signals."""

from __future__ import annotations

import numpy as np
import pytest

from rules import IndicatorSeries, RulesetError, evaluate, parse_ruleset
from rules.explanation import explain

RULES = """\
name: capacity
version: "1"
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Busy, staff: s, public: p}
indicators:
  icu_share: {label: ICU share, unit: "%"}
  icu_days_to_share:
    label: days until 85% of staffed ICU beds
    unit: days
    decimals: 0
    params: {scenario: SCENARIO, share: 85, horizon: 21}
criteria:
  - {id: icu, indicator: icu_share, enter: [40], exit: [30]}
prepare:
  - id: icu-capacity
    indicator: icu_days_to_share
    at_most: 14
    for: 2
    message: ICU share projected to reach 85% in {reading} if the trend continues.
scenarios:
  - name: trend
    label: if the trend continues
    growth: current
  - name: levels-off
    label: if it levels off within 7 days
    growth: 0
    within_days: 7
  - name: halves
    label: if admissions halve within 14 days
    change: 0.5
    within_days: 14
"""


def test_scenarios_are_read_with_their_kinds() -> None:
    rs = parse_ruleset(RULES.replace("SCENARIO", "trend"))
    assert [(s.name, s.kind, s.value, s.within_days) for s in rs.scenarios] == [
        ("trend", "trend", 0.0, 1), ("levels-off", "growth_to", 0.0, 7),
        ("halves", "change", 0.5, 14)]
    assert rs.scenario("halves").label == "if admissions halve within 14 days"


def test_scenario_labels_and_signal_messages_carry_translations() -> None:
    text = RULES.replace("SCENARIO", "trend").replace(
        "    label: if the trend continues\n",
        "    label: if the trend continues\n    translations: {de: bei gleichem Trend}\n").replace(
        "    message: ICU share projected to reach 85% in {reading} if the trend continues.\n",
        "    message: ICU share projected to reach 85% in {reading} if the trend continues.\n"
        "    translations: {de: \"Intensivbettenanteil in {reading} bei 85 %.\"}\n")
    rs = parse_ruleset(text)
    assert (rs.scenario("trend").label_in("de"), rs.scenario("trend").label_in("fr")) == (
        "bei gleichem Trend", "if the trend continues")
    assert rs.scenario("halves").label_in("de") == "if admissions halve within 14 days"
    assert rs.prepare[0].message_in("de") == "Intensivbettenanteil in {reading} bei 85 %."
    assert rs.prepare[0].message_in("en").startswith("ICU share projected")
    with pytest.raises(RulesetError,
                       match=r"x\.yaml:\d+:\d+: scenarios\[0\]\.translations\.German"):
        parse_ruleset(text.replace("{de: bei gleichem", "{German: bei gleichem"), source="x.yaml")


@pytest.mark.parametrize(("old", "new", "where"), [
    ("    change: 0.5\n", "    change: -2\n", r"x\.yaml:31:13: scenarios\[2\]\.change: .*above 0"),
    ("    growth: 0\n", "    growth: 0\n    change: 2\n",
     r"x\.yaml:25:5: scenarios\[1\]: .*exactly one of 'growth'"),
    ("    growth: 0\n    within_days: 7\n", "    growth: 0\n",
     r"x\.yaml:25:5: scenarios\[1\]: 'growth' needs 'within_days'"),
    ("    growth: 0\n", "    growth: 5\n", r"x\.yaml:27:13: scenarios\[1\]\.growth: .*daily"),
    ("    within_days: 14\n", "    within_days: 40\n",
     r"x\.yaml:32:18: scenarios\[2\]\.within_days: .*longest horizon"),
    ("  - name: halves\n", "  - name: trend\n", r"scenarios\[2\]\.name: .*declared twice"),
    ("    growth: current\n", "    growth: current\n    within_days: 3\n",
     r"x\.yaml:25:18: scenarios\[0\]\.within_days: .*does not apply"),
    ("    label: if it levels off within 7 days\n", "    lable: x\n",
     r"x\.yaml:26:5: scenarios\[1\]\.lable: unknown key"),
], ids=["negative-change", "both", "no-days", "percent-rate", "too-long", "twice", "trend-days",
        "typo"])
def test_scenario_errors_name_file_line_and_key(old: str, new: str, where: str) -> None:
    text = RULES.replace("SCENARIO", "trend").replace(old, new, 1)
    with pytest.raises(RulesetError, match=where):
        parse_ruleset(text, source="x.yaml")


def test_indicator_naming_an_undeclared_scenario_is_refused() -> None:
    with pytest.raises(RulesetError, match=r"indicators\.icu_days_to_share\.params\.scenario: "
                                           r"'surge' is not a declared scenario"):
        parse_ruleset(RULES.replace("SCENARIO", "surge"), source="x.yaml")


def test_projected_capacity_signal_explains_itself_with_its_reading() -> None:
    rs = parse_ruleset(RULES.replace("SCENARIO", "trend"))
    days = np.array([[22.0, 16.0, 12.0, 9.0]])
    ind = {
        "icu_share": IndicatorSeries(estimate=np.full((1, 4), 20.0)),
        "icu_days_to_share": IndicatorSeries(estimate=days, lower=days - 3, upper=days + 5),
    }
    ev = evaluate(rs, ind, regions=["r"], dates=np.arange(4) + np.datetime64("2031-03-10"))
    assert ev.prepare[0, 0].tolist() == [False, False, False, True]  # two days at most 14
    sentence = explain(ev, 0, 3).sentence
    assert sentence.endswith(
        "Prepare: ICU share projected to reach 85% in 9 (6–14) days if the trend continues.")


def test_summary_lists_the_scenarios() -> None:
    from rules import summary

    text = summary(parse_ruleset(RULES.replace("SCENARIO", "trend")))
    assert "Scenario levels-off (if it levels off within 7 days): growth rate 0/day within 7 " \
           "days" in text
    assert "Scenario halves (if admissions halve within 14 days): admissions x0.5 within 14 " \
           "days" in text
