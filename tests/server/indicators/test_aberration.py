"""Unit tests for server.indicators.aberration (shapes, missing data, guards, validation)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from server.indicators.aberration import ears, farrington_flexible


def test_ears_vectorised_regions_match_single_region() -> None:
    rng = np.random.default_rng(1)
    y = rng.poisson(8.0, size=(3, 40)).astype(float)
    both = ears(y, method="C2")
    alone = ears(y[1], method="C2")
    assert_allclose(both.statistic[1], alone.statistic[0])
    assert both.statistic.shape == (3, 40)


def test_ears_first_days_without_baseline_are_nan_and_quiet() -> None:
    result = ears(np.arange(20.0), method="C1")
    assert np.isnan(result.statistic[0, :7]).all()
    assert not result.alarm[0, :7].any()
    assert np.isfinite(result.statistic[0, 7])


def test_ears_flat_baseline_uses_sd_floor() -> None:
    y = [2.0] * 7 + [3.0]
    result = ears(y, method="C1", sd_floor=0.5)
    # sd of a flat baseline is 0; floored at 0.5 (common practice, no source): C1 = 1 / 0.5
    assert_allclose(result.statistic[0, 7], 2.0)
    assert_allclose(result.upper[0, 7], 2.0 + 3.0 * 0.5)


def test_ears_missing_day_gets_no_alarm_but_keeps_baseline() -> None:
    y = np.array([4.0, 6.0, 5.0, 7.0, 3.0, 5.0, 5.0, np.nan])
    result = ears(y, method="C1")
    assert not result.alarm[0, 7]
    assert_allclose(result.expected[0, 7], 5.0)


def test_ears_missing_baseline_day_is_skipped() -> None:
    y = np.array([4.0, 6.0, np.nan, 7.0, 3.0, 5.0, 5.0, 9.0])
    result = ears(y, method="C1", min_baseline=6)
    assert_allclose(result.expected[0, 7], np.mean([4.0, 6.0, 7.0, 3.0, 5.0, 5.0]))
    assert np.isnan(ears(y, method="C1").expected[0, 7])  # default needs all 7 days


def test_ears_alarm_is_strictly_above_threshold() -> None:
    y = [4.0, 6.0, 5.0, 7.0, 3.0, 5.0, 5.0, 5.0 + 3.0 * np.sqrt(10.0 / 6.0)]
    result = ears(y, method="C1")
    assert_allclose(result.statistic[0, 7], 3.0)
    assert not result.alarm[0, 7]


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"method": "C4"}, "method"),
        ({"sd_floor": 0.0}, "sd_floor"),
        ({"min_baseline": 9}, "min_baseline"),
        ({"threshold": float("nan")}, "threshold"),
        ({"definition": "who"}, "definition"),
        ({"definition": "surveillance", "sd_floor": -1.0}, "sd_floor"),
    ],
    ids=["method", "sd-floor", "min-baseline", "threshold", "definition", "negative-floor"],
)
def test_ears_rejects_bad_arguments(kwargs: dict, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        ears(np.ones(20), **kwargs)


@pytest.mark.parametrize("method", ["C1", "C2"])
def test_ears_definitions_agree_given_the_same_threshold_and_floor_for_c1_c2(method: str) -> None:
    y = np.random.default_rng(3).poisson(12.0, size=(3, 60)).astype(float)
    y[:, 30] += 25.0
    cdc = ears(y, method=method, threshold=2.5, sd_floor=0.2)
    surv = ears(y, method=method, threshold=2.5, sd_floor=0.2, definition="surveillance")
    assert cdc.alarm.any()
    assert_array_equal(surv.alarm, cdc.alarm)
    assert_allclose(surv.upper, cdc.upper)


def test_farrington_short_history_is_nan() -> None:
    y = np.random.default_rng(2).poisson(10.0, size=(2, 52 * 2 + 3)).astype(float)
    result = farrington_flexible(y)
    assert np.isnan(result.expected).all()
    assert not result.alarm.any()


def test_farrington_first_assessed_week_after_two_years() -> None:
    y = np.random.default_rng(3).poisson(10.0, size=(1, 52 * 2 + 6)).astype(float)
    result = farrington_flexible(y)
    assert np.isnan(result.expected[0, : 52 * 2 + 3]).all()
    assert np.isfinite(result.expected[0, 52 * 2 + 3 :]).all()


def test_farrington_needs_five_cases_in_four_weeks() -> None:
    y = np.zeros((1, 52 * 3))
    y[0, 10] = 1.0
    y[0, -1] = 4.0  # far above a near-zero baseline, but only 4 cases in 4 weeks
    result = farrington_flexible(y)
    assert result.upper[0, -1] < 4.0
    assert not result.alarm[0, -1]


def test_farrington_missing_target_week_never_alarms() -> None:
    y = np.random.default_rng(4).poisson(10.0, size=(1, 52 * 3)).astype(float)
    y[0, -1] = np.nan
    result = farrington_flexible(y)
    assert not result.alarm[0, -1]
    assert np.isfinite(result.expected[0, -1])


def test_farrington_regions_fitted_independently() -> None:
    rng = np.random.default_rng(5)
    y = np.vstack([rng.poisson(10.0, 52 * 3), rng.poisson(40.0, 52 * 3)]).astype(float)
    both = farrington_flexible(y)
    alone = farrington_flexible(y[1:])
    assert_allclose(both.expected[1], alone.expected[0], rtol=1e-9)
    assert_array_equal(both.alarm[1], alone.alarm[0])


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"quantile": 1.0}, "quantile"),
        ({"window": -1}, "window"),
        ({"n_periods": 60}, "n_periods"),
        ({"min_years": 6}, "min_years"),
        ({"past_weeks_excluded": 50}, "past_weeks_excluded"),
    ],
    ids=["quantile", "window", "periods", "min-years", "excluded"],
)
def test_farrington_rejects_bad_arguments(kwargs: dict, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        farrington_flexible(np.ones((1, 200)), **kwargs)
