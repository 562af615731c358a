"""Cross-references of a whole ruleset (rules/ruleset.py), refused at the offending YAML node."""

from __future__ import annotations

import hashlib
from dataclasses import replace

import pytest

from rules import INSUFFICIENT_DATA, RulesetError, parse_ruleset
from rules.errors import FieldError
from rules.model import CriterionPatch, Override, Thresholds
from tests.rules.conftest import THREE_TIERS

BASE = 'name: cross\nversion: "1"\n' + THREE_TIERS + """\
indicators:
  incidence: {label: incidence}
  tests: {label: tests}
  trend: {label: trend}
  unused: {label: unused}
criteria:
  - {id: inc, indicator: incidence, enter: [50, 150], exit: [40, 120]}
  - {id: pos, indicator: tests, enter: [5, 10], exit: [3, 7]}
"""


@pytest.mark.parametrize(
    ("extra", "match"),
    [
        pytest.param("gates:\n  - {id: g, indicator: nope, at_least: 1}\n",
                     r"gates\[0\]\.indicator: 'nope' is not a declared indicator", id="gate"),
        pytest.param("gates:\n  - {id: g, known: [inc, zz]}\n",
                     r"gates\[0\]\.known\[1\]: 'zz' is not a criterion", id="gate-known"),
        pytest.param("combination: {method: at_least, m: 3}\n",
                     r"combination\.m: 3 is more than the 2 criteria", id="m"),
        pytest.param("combination: {method: score, weights: {inc: 1}, cutoffs: [1]}\n",
                     r"combination\.cutoffs: has 1 cut-offs, expected 2", id="cutoffs"),
        pytest.param("combination: {method: score, weights: {zz: 1}, cutoffs: [1, 2]}\n",
                     r"combination\.weights\.zz: 'zz' is not a criterion", id="weights"),
        pytest.param(
            "conditions:\n  - when: {criterion: inc, level_at_least: 3}\n"
            "    then: {criterion: pos, enter: [4, 8], exit: [2, 6]}\n",
            r"conditions\[0\]\.when\.level_at_least: 3 is above the top tier 2", id="level"),
        pytest.param(
            "conditions:\n  - when: {criterion: inc, level_at_least: 1}\n"
            "    then: {criterion: pos, enter: [4, 8], exit: [2, 6]}\n"
            "  - when: {criterion: pos, level_at_least: 1}\n"
            "    then: {criterion: inc, enter: [40, 140], exit: [30, 110]}\n",
            r"conditions\[0\]\.when\.criterion: 'inc' is itself changed by a condition",
            id="chain"),
        pytest.param(
            "conditions:\n  - when: {criterion: inc, level_at_least: 1}\n"
            "    then: {criterion: pos, enter: [4], exit: [2]}\n",
            r"conditions\[0\]\.then\.enter: has 1 thresholds, expected 2", id="patch-length"),
        pytest.param("prepare:\n  - {id: s, indicator: trend, above: 0, below_tier: 3}\n",
                     r"prepare\[0\]\.below_tier: 3 is above the top tier 2", id="below-tier"),
        pytest.param(
            "prepare:\n  - {id: s, indicator: trend, above: 0}\n"
            "  - {id: s, indicator: trend, below: 0}\n",
            r"prepare\[1\]\.id: id 's' is used twice", id="signal-twice"),
    ],
)
def test_ruleset_refuses_broken_cross_references(extra: str, match: str) -> None:
    with pytest.raises(RulesetError, match=r"^cross\.yaml:\d+:\d+: " + match):
        parse_ruleset(BASE + extra, source="cross.yaml")


def test_ruleset_refuses_a_patch_of_the_other_direction() -> None:
    # YAML patches inherit the direction; only objects built in Python can differ
    falling = Thresholds(direction="falling", enter=(4, 2), exit=(5, 3),
                         enter_strict=(False, False), exit_strict=(False, False))
    patch = CriterionPatch(criterion="pos", thresholds=falling)
    with pytest.raises(FieldError, match="direction differs from criterion 'pos'") as info:
        replace(parse_ruleset(BASE), overrides=(Override(id="o", levels=("s",), patches=(patch,)),))
    assert info.value.field == ("overrides", 0, "criteria", "pos")


def test_ruleset_refuses_a_threshold_list_of_the_wrong_length() -> None:
    text = BASE.replace("enter: [5, 10], exit: [3, 7]", "enter: [5], exit: [3]")
    with pytest.raises(RulesetError, match=r"criteria\[1\]\.enter: has 1 thresholds, expected 2"):
        parse_ruleset(text)


def test_ruleset_lookups_and_identity() -> None:
    text = BASE + "gates:\n  - {id: g, indicator: tests, at_least: 1}\n"
    rs = parse_ruleset(text)
    assert rs.sha256 == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert (rs.n_tiers, rs.top_tier) == (3, 2)
    assert (rs.tier_name(2), rs.tier_name(INSUFFICIENT_DATA)) == ("Hectic", "insufficient data")
    assert rs.used_indicators() == ("incidence", "tests")  # declaration order; unused left out
    assert rs.criterion("pos").indicator == "tests"
    with pytest.raises(KeyError):
        rs.indicator("zz")
