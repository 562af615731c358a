"""Worked explanation sentences: change days, decisions not yet in force, holding, bands.

The expected sentences follow the forms the rules issue (issue 5) asks for: "Raised from 1 to 2 on
<date>: <criterion> over the enter threshold <t> for 3 of 3 days; <other> under <t>.", "Held at 2:
9 of 14 release days so far", and the hysteresis band of DESIGN.md ("a tier already held is kept
while its exit threshold is still met"). After a user trial found bare tier numbers hard to read,
every tier is named by the ruleset's name with its number ("Raised from Baseline (0) to High (2)",
"the Heightened (1) enter threshold 2"). Each case is worked by hand in its comment.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules import IndicatorSeries, evaluate, parse_ruleset

RULES = """\
name: sentences
version: "1"
tiers:
  - {name: Baseline, staff: s, public: p}
  - {name: Heightened, staff: s, public: p}
  - {name: High, staff: s, public: p}
  - {name: Severe, staff: s, public: p}
indicators:
  incidence_7d: {label: 7-day incidence, unit: per 100 000, decimals: 0}
  ww: {label: wastewater, decimals: 1}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [50, 150, 300], exit: [35, 120, 250]}
  - {id: ww, indicator: ww, enter: [2, 4, 6], exit: [1, 3, 5]}
