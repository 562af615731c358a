"""Tests for server.indicators.poisson (references: scipy.stats, statsmodels, pandas)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from server.indicators.poisson import incidence_rate, poisson_interval, rate_ratio


def _counts(seed: int, regions: int = 4, days: int = 30) -> np.ndarray:
    return np.random.default_rng(seed).poisson(12, size=(regions, days)).astype(float)


def test_poisson_interval_zero_count_has_zero_lower_bound() -> None:
    result = poisson_interval([0.0])
    assert result.lower[0] == 0.0
    # Reference: upper = chi2(0.975; 2)/2 (Garwood 1936), from scipy.stats.chi2.
    assert_allclose(result.upper[0], stats.chi2.ppf(0.975, 2) / 2)


def test_poisson_interval_nan_propagates() -> None:
    result = poisson_interval([np.nan, 4.0])
    assert np.isnan(result.lower[0]) and np.isnan(result.upper[0])
    assert np.isfinite(result.upper[1])


def test_poisson_interval_non_integer_raises() -> None:
    with pytest.raises(ValueError, match="counts: counts must be non-negative integers, got 2.5"):
        poisson_interval([1.0, 2.5])


def test_poisson_interval_bad_level_raises() -> None:
    with pytest.raises(ValueError, match="level: confidence level must be between 0 and 1"):
        poisson_interval([1.0], level=1.5)


def test_incidence_rate_estimate_matches_pandas_rolling() -> None:
    x = _counts(1)
    pop = np.array([50_000.0, 120_000.0, 8_000.0, 1_000_000.0])
    result = incidence_rate(x, pop, window=14)
    # Reference: pandas rolling 14-day sum divided by population, times 100 000.
    expected = pd.DataFrame(x.T).rolling(14).sum().to_numpy().T / pop[:, None] * 1e5
    assert_allclose(result.estimate, expected, equal_nan=True)


def test_incidence_rate_bounds_are_scaled_garwood() -> None:
    x = _counts(2)
    pop = np.array([40_000.0, 60_000.0, 70_000.0, 90_000.0])
    result = incidence_rate(x, pop, window=7)
    count = result.count[:, 6:]
    # Reference: Garwood bounds from scipy.stats.chi2.ppf (lower chi2(a/2; 2x)/2, upper
    # chi2(1-a/2; 2x+2)/2), divided by population and times 100 000.
    lower = stats.chi2.ppf(0.025, 2 * count) / 2 / pop[:, None] * 1e5
    upper = stats.chi2.ppf(0.975, 2 * count + 2) / 2 / pop[:, None] * 1e5
    assert_allclose(result.lower[:, 6:], lower, rtol=1e-10)
    assert_allclose(result.upper[:, 6:], upper, rtol=1e-10)


def test_incidence_rate_missing_day_scales_interval_of_observed_count() -> None:
    x = _counts(3, regions=1)
    x[0, 25] = np.nan
    result = incidence_rate(x, 10_000.0, window=7, max_missing=1)
    observed = np.nansum(x[0, 23:30])
    factor = 7 / 6
    # Reference: scipy.stats.chi2 Garwood bound of the observed count, scaled by 7/6 days.
    upper = stats.chi2.ppf(0.975, 2 * observed + 2) / 2 * factor / 10_000 * 1e5
    assert_allclose(result.upper[0, 29], upper, rtol=1e-10)
    assert_allclose(result.estimate[0, 29], observed * factor * 10.0)


def test_incidence_rate_population_mismatch_raises() -> None:
    with pytest.raises(ValueError, match="population: 2 values for 4 regions"):
        incidence_rate(_counts(4), [1000.0, 2000.0])


def test_incidence_rate_negative_count_raises() -> None:
    x = _counts(5)
    x[1, 3] = -1
    with pytest.raises(ValueError, match="counts: negative count -1.0 at index \\(1, 3\\)"):
        incidence_rate(x, 1000.0)


def test_rate_ratio_estimate_is_week_over_week() -> None:
    x = _counts(6)
    result = rate_ratio(x, 7)
    week = pd.DataFrame(x.T).rolling(7).sum().to_numpy().T
    # Reference: pandas rolling sums, current over the one 7 days earlier.
    assert_allclose(result.estimate[:, 13:], week[:, 13:] / week[:, 6:-7])
    assert np.all(np.isnan(result.estimate[:, :13]))


def test_rate_ratio_bounds_match_clopper_pearson_transform() -> None:
    x = _counts(7, regions=1)
    result = rate_ratio(x, 7)
    x1, x2 = result.current[0, -1], result.previous[0, -1]
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="exact") (Clopper-Pearson
    # 1934) on x1 / (x1 + x2), mapped to pi / (1 - pi).
    ci = stats.binomtest(int(x1), int(x1 + x2)).proportion_ci(0.95, method="exact")
    assert_allclose(result.lower[0, -1], ci.low / (1 - ci.low), rtol=1e-9)
    assert_allclose(result.upper[0, -1], ci.high / (1 - ci.high), rtol=1e-9)


def test_rate_ratio_empty_previous_window_gives_infinite_upper() -> None:
    x = np.zeros((1, 14))
    x[0, 10] = 3.0
    result = rate_ratio(x, 7)
    assert np.isinf(result.estimate[0, 13]) and np.isinf(result.upper[0, 13])
    # Reference: Clopper-Pearson lower bound for 3/3 is (alpha/2)^(1/3) (closed form).
    p = 0.025 ** (1 / 3)
    assert_allclose(result.lower[0, 13], p / (1 - p))


def test_rate_ratio_both_windows_empty_is_nan() -> None:
    result = rate_ratio(np.zeros((2, 14)), 7)
    assert np.all(np.isnan(result.estimate))
