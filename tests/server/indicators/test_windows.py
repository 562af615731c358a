"""Tests for server.indicators.windows (reference: pandas rolling/resample, epiweeks)."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from server.indicators.windows import rolling_mean, rolling_sum, weekly_sum


def _series(seed: int, regions: int = 3, days: int = 40) -> np.ndarray:
    return np.random.default_rng(seed).poisson(20, size=(regions, days)).astype(float)


@pytest.mark.parametrize("window", [7, 14], ids=["7d", "14d"])
def test_rolling_sum_complete_matches_pandas(window: int) -> None:
    x = _series(1)
    # Reference: pandas DataFrame.rolling(window).sum() along days (min_periods = window).
    expected = pd.DataFrame(x.T).rolling(window).sum().to_numpy().T
    assert_allclose(rolling_sum(x, window).values, expected, equal_nan=True)


def test_rolling_sum_missing_day_refused_by_default() -> None:
    x = _series(2)
    x[1, 20] = np.nan
    result = rolling_sum(x, 7)
    assert np.all(np.isnan(result.values[1, 20:27]))
    assert np.isfinite(result.values[1, 27])


def test_rolling_sum_tolerated_missing_day_is_scaled() -> None:
    x = _series(3)
    x[0, 10] = np.nan
    result = rolling_sum(x, 7, max_missing=1)
    # Reference: pandas rolling mean over observed days (min_periods=6) times the window.
    expected = pd.Series(x[0]).rolling(7, min_periods=6).mean().to_numpy() * 7
    assert_allclose(result.values[0], expected, equal_nan=True)


def test_rolling_sum_counts_observed_days() -> None:
    x = _series(4, regions=1)
    x[0, [5, 6]] = np.nan
    result = rolling_sum(x, 7, max_missing=2)
    expected = pd.Series(~np.isnan(x[0])).rolling(7, min_periods=1).sum().to_numpy()
    assert_array_equal(result.observed[0], expected.astype(int))


def test_rolling_mean_matches_pandas_with_missing() -> None:
    x = _series(5)
    x[2, [3, 17]] = np.nan
    result = rolling_mean(x, 14, max_missing=2)
    expected = pd.DataFrame(x.T).rolling(14, min_periods=12).mean().to_numpy().T
    assert_allclose(result.values, expected, equal_nan=True)


def test_rolling_sum_first_days_incomplete_are_nan() -> None:
    result = rolling_sum(_series(6), 7)
    assert np.all(np.isnan(result.values[:, :6]))


def test_rolling_sum_max_missing_too_large_raises() -> None:
    with pytest.raises(ValueError, match="max_missing: must be an integer in \\[0, 6\\]"):
        rolling_sum(_series(7), 7, max_missing=7)


def test_rolling_sum_result_is_read_only() -> None:
    result = rolling_sum(_series(8), 7)
    with pytest.raises(ValueError, match="read-only"):
        result.values[0, 0] = 1.0


@pytest.mark.parametrize(
    ("system", "rule"), [("iso", "W-SUN"), ("cdc", "W-SAT")], ids=["iso", "cdc"]
)
def test_weekly_sum_matches_pandas_resample(system: str, rule: str) -> None:
    start = dt.date(2023, 3, 1)  # a Wednesday: the first and last weeks are partial
    x = _series(9, days=35)
    result = weekly_sum(x, start, system=system, max_missing=6)
    # Reference: pandas resample into weeks ending Sunday (ISO) or Saturday (MMWR), scaled to
    # 7 days by the number of observed days.
    index = pd.date_range(start, periods=35, freq="D")
    frame = pd.DataFrame(x.T, index=index)
    expected = (frame.resample(rule).mean() * 7).to_numpy().T
    assert_allclose(result.values, expected)


@pytest.mark.parametrize("system", ["iso", "cdc"], ids=["iso", "cdc"])
def test_weekly_sum_partial_edge_weeks_refused_by_default(system: str) -> None:
    result = weekly_sum(_series(10, days=35), dt.date(2023, 3, 1), system=system)
    assert np.isnan(result.values[:, 0]).all() and np.isnan(result.values[:, -1]).all()
    assert np.isfinite(result.values[:, 1:-1]).all()


def test_weekly_sum_cdc_labels_follow_mmwr() -> None:
    # MMWR: week 1 of 2021 is 3-9 January 2021 (the first Saturday at least 4 days into January);
    # CDC MMWR week fact sheet. 2021-01-01 is a Friday, in week 53 of 2020.
    result = weekly_sum(np.ones((1, 10)), dt.date(2021, 1, 1), system="cdc")
    assert result.labels[:2] == ("202053", "202101")
    assert result.start_dates[1] == dt.date(2021, 1, 3)


def test_weekly_sum_iso_labels_follow_python_isocalendar() -> None:
    start = dt.date(2020, 12, 20)
    result = weekly_sum(np.ones((1, 30)), start, system="iso")
    # Reference: datetime.date.isocalendar (ISO 8601); weeks start on Monday.
    for label, first in zip(result.labels, result.start_dates, strict=True):
        year, week, weekday = first.isocalendar()
        assert weekday == 1
        assert label == f"{year}W{week:02d}"


def test_weekly_sum_unknown_system_raises() -> None:
    with pytest.raises(ValueError, match="system: must be 'iso' or 'cdc', got 'us'"):
        weekly_sum(np.ones((1, 7)), dt.date(2021, 1, 4), system="us")  # type: ignore[arg-type]
