"""The policy option ``testing_hold``: case-based escalations wait after a testing change.

Hand-built arrays: a case criterion that rises with a testing change, an admissions criterion
that does (or does not) agree, and the testing-change indicator (days since the change). The
rule itself is the project's own (issue 15); the expected tiers follow from it by hand.
"""

from __future__ import annotations

import numpy as np
import pytest

from rules import IndicatorSeries, RulesetError, evaluate, parse_ruleset
from rules.record import read_explanation

POLICY = """\
name: hold-check
version: "1"
tiers:
  - {name: Calm, staff: s, public: p}
  - {name: Busy, staff: s, public: p}
  - {name: Hectic, staff: s, public: p}
indicators:
  cases: {label: cases, unit: per 100 000, decimals: 0}
  admissions: {label: admissions, decimals: 1}
  testing: {label: testing change, unit: days, decimals: 0}
criteria:
  - {id: cases, indicator: cases, enter: [50, 100], exit: [40, 80]}
  - {id: admissions, indicator: admissions, enter: [5, 10], exit: [4, 8]}
timing: {confirm_days: 2, release_days: 2}
"""
HOLD = """\
testing_hold:
  indicator: testing
  days: 5
  criteria: [cases]
  unless: [admissions]
"""
DAYS = 12
CHANGE = 3  # the testing change's first day; known from day 4 (since 1)


def _series(cases: list[float], admissions: list[float], *, known_from: int = 4
            ) -> dict[str, IndicatorSeries]:
    since = np.arange(DAYS, dtype=float) - CHANGE
    since[:known_from] = np.nan  # not yet known before its detection day
    size = np.where(np.isnan(since), np.nan, 1.6)
    return {
        "cases": IndicatorSeries(estimate=np.array([cases], dtype=float)),
        "admissions": IndicatorSeries(estimate=np.array([admissions], dtype=float)),
        "testing": IndicatorSeries(estimate=since[None, :], size=size[None, :],
                                   lower=size[None, :] * 0.9, upper=size[None, :] * 1.1),
    }


def _run(text: str, series: dict[str, IndicatorSeries]):  # type: ignore[no-untyped-def]
    dates = np.datetime64("2031-03-01") + np.arange(DAYS)
    return evaluate(parse_ruleset(text), series, regions=["R1"], dates=dates)


RISE = [30, 30, 30, 30, 60, 60, 60, 60, 60, 60, 60, 60]  # cases over 50 from day 4


def test_without_the_option_cases_alone_raise() -> None:
    ev = _run(POLICY, _series(RISE, [2] * DAYS))
    assert ev.decided[0].tolist() == [0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1]
    assert not ev.testing_held.any()


def test_case_rise_is_held_for_the_days_after_the_change() -> None:
    ev = _run(POLICY + HOLD, _series(RISE, [2] * DAYS))
    # held while since < 5 (days 4..7); the candidate counts again from day 8: raised on day 9
    assert ev.decided[0].tolist() == [0, 0, 0, 0, 0, 0, 0, 0, 0, 1, 1, 1]
    assert ev.testing_held[0].tolist() == [False] * 4 + [True] * 4 + [False] * 4


def test_an_agreeing_independent_criterion_lets_the_rise_through() -> None:
    adm = [2, 2, 2, 2, 6, 6, 6, 6, 6, 6, 6, 6]  # admissions over 5 from day 4 as well
    ev = _run(POLICY + HOLD, _series(RISE, adm))
    assert ev.decided[0].tolist() == [0, 0, 0, 0, 0, 1, 1, 1, 1, 1, 1, 1]
    assert not ev.testing_held.any()


def test_the_hold_caps_at_the_tier_the_independent_criterion_reaches() -> None:
    cases = [30, 30, 30, 30, 120, 120, 120, 120, 120, 120, 120, 120]  # cases call for Hectic
    adm = [2, 2, 2, 2, 6, 6, 6, 6, 6, 6, 6, 6]  # admissions agree on a rise (to Busy)
    ev = _run(POLICY + HOLD, _series(cases, adm))
    # admissions are above the tier held (0): the case criterion is not capped and the rise
    # goes to Hectic, as without the option (agreement lets the escalation through whole)
    free = _run(POLICY, _series(cases, adm))
    assert ev.decided[0].tolist() == free.decided[0].tolist()


