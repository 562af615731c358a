"""The pure tier transition (rules/hysteresis.py), worked day by day.

Semantics (DESIGN.md, "Tier semantics"): the tier rises when the candidate has been higher for the
confirmation period; it falls when the candidate has been lower for the release period, the minimum
time in tier has passed, and by at most the allowed steps; an unknown criterion never lowers and
never raises. Days are indexed from 0; "day k" below is index k.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules.hysteresis import TierState, candidate_bounds, step_tiers
from rules.model import Combination, Timing

UNKNOWN = None  # a day on which the only criterion is unknown (low 0, high = its top)


def _walk(
    candidates: list[int | None],
    timing: Timing,
    *,
    start: int = 0,
    top: int = 3,
    ok: list[bool] | None = None,
    since: int = 10**6,
) -> tuple[list[int], list[int]]:
    """Step one region through ``candidates``; returns (tier, since) after each day.

    A known day has ``low = high = candidate``; an unknown day ``low = 0, high = top``.
    """
    state = TierState.initial(1, start, since=since)
    tiers, sinces = [], []
    for d, c in enumerate(candidates):
        low, high = (0, top) if c is None else (c, c)
        gate = True if ok is None else ok[d]
        state, _cand = step_tiers(
            state,
            np.array([low], dtype=np.int32),
            np.array([high], dtype=np.int32),
            np.array([gate]),
            timing,
        )
        tiers.append(int(state.tier[0]))
        sinces.append(int(state.since[0]))
    return tiers, sinces


# --- rise after the confirmation period ---------------------------------------------------------


def test_step_tiers_rise_on_the_last_day_of_the_confirmation_period() -> None:
    tiers, _ = _walk([0, 1, 1, 1, 1], Timing(confirm_days=3))
    assert tiers == [0, 0, 0, 1, 1]  # higher on days 1, 2, 3: rises on day 3


def test_step_tiers_rise_needs_consecutive_days() -> None:
    tiers, _ = _walk([1, 1, 0, 1, 1, 1], Timing(confirm_days=3))
    assert tiers == [0, 0, 0, 0, 0, 1]  # the day at 0 restarts the count


def test_step_tiers_rise_goes_to_the_lowest_candidate_of_the_run() -> None:
    tiers, _ = _walk([3, 2, 3, 3], Timing(confirm_days=3))
    assert tiers == [0, 0, 2, 2]  # sustained only at 2 over days 0..2; then 3 needs 3 days again


def test_step_tiers_change_day_is_day_zero_of_since() -> None:
    _, sinces = _walk([1, 1, 1], Timing(confirm_days=2))
    assert sinces == [10**6 + 1, 0, 1]


# --- fall after the release period and the minimum time in tier ---------------------------------


def test_step_tiers_fall_on_the_last_day_of_the_release_period() -> None:
    tiers, _ = _walk([0, 0, 0, 0], Timing(release_days=3), start=2)
    assert tiers == [2, 2, 0, 0]


def test_step_tiers_fall_waits_for_the_minimum_time_in_tier() -> None:
    # rises on day 0 (since 0); lower from day 1; release 2 is met on day 2, but the tier must be
    # held 4 days: falls on day 4 (since = 4)
    tiers, _ = _walk([1, 0, 0, 0, 0, 0], Timing(release_days=2, min_days_in_tier=4))
    assert tiers == [1, 1, 1, 1, 0, 0]


def test_step_tiers_fall_goes_to_the_highest_candidate_of_the_run() -> None:
    tiers, _ = _walk([0, 2, 1, 1], Timing(release_days=3), start=3)
    assert tiers == [3, 3, 2, 2]  # lower since day 0; the run's highest candidate is 2


def test_step_tiers_fall_at_most_max_steps_down() -> None:
    # from 3 with the candidate at 0: one step per release period (the run restarts after a change)
    tiers, _ = _walk([0] * 6, Timing(release_days=2, max_steps_down=1), start=3)
    assert tiers == [3, 2, 2, 1, 1, 0]


def test_step_tiers_fall_without_a_step_limit_goes_all_the_way() -> None:
    tiers, _ = _walk([0] * 2, Timing(release_days=2), start=3)
    assert tiers == [3, 0]


# --- unknown never lowers, never raises ----------------------------------------------------------


def test_step_tiers_unknown_never_lowers() -> None:
    tiers, _ = _walk([UNKNOWN] * 10, Timing(), start=2)
    assert tiers == [2] * 10


def test_step_tiers_unknown_never_raises() -> None:
    tiers, _ = _walk([UNKNOWN] * 10, Timing(), start=0)
    assert tiers == [0] * 10


def test_step_tiers_unknown_day_ends_the_run() -> None:
    # an unknown day is neither higher nor lower: the confirmation count restarts after it
    tiers, _ = _walk([2, 2, UNKNOWN, 2, 2, 2], Timing(confirm_days=3), start=1)
    assert tiers == [1, 1, 1, 1, 1, 2]


def test_step_tiers_known_criteria_alone_can_raise() -> None:
    # one criterion known at 2, another unknown with top 3: low 2, high 3 -> candidate 2
    state = TierState.initial(1, 1)
    state, cand = step_tiers(
        state, np.array([2], np.int32), np.array([3], np.int32), np.array([True]), Timing()
    )
    assert (int(cand[0]), int(state.tier[0])) == (2, 2)


def test_step_tiers_unknown_criterion_blocks_a_fall() -> None:
    # known criterion at 0, unknown one with top 2: it could still be at 2, so tier 2 stays
    state = TierState.initial(1, 2)
    state, cand = step_tiers(
        state, np.array([0], np.int32), np.array([2], np.int32), np.array([True]), Timing()
    )
    assert (int(cand[0]), int(state.tier[0])) == (2, 2)


# --- failed gates freeze the counters ------------------------------------------------------------


def test_step_tiers_failed_gate_freezes_counters_and_keeps_the_tier() -> None:
    # higher on days 0, 1; gate fails on day 2 (frozen, no change); day 3 is the third count
    tiers, sinces = _walk(
        [1, 1, 1, 1], Timing(confirm_days=3), ok=[True, True, False, True], since=0
    )
    assert tiers == [0, 0, 0, 1]
    assert sinces == [1, 2, 3, 0]  # since still advances on the frozen day


def test_step_tiers_failed_gate_never_changes_the_tier_even_when_due() -> None:
    tiers, _ = _walk([1, 1], Timing(confirm_days=1), ok=[False, False])
    assert tiers == [0, 0]


# --- regions are independent -----------------------------------------------------------------


def test_step_tiers_vectorised_regions_move_independently() -> None:
    timing = Timing(confirm_days=2, release_days=2)
    state = TierState.initial(3, np.array([0, 2, 1], dtype=np.int32))
    cand = np.array([1, 0, 1], dtype=np.int32)
    for _ in range(2):
        state, _c = step_tiers(state, cand, cand, np.ones(3, dtype=bool), timing)
    assert_array_equal(state.tier, [1, 0, 1])


# --- published persistence rules as worked regressions ------------------------------------------


def test_step_tiers_ngo_guide_raise_after_7_lower_after_14() -> None:
    # An NGO's alert-level guide (2020), REFERENCES.md [seen]: "raise when a threshold holds over
    # 7 days, lower only after 14". Threshold met on days 0..6 -> raised on day 6; under it from
    # day 7 -> lowered on day 20 (the 14th day under); a lapse on day 12 restarts the 14 days.
    timing = Timing(confirm_days=7, release_days=14)
    tiers, _ = _walk([1] * 7 + [0] * 14, timing)
    assert tiers.index(1) == 6
    assert tiers[6:20] == [1] * 14 and tiers[20] == 0
    tiers, _ = _walk([1] * 7 + [0] * 5 + [1] + [0] * 14, timing)
    assert tiers[-2:] == [1, 0]  # the 14 days count again from day 13: lowered on day 26
    assert len(tiers) - 1 == 26


def test_step_tiers_california_2020_three_weeks_in_tier() -> None:
    # California tier framework (2020), REFERENCES.md [seen]: at least 3 weeks in a tier; move
    # down only after 2 consecutive weeks meeting the lower tier. Counted here in days (the
    # framework updates weekly): raised on day 0, lower from day 1, 14 days are met on day 14,
    # but 21 days in tier only on day 21.
    timing = Timing(release_days=14, min_days_in_tier=21)
    tiers, _ = _walk([2] + [1] * 25, timing, start=1)
    assert tiers[0] == 2
    assert tiers.index(1, 1) == 21


def test_step_tiers_ifsg_28b_lifts_after_5_days_under_100() -> None:
    # German Infection Protection Act §28b (April 2021), REFERENCES.md [seen]: measures lift
    # after the incidence is under 100 on 5 consecutive working days. The engine counts calendar
    # days; the days here are taken as consecutive working days. Under 100 on days 0..3, 100 on
    # day 4 (not under: the count restarts), under again on days 5..9 -> lifted on day 9.
    incidence = [99, 95, 90, 85, 100, 99, 98, 97, 96, 95]
    candidates = [1 if x >= 100 else 0 for x in incidence]  # the exit level: held while >= 100
    tiers, _ = _walk(candidates, Timing(confirm_days=3, release_days=5), start=1)
    assert tiers == [1] * 9 + [0]


# --- candidate bounds ---------------------------------------------------------------------------


LEVELS = np.array([[2, 0, 1], [1, 3, 1], [0, 1, 1]], dtype=np.int8)  # (criteria, regions)
TOPS = np.array([3, 3, 3], dtype=np.int8)


@pytest.mark.parametrize(
    ("known", "low", "high"),
    [
        pytest.param([[1, 1, 1]] * 3, [2, 3, 1], [2, 3, 1], id="all-known"),
        pytest.param([[1, 1, 1], [1, 1, 1], [0, 0, 0]], [2, 3, 1], [3, 3, 3],
                     id="third-unknown"),
    ],
)
def test_candidate_bounds_highest(known: list[list[int]], low: list[int], high: list[int]) -> None:
    lo, hi = candidate_bounds(
        LEVELS, np.array(known, dtype=bool), TOPS, Combination(), np.zeros(3), np.zeros(0)
    )
    assert_array_equal(lo, low)
    assert_array_equal(hi, high)


def test_candidate_bounds_at_least_m_is_the_mth_largest_level() -> None:
    known = np.ones((3, 3), dtype=bool)
    known[0, 1] = False  # region 1: levels (unknown, 3, 1) -> low (0, 3, 1), high (3, 3, 1)
    lo, hi = candidate_bounds(
        LEVELS, known, TOPS, Combination(method="at_least", m=2), np.zeros(3), np.zeros(0)
    )
    # region 0: levels 2, 1, 0 -> 2nd largest 1; region 2: 1, 1, 1 -> 1
    assert_array_equal(lo, [1, 1, 1])
    assert_array_equal(hi, [1, 3, 1])


def test_candidate_bounds_score_counts_cutoffs_met() -> None:
    comb = Combination(method="score", weights={"a": 1.0, "b": 0.5, "c": 1.0}, cutoffs=(1.0, 3.0))
    weights = np.array([1.0, 0.5, 1.0])
    known = np.ones((3, 3), dtype=bool)
    known[2, 0] = False
    lo, hi = candidate_bounds(LEVELS, known, TOPS, comb, weights, np.array(comb.cutoffs))
    # region 0: 2 + 0.5 + 0 = 2.5 -> 1 cut-off (unknown c at top 3: 5.5 -> 2);
    # region 1: 0 + 1.5 + 1 = 2.5 -> 1; region 2: 1 + 0.5 + 1 = 2.5 -> 1
    assert_array_equal(lo, [1, 1, 1])
    assert_array_equal(hi, [2, 1, 1])


def test_tier_state_initial_is_long_enough_in_tier() -> None:
    state = TierState.initial(2, 1)
    assert_array_equal(state.tier, [1, 1])
    assert int(state.since.min()) >= 10**6
    assert not state.up.any() and not state.down.any()
