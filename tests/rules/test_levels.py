"""Per-criterion levels before the day loop (rules/levels.py): thresholds, bands, known/unknown.

Thresholds and values are invented. The enter level is the highest k whose enter thresholds 1..k
are all met; the exit level the same with the exit thresholds; the day loop keeps a held tier
while the exit level reaches it (DESIGN.md, "Tier semantics": the hysteresis band).
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules import EvaluationInputError, IndicatorSeries, parse_ruleset
from rules.levels import (
    REASON_MISSING,
    REASON_NOWCAST,
    REASON_OK,
    REASON_SMALL_COUNT,
    REASON_STALE,
    compute_levels,
    is_stale,
    meets,
)
from tests.rules.conftest import THREE_TIERS

RULES = 'name: levels\nversion: "1"\n' + THREE_TIERS + """\
indicators:
  incidence: {label: incidence, max_age_days: 3}
  beds_free: {label: free beds}
criteria:
  - {id: inc, indicator: incidence, enter: [50, 150], exit: [40, 120], enter_strict: true,
     exit_strict: false}
  - {id: beds, indicator: beds_free, direction: falling, enter: [20, 10], exit: [25, 14]}
"""


def _levels(inc: list[float], beds: list[float], text: str = RULES, **inc_extra: object):  # type: ignore[no-untyped-def]
    rs = parse_ruleset(text)
    series = {
        "incidence": IndicatorSeries(estimate=np.array([inc], dtype=float), **inc_extra),  # type: ignore[arg-type]
        "beds_free": IndicatorSeries(estimate=np.array([beds], dtype=float)),
    }
    return compute_levels(rs, series, ["r"], None)


def test_compute_levels_enter_level_counts_thresholds_met() -> None:
    # enter strictly over 50 / 150: 50 is not over 50; 151 is over both
    lv = _levels([49, 50, 51, 150, 151], [30] * 5)
    assert_array_equal(lv.enter_level[:, 0, 0], [0, 0, 1, 1, 2])


def test_compute_levels_exit_level_is_the_band_floor() -> None:
    # exit at >= 40 / >= 120 (not strict): 120 still holds tier 2, 119 only tier 1
    lv = _levels([39, 40, 119, 120, 130], [30] * 5)
    assert_array_equal(lv.exit_level[:, 0, 0], [0, 1, 1, 2, 2])
    assert_array_equal(lv.enter_level[:, 0, 0], [0, 0, 1, 1, 1])  # 130: inside the band


def test_compute_levels_falling_direction_meets_below() -> None:
    # free beds falling: <= 20 is tier 1, <= 10 tier 2; exits at <= 25 / <= 14
    lv = _levels([0] * 5, [21, 20, 11, 10, 14])
    assert_array_equal(lv.enter_level[:, 1, 0], [0, 1, 1, 2, 1])
    assert_array_equal(lv.exit_level[:, 1, 0], [1, 1, 2, 2, 2])


def test_compute_levels_missing_value_is_unknown() -> None:
    lv = _levels([60, np.nan], [30, 30])
    assert_array_equal(lv.known[:, 0, 0], [True, False])
    assert_array_equal(lv.reason[:, 0, 0], [REASON_OK, REASON_MISSING])


def test_compute_levels_old_data_is_stale() -> None:
    # max_age_days 3: 4 days old is stale, 3 is not
    lv = _levels([60, 60], [30, 30], age_days=np.array([[3.0, 4.0]]))
    assert_array_equal(lv.known[:, 0, 0], [True, False])
    assert_array_equal(lv.reason[:, 0, 0], [REASON_OK, REASON_STALE])


def test_compute_levels_nowcast_days_unknown_unless_used() -> None:
    text = RULES.replace("exit_strict: false}", "exit_strict: false, use_nowcast: false}")
    nowcast = np.array([[False, True]])
    lv = _levels([60, 60], [30, 30], text=text, nowcast=nowcast)
    assert_array_equal(lv.reason[:, 0, 0], [REASON_OK, REASON_NOWCAST])
    used = _levels([60, 60], [30, 30], nowcast=nowcast)
    assert_array_equal(used.known[:, 0, 0], [True, True])


def test_compute_levels_small_count_is_inactive_but_known() -> None:
    text = RULES.replace("exit_strict: false}", "exit_strict: false, min_count: 20}")
    lv = _levels([60, 60, 60], [30] * 3, text=text, count=np.array([[19.0, 20.0, np.nan]]))
    assert_array_equal(lv.inactive[:, 0, 0], [True, False, False])
    assert_array_equal(lv.reason[:, 0, 0], [REASON_SMALL_COUNT, REASON_OK, REASON_MISSING])
    assert_array_equal(lv.known[:, 0, 0], [True, True, False])  # a missing count: unknown


def test_compute_levels_min_count_without_counts_is_named() -> None:
    text = RULES.replace("exit_strict: false}", "exit_strict: false, min_count: 20}")
    with pytest.raises(EvaluationInputError, match=r"indicators\['incidence'\]\.count"):
        _levels([60], [30], text=text)


def test_compute_levels_bounds_enter_on_lower_hold_on_upper() -> None:
    # rising with bounds: enter on the lower bound, hold on the upper bound (DESIGN.md)
    text = RULES.replace("exit_strict: false}", "exit_strict: false, statistic: bounds}")
    lv = _levels(
        [100, 100], [30, 30], text=text,
        lower=np.array([[45.0, 55.0]]), upper=np.array([[125.0, 119.0]]),
    )
    assert_array_equal(lv.enter_level[:, 0, 0], [0, 1])
    assert_array_equal(lv.exit_level[:, 0, 0], [2, 1])


def test_compute_levels_bounds_without_bounds_is_named() -> None:
    text = RULES.replace("exit_strict: false}", "exit_strict: false, statistic: bounds}")
    with pytest.raises(EvaluationInputError, match="uses bounds but lower/upper are missing"):
        _levels([60], [30], text=text)


def test_compute_levels_override_applies_to_matching_regions_only() -> None:
    text = RULES + (
        "overrides:\n"
        "  - id: small\n"
        "    match: {levels: [small]}\n"
        "    criteria:\n"
        "      inc: {enter: [80, 200], exit: [60, 150]}\n"
    )
    rs = parse_ruleset(text)
    series = {
        "incidence": IndicatorSeries(estimate=np.array([[90.0], [90.0]])),
        "beds_free": IndicatorSeries(estimate=np.array([[30.0], [30.0]])),
    }
    lv = compute_levels(rs, series, ["big", "little"], ["district", "small"])
    assert_array_equal(lv.enter_level[0, 0, :], [1, 1])
    assert_array_equal(lv.exit_level[0, 0, :], [1, 1])
    lv = compute_levels(
        rs,
        {
            "incidence": IndicatorSeries(estimate=np.array([[70.0], [70.0]])),
            "beds_free": IndicatorSeries(estimate=np.array([[30.0], [30.0]])),
        },
        ["big", "little"], ["district", "small"],
    )
    assert_array_equal(lv.enter_level[0, 0, :], [1, 0])  # 70 is over 50 but not over 80


def test_compute_levels_leading_null_jumps_to_the_first_named_tier() -> None:
    text = RULES.replace(
        "direction: falling, enter: [20, 10], exit: [25, 14]",
        "enter: [null, 90], exit: [null, 80]",
    )
    lv = _levels([0, 0, 0], [70, 85, 95], text=text)
    assert_array_equal(lv.enter_level[:, 1, 0], [0, 0, 2])  # filled: [90, 90]
    assert_array_equal(lv.exit_level[:, 1, 0], [0, 2, 2])
    assert lv.thresholds[1].first.tolist() == [1]
    assert lv.max_level.tolist() == [2, 2]


def test_meets_strict_and_nan() -> None:
    values = np.array([[9.0, 10.0, 11.0, np.nan]])
    thr = np.array([[10.0], [10.0]])
    strict = np.array([[False], [True]])
    assert_array_equal(
        meets(values, thr, strict, rising=True)[:, 0, :],
        [[False, True, True, False], [False, False, True, False]],
    )
    assert_array_equal(
        meets(values, thr, strict, rising=False)[:, 0, :],
        [[True, True, False, False], [True, False, False, False]],
    )


def test_is_stale_combines_flag_and_age() -> None:
    series = IndicatorSeries(
        estimate=np.ones((1, 3)),
        stale=np.array([[True, False, False]]),
        age_days=np.array([[0.0, 2.0, 5.0]]),
    )
    assert_array_equal(is_stale(series, 3)[0], [True, False, True])
    assert_array_equal(is_stale(series, None)[0], [True, False, False])
    assert not is_stale(IndicatorSeries(estimate=np.ones((1, 2))), 0).any()