def test_a_change_not_yet_known_holds_nothing() -> None:
    # known only from day 9 (too late): the rise on day 5 goes through as without the option
    ev = _run(POLICY + HOLD, _series(RISE, [2] * DAYS, known_from=9))
    assert ev.decided[0, 5] == 1


def test_falls_are_never_held() -> None:
    fall = [120] * 2 + [10] * 10
    ev = _run(POLICY + HOLD, _series(fall, [2] * DAYS))
    free = _run(POLICY, _series(fall, [2] * DAYS))
    assert ev.decided[0].tolist() == free.decided[0].tolist()


def test_explanation_names_the_hold_and_the_change() -> None:
    ev = _run(POLICY + HOLD, _series(RISE, [2] * DAYS))
    sentence = ev.explain(0, 5).sentence
    assert sentence.startswith("Held at Calm (0): held back by testing change (cases 60 per "
                               "100 000 over the enter threshold 50")
    assert sentence.endswith("Testing: tests rose 60% from 2031-03-04: part of the rise in cases "
                             "reflects more testing.")
    data = ev.explain(0, 5).data
    assert data["action"] == "held"
    assert data["testing_change"] == {
        "date": "2031-03-04", "days_since": 2, "tests_ratio": 1.6,
        "tests_ratio_lower": pytest.approx(1.44), "tests_ratio_upper": pytest.approx(1.76),
        "held": True}
    # after the hold's days the change is no longer named
    assert "Testing:" not in ev.explain(0, 9).sentence
    record = read_explanation({"sentence": sentence, "data": data})
    assert record.testing_change is not None and record.testing_change.held
    assert str(record.testing_change.date) == "2031-03-04"


def test_a_narrower_testing_sentence() -> None:
    series = _series([30] * DAYS, [2] * DAYS)
    t = series["testing"]
    series["testing"] = IndicatorSeries(estimate=t.estimate, size=np.full((1, DAYS), 0.7))
    ev = _run(POLICY + HOLD, series)
    assert ev.explain(0, 6).sentence.endswith(
        "Testing: tests fell 30% from 2031-03-04: part of the fall in cases reflects less "
        "testing.")


def test_older_stored_explanations_read_without_a_testing_change() -> None:
    stored = {"sentence": "Stays at Calm (0).", "data": {"date": "2031-03-01", "tier": 0}}
    assert read_explanation(stored).testing_change is None


@pytest.mark.parametrize(("hold", "where", "message"), [
    ("testing_hold:\n  indicator: nope\n  days: 5\n  criteria: [cases]\n",
     "testing_hold.indicator", "'nope' is not a declared indicator"),
    ("testing_hold:\n  indicator: testing\n  days: 5\n  criteria: [cases, deaths]\n",
     "testing_hold.criteria[1]", "'deaths' is not a criterion"),
    ("testing_hold:\n  indicator: testing\n  days: 0\n  criteria: [cases]\n",
     "testing_hold.days", ">= 1"),
    ("testing_hold:\n  indicator: testing\n  days: 5\n  criteria: [cases]\n  unless: [cases]\n",
     "testing_hold.unless[0]", "also a held criterion"),
    ("testing_hold:\n  indicator: testing\n  criteria: [cases]\n",
     "testing_hold", "days"),
    ("testing_hold:\n  indicator: testing\n  days: 5\n  criteria: [cases]\n  wait: 3\n",
     "testing_hold", "wait"),
])
def test_loader_names_line_and_key(hold: str, where: str, message: str) -> None:
    with pytest.raises(RulesetError) as info:
        parse_ruleset(POLICY + hold, source="hold.yaml")
    text = str(info.value)
    assert text.startswith("hold.yaml:")
    line = int(text.split(":")[1])
    assert line > POLICY.count("\n")  # at the option, not at the top of the file
    assert where in text and message in text


def test_summary_states_the_hold() -> None:
    from rules import summary

    text = summary(parse_ruleset(POLICY + HOLD))
    assert ("Testing hold: cases cannot raise the tier for 5 day(s) after a testing change "
            "(testing) unless admissions agree") in text
    assert "Testing hold" not in summary(parse_ruleset(POLICY))
