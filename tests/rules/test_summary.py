"""The text summary of a ruleset (rules/summary.py), as ``tierwise rules check`` prints it."""

from __future__ import annotations

import re

from rules import parse_ruleset
from rules.summary import summary

RULES = """\
name: summary
version: "3"
description: An invented policy.
tiers:
  - {name: Calm, staff: s0, public: p}
  - {name: Busy, staff: s1, public: p}
  - {name: Hectic, staff: s2, public: p}
indicators:
  incidence: {label: incidence}
  beds_free: {label: free beds}
  tests: {label: tests}
  trend: {label: trend}
criteria:
  - {id: inc, indicator: incidence, enter: [50, 150], exit: [40, 120], enter_strict: true,
     min_count: 20, use_nowcast: false}
  - {id: beds, indicator: beds_free, direction: falling, enter: [null, 10], exit: [null, 10]}
conditions:
  - when: {criterion: beds, level_at_least: 2}
    then: {criterion: inc, enter: [30, 100], exit: [20, 80]}
combination: {method: at_least, m: 2}
gates:
  - {id: testing, indicator: tests, at_least: 150}
timing: {confirm_days: 3, release_days: 14, min_days_in_tier: 21, max_steps_down: 1,
         effective_delay_days: 2}
overrides:
  - id: small
    match: {levels: [small], regions: [R9]}
    criteria:
      inc: {enter: [80, 200], exit: [60, 150]}
prepare:
  - {id: rise, indicator: trend, statistic: lower, above: 0, for: 4, count_by: samples,
     clear_after_days: 10}
"""


def _text() -> str:
    return summary(parse_ruleset(RULES, source="summary.yaml"))


def test_summary_heading_names_version_hash_and_source() -> None:
    rs = parse_ruleset(RULES, source="summary.yaml")
    first = summary(rs).splitlines()[0]
    assert first == f"Ruleset summary version 3 (sha256 {rs.sha256[:12]}, summary.yaml)"


def test_summary_threshold_cells_say_operator_and_release() -> None:
    text = _text()
    # strict enter (> 50); exit strict follows enter: held while > 40, released at <= 40
    assert re.search(r"inc\s+incidence\s+estimate\s+>50 \(exit <=40\)\s+>150 \(exit <=120\)", text)
    # falling, unreachable tier 1, exit equal to enter: no bracket
    assert re.search(r"beds\s+beds_free\s+estimate\s+-\s+<=10\n", text)


def test_summary_lists_condition_and_override_rows() -> None:
    text = _text()
    assert re.search(r"inc if beds>=2\s+incidence\s+estimate\s+>=30 \(exit <20\)", text)
    assert re.search(r"inc \[small\]\s+incidence\s+estimate\s+>=80 \(exit <60\)", text)
    assert "Override small: level small, R9 (inc)" in text


def test_summary_lists_rules_beside_the_table() -> None:
    text = _text()
    assert "  inc: inactive below count 20\n  inc: nowcast days ignored" in text
    assert "Combination: at least 2 criteria" in text
    assert (
        "Timing: up after 3 day(s), down after 14 day(s), at least 21 day(s) in tier, "
        "at most 1 step(s) down, effective after 2 day(s)"
    ) in text
    assert "Gate testing: tests at_least 150; otherwise insufficient data" in text
    assert "Prepare rise: trend lower above 0 for 4 samples, clears after 10 quiet days" in text


def test_summary_score_lists_cutoffs_and_any_steps() -> None:
    text = RULES.replace(
        "combination: {method: at_least, m: 2}",
        "combination: {method: score, weights: {inc: 1, beds: 2}, cutoffs: [1, 2.5]}",
    ).replace(" max_steps_down: 1,", "")
    out = summary(parse_ruleset(text))
    assert "Combination: weighted score with cut-offs 1, 2.5" in out
    assert "at most any step(s) down" in out
