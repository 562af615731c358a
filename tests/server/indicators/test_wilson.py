"""Tests for server.indicators.wilson (references: statsmodels, pandas, closed forms)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from statsmodels.stats.proportion import proportion_confint

from server.indicators.wilson import positivity, wilson_interval
from server.indicators.wilson import testing_rate as rate_of_testing  # pytest collects test*


def _tests(seed: int, regions: int = 3, days: int = 21) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    tests = rng.poisson(300, size=(regions, days)).astype(float)
    positives = rng.binomial(tests.astype(int), 0.08).astype(float)
    return positives, tests


def test_wilson_interval_all_successes_upper_is_one() -> None:
    result = wilson_interval([12.0], [12.0])
    assert result.upper[0] == 1.0
    # Reference: closed form of the Wilson lower bound at x = n: n / (n + z^2) (Wilson 1927).
    z = 1.959963984540054
    assert_allclose(result.lower[0], 12 / (12 + z * z))


def test_wilson_interval_zero_trials_is_nan() -> None:
    result = wilson_interval([0.0], [0.0])
    assert np.isnan(result.estimate[0]) and np.isnan(result.lower[0])


def test_wilson_interval_successes_over_trials_raises() -> None:
    with pytest.raises(ValueError, match="successes: 5.0 exceeds trials 4.0 at index \\(1,\\)"):
        wilson_interval([1.0, 5.0], [2.0, 4.0])


def test_positivity_matches_statsmodels_on_window_sums() -> None:
    positives, tests = _tests(1)
    result = positivity(positives, tests, window=7)
    x = pd.DataFrame(positives.T).rolling(7).sum().to_numpy().T[:, 6:]
    n = pd.DataFrame(tests.T).rolling(7).sum().to_numpy().T[:, 6:]
    # Reference: statsmodels proportion_confint(method="wilson") on pandas rolling sums.
    low, upp = proportion_confint(x, n, alpha=0.05, method="wilson")
    assert_allclose(result.estimate[:, 6:], x / n)
    assert_allclose(result.lower[:, 6:], low, rtol=1e-10)
    assert_allclose(result.upper[:, 6:], upp, rtol=1e-10)


def test_positivity_day_missing_in_one_series_is_missing_in_both() -> None:
    positives, tests = _tests(2, regions=1)
    tests[0, 15] = np.nan
    result = positivity(positives, tests, window=7, max_missing=1)
    keep = np.arange(14, 21) != 15
    expected = positives[0, 14:21][keep].sum() / tests[0, 14:21][keep].sum()
    assert_allclose(result.estimate[0, 20], expected)


def test_positivity_positives_over_tests_raises() -> None:
    positives, tests = _tests(3)
    positives[2, 4] = tests[2, 4] + 1
    with pytest.raises(ValueError, match="positives: .* exceeds tests .* at index \\(2, 4\\)"):
        positivity(positives, tests)


def test_testing_rate_matches_pandas_rolling() -> None:
    _, tests = _tests(4)
    pop = np.array([20_000.0, 55_000.0, 300_000.0])
    result = rate_of_testing(tests, pop, window=7)
    expected = pd.DataFrame(tests.T).rolling(7).sum().to_numpy().T / pop[:, None] * 1e5
    assert_allclose(result.estimate, expected, equal_nan=True)


def test_testing_rate_bad_per_raises() -> None:
    _, tests = _tests(5)
    with pytest.raises(ValueError, match="per: must be a positive integer, got 0"):
        rate_of_testing(tests, 1000.0, per=0)