timing: {confirm_days: 2, release_days: 3, min_days_in_tier: MIN, effective_delay_days: 1}
"""


def _run(inc: list[float], ww: list[float] | None = None, min_days: int = 0):  # type: ignore[no-untyped-def]
    rs = parse_ruleset(RULES.replace("MIN", str(min_days)))
    w = [0.0] * len(inc) if ww is None else ww
    ind = {
        "incidence_7d": IndicatorSeries(estimate=np.array([inc], dtype=float)),
        "ww": IndicatorSeries(estimate=np.array([w], dtype=float)),
    }
    dates = np.arange(len(inc)) + np.datetime64("2031-03-10")
    return evaluate(rs, ind, regions=["r"], dates=dates)


def test_explain_change_day_says_raised_with_the_decision_basis() -> None:
    # 160, 170 over 150 on 2 days: decided on day 2 (03-12), in force from day 3 (03-13)
    ev = _run([10, 160, 170, 170, 170])
    assert_array_equal(ev.tier[0], [0, 0, 0, 2, 2])
    assert ev.explain(0, 3).sentence == (
        "Raised from Baseline (0) to High (2) on 2031-03-13: 7-day incidence 170 per 100 000 over "
        "the enter threshold 150 for 2 of 2 days; wastewater 0.0 under 4 (decided on 2031-03-12)."
    )


def test_explain_decision_day_holds_until_in_force() -> None:
    ev = _run([10, 160, 170, 170, 170])
    assert ev.explain(0, 2).sentence == (
        "Held at Baseline (0): raise to High (2) decided today, in force from 2031-03-13: 7-day "
        "incidence 170 per 100 000 over the enter threshold 150 for 2 of 2 days; wastewater 0.0 "
        "under 4."
    )


def test_explain_day_after_change_stays() -> None:
    ev = _run([10, 160, 170, 170, 170])
    assert ev.explain(0, 4).sentence.startswith(
        "Stays at High (2): 7-day incidence 170 per 100 000 over the enter threshold 150;"
    )


def test_explain_band_says_held_above_the_exit_threshold() -> None:
    # tier 3 from 320 (> 300); 260 is under the enter 300 but over the exit 250: kept at 3
    ev = _run([320, 320, 320, 260])
    assert int(ev.tier[0, 3]) == 3
    assert ev.explain(0, 3).sentence.startswith(
        "Stays at Severe (3): 7-day incidence 260 per 100 000 held above the exit threshold 250;"
    )


def test_explain_band_never_says_over_the_enter_threshold() -> None:
    ev = _run([320, 320, 320, 260])
    assert "over the enter threshold 300" not in ev.explain(0, 3).sentence


def test_explain_release_days_so_far_with_the_criterion_counter() -> None:
    # tier 2 from day 2; 100 < exit 120 from day 3: 2 of 3 release days on day 4
    ev = _run([160, 160, 160, 100, 100, 100, 100])
    assert ev.explain(0, 4).sentence.startswith(
        "Held at High (2): 2 of 3 release days so far (7-day incidence 100 per 100 000 under the "
        "exit threshold 120 for 2 days;"
    )


def test_explain_minimum_days_in_tier_holds_after_release_days() -> None:
    # decided 2 on day 1 (since 0); release met on day 4 (3 of 3) but since = 3 < 5
    ev = _run([160, 160, 100, 100, 100, 100, 100, 100], min_days=5)
    assert ev.explain(0, 4).sentence == (
        "Held at High (2): 3 of 5 minimum days in tier (3 of 3 release days met)."
    )


def test_explain_lowered_names_the_last_released_criterion_first() -> None:
    # ww released a day after incidence: ww's 3 of 3 days decided the fall on day 5; incidence
    # 100 still meets the tier-1 enter threshold 50, so the tier falls to 1
    ev = _run([160, 160, 100, 100, 100, 100, 100, 100], [5, 5, 5, 0.5, 0.5, 0.5, 0.5, 0.5])
    changed = int(np.flatnonzero(np.diff(ev.tier[0]) < 0)[0]) + 1
    assert ev.explain(0, changed).sentence.startswith(
        f"Lowered from High (2) to Heightened (1) on {ev.dates[changed]}: wastewater 0.5 under the "
        "exit threshold 3 for 3 of 3 days; 7-day incidence 100 per 100 000 under the exit "
        "threshold 120 for 4"
    )


@pytest.mark.parametrize(
    ("day", "above", "below"),
    [pytest.param(1, 1, 0, id="first-day-over"), pytest.param(2, 2, 0, id="second-day-over"),
     pytest.param(5, 0, 1, id="first-day-under")],
)
def test_criterion_counters_count_days_relative_to_the_tier_held(
    day: int, above: int, below: int
) -> None:
    # tier held: 0 until decided 2 on day 2 (held from day 3); 100 < 120 on day 5
    ev = _run([10, 160, 170, 170, 170, 100, 100])
    assert (int(ev.above[0, 0, day]), int(ev.below[0, 0, day])) == (above, below)


def test_a_tier_the_policy_leaves_null_is_shown_as_none_but_sentences_use_the_jump() -> None:
    # ww names no tier-1 threshold: it jumps straight to tier 2 at 4 (rules.model.Thresholds.filled)
    rules = RULES.replace("enter: [2, 4, 6], exit: [1, 3, 5]",
                          "enter: [null, 4, 6], exit: [null, 3, 5]")
    rs = parse_ruleset(rules.replace("MIN", "0"))
    ind = {
        "incidence_7d": IndicatorSeries(estimate=np.array([[10.0] * 5])),
        "ww": IndicatorSeries(estimate=np.array([[0.5, 4.5, 4.5, 4.5, 4.5]])),
    }
    ev = evaluate(rs, ind, regions=["r"], dates=np.arange(5) + np.datetime64("2031-03-10"))
    assert_array_equal(ev.tier[0], [0, 0, 0, 2, 2])
    ww = next(c for c in ev.explain(0, 3).data["criteria"] if c["id"] == "ww")
    assert (ww["enter"], ww["exit"]) == ([None, 4.0, 6.0], [None, 3.0, 5.0])
    # before the rise, ww is short of tier 1 by the threshold that actually applies (4)
    assert "wastewater 0.5 under 4" in ev.explain(0, 0).sentence


def test_explain_names_the_threshold_of_another_tier_by_the_tier() -> None:
    # day 1: incidence 160 > 150 (level 2), ww 2.5 > 2 (level 1); tier 0 held, candidate 2 on its
    # 1st of 2 confirmation days. ww's threshold is not that of the candidate tier, so it is named
    ev = _run([10, 160, 160, 160], [0, 2.5, 2.5, 2.5])
    assert ev.explain(0, 1).sentence == (
        "Held at Baseline (0): 1 of 2 confirmation days so far for High (2) (7-day incidence 160 "
        "per 100 000 over the enter threshold 150 for 1 days; wastewater 2.5 over the "
        "Heightened (1) enter threshold 2 for 1 days)."
    )
    assert "tier-" not in ev.explain(0, 1).sentence


def test_explain_names_the_top_tier_a_criterion_can_reach() -> None:
    # ww names tier 1 only (trailing nulls: rules.model.Thresholds); incidence 160 holds tier 2
    rules = RULES.replace("enter: [2, 4, 6], exit: [1, 3, 5]",
                          "enter: [2, null, null], exit: [1, null, null]")
    rs = parse_ruleset(rules.replace("MIN", "0"))
    ind = {
        "incidence_7d": IndicatorSeries(estimate=np.array([[160.0] * 4])),
        "ww": IndicatorSeries(estimate=np.array([[2.5] * 4])),
    }
    ev = evaluate(rs, ind, regions=["r"], dates=np.arange(4) + np.datetime64("2031-03-10"))
    assert_array_equal(ev.tier[0], [0, 0, 2, 2])
    assert ev.explain(0, 3).sentence == (
        "Stays at High (2): 7-day incidence 160 per 100 000 over the enter threshold 150; "
        "wastewater 2.5, at its top tier Heightened (1)."
    )


def test_explain_pending_lowering_names_both_tiers_in_sentence_and_held_by() -> None:
    # 100 < exit 120 from day 3: 3 of 3 release days on day 5, decided 1 that day (100 > 50),
    # in force from day 6 (2031-03-16)
    ev = _run([160, 160, 160, 100, 100, 100, 100, 100])
    assert_array_equal(ev.tier[0], [0, 0, 2, 2, 2, 2, 1, 1])
    e = ev.explain(0, 5)
    assert e.sentence.startswith(
        "Held at High (2): lowering to Heightened (1) decided today, in force from 2031-03-16: "
        "7-day incidence 100 per 100 000 under the exit threshold 120 for 3 of 3 days;"
    )
    assert e.data["held_by"] == ["lowering to Heightened (1) in force from 2031-03-16"]
    assert (e.data["tier"], e.data["tier_name"], e.data["decided"]) == (2, "High", 1)
