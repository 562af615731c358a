"""Tests for server.indicators.growth (references: statsmodels GLM, closed forms)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators.growth import design_matrix, growth_rate, rolling_growth_rate


def _cases(seed: int, regions: int = 5, days: int = 40, r: float = 0.04) -> np.ndarray:
    rng = np.random.default_rng(seed)
    dow = np.array([1.0, 1.2, 1.1, 1.0, 0.9, 0.6, 0.5])
    mean = 60 * np.exp(r * np.arange(days)) * dow[np.arange(days) % 7]
    return rng.poisson(mean, size=(regions, days)).astype(float)


def test_growth_rate_recovers_exact_exponential_with_weekday_effects() -> None:
    t = np.arange(14)
    dow = np.array([1.0, 1.3, 1.2, 1.1, 0.9, 0.5, 0.4])
    y = 80 * np.exp(-0.03 * t) * dow[(t + 3) % 7]  # expected values: the MLE is exact
    result = growth_rate(y)
    assert_allclose(result.estimate, [-0.03], rtol=1e-8)
    assert_allclose(result.pearson_dispersion, [0.0], atol=1e-12)


def test_growth_rate_matches_statsmodels_with_missing_day_dropped() -> None:
    y = _cases(1, regions=1, days=14)
    y[0, 6] = np.nan
    result = growth_rate(y, max_missing=1, clamp_dispersion=False)
    keep = ~np.isnan(y[0])
    # Reference: statsmodels GLM (Poisson family, scale="X2") on the 13 observed days.
    fit = sm.GLM(y[0, keep], design_matrix(14)[keep], family=sm.families.Poisson()).fit(
        scale="X2"
    )
    assert_allclose(result.estimate[0], fit.params[1], rtol=1e-7)
    assert_allclose(result.std_error[0], fit.bse[1], rtol=1e-6)


def test_growth_rate_poisson_dispersion_uses_unit_scale() -> None:
    y = _cases(2, regions=1, days=14)
    result = growth_rate(y, dispersion="poisson")
    # Reference: statsmodels GLM Poisson with its default scale 1.
    fit = sm.GLM(y[0], design_matrix(14), family=sm.families.Poisson()).fit()
    assert_allclose(result.std_error[0], fit.bse[1], rtol=1e-6)
    assert_allclose(result.dispersion[0], 1.0)


def test_growth_rate_underdispersion_is_clamped_at_one() -> None:
    t = np.arange(14)
    y = np.round(200 * np.exp(0.02 * t))  # rounding only: Pearson chi2/(n-p) far below 1
    result = growth_rate(y, day_of_week=False)
    assert result.pearson_dispersion[0] < 1.0
    assert_allclose(result.dispersion[0], 1.0)


def test_growth_rate_weekday_without_cases_is_refused() -> None:
    y = _cases(3, regions=2, days=14)
    y[1, [2, 9]] = 0.0  # the same weekday in both weeks
    result = growth_rate(y)
    assert np.isnan(result.estimate[1]) and not result.converged[1]
    assert np.isfinite(result.estimate[0])


def test_growth_rate_doubling_time_is_ln2_over_r() -> None:
    result = growth_rate(_cases(4, r=0.08), window=14)
    assert_allclose(result.doubling_time, np.log(2) / np.abs(result.estimate))
    # Closed form: bounds are ln 2 / r at the ends of the r interval (all intervals exclude 0).
    assert np.all(result.lower > 0)
    assert_allclose(result.doubling_lower, np.log(2) / result.upper)
    assert_allclose(result.doubling_upper, np.log(2) / result.lower)


def test_growth_rate_interval_containing_zero_has_unbounded_doubling_time() -> None:
    y = np.random.default_rng(5).poisson(6, size=(30, 14)).astype(float)
    y[:, :] = np.maximum(y, 1.0)
    result = growth_rate(y)
    crosses = (result.lower < 0) & (result.upper > 0)
    assert crosses.any()
    assert np.all(np.isinf(result.doubling_upper[crosses]))
    near = np.where(result.estimate > 0, result.upper, -result.lower)
    assert_allclose(result.doubling_lower[crosses], np.log(2) / near[crosses])


def test_growth_rate_too_short_window_raises() -> None:
    with pytest.raises(ValueError, match="window: window must be an integer >= 9, got 7"):
        growth_rate(_cases(6), window=7)


def test_growth_rate_unknown_dispersion_raises() -> None:
    with pytest.raises(ValueError, match="dispersion: must be 'quasipoisson' or 'poisson'"):
        growth_rate(_cases(7), dispersion="negbin")  # type: ignore[arg-type]


def test_rolling_growth_rate_matches_statsmodels_at_every_end_day() -> None:
    y = _cases(8, regions=2, days=20)
    result = rolling_growth_rate(y, clamp_dispersion=False)
    assert np.all(np.isnan(result.estimate[:, :13]))
    x = design_matrix(14)
    for region in range(2):
        for end in range(13, 20):
            # Reference: statsmodels GLM (Poisson, scale="X2") on the trailing 14 days.
            fit = sm.GLM(y[region, end - 13 : end + 1], x, family=sm.families.Poisson()).fit(
                scale="X2"
            )
            assert_allclose(result.estimate[region, end], fit.params[1], rtol=1e-7)
            assert_allclose(result.std_error[region, end], fit.bse[1], rtol=1e-6)


@pytest.mark.parametrize(
    ("window", "day_of_week"),
    [(10, True), (16, True), (21, True), (14, False), (9, False)],
    ids=["w10-uneven-weekdays", "w16-uneven-weekdays", "w21", "w14-no-dow", "w9-no-dow"],
)
def test_rolling_growth_rate_complete_windows_match_statsmodels(
    window: int, day_of_week: bool
) -> None:
    # the complete-window solver (levels of unequal size when window % 7 != 0) against
    # statsmodels GLM (Poisson, scale="X2") on every trailing window
    rng = np.random.default_rng(window + 50 * day_of_week)
    days = window + 12
    trend = np.exp(np.cumsum(rng.normal(0.0, 0.08, (3, days)), axis=1))
    y = rng.poisson(rng.uniform(2.0, 400.0, (3, 1)) * trend).astype(float)
    y[:, ::5] += 1.0  # no weekday level of any window is empty
    result = rolling_growth_rate(y, window, day_of_week=day_of_week, clamp_dispersion=False)
    x = design_matrix(window, day_of_week=day_of_week)
    for region in range(3):
        for end in range(window - 1, days):
            seg = y[region, end - window + 1 : end + 1]
            fit = sm.GLM(seg, x, family=sm.families.Poisson()).fit(scale="X2", tol=1e-13)
            assert result.converged[region, end]
            assert_allclose(result.estimate[region, end], fit.params[1], rtol=1e-8, atol=1e-12)
            assert_allclose(result.std_error[region, end], fit.bse[1], rtol=1e-7)
            assert_allclose(result.pearson_dispersion[region, end], fit.scale, rtol=1e-7)


def test_rolling_growth_rate_equals_growth_rate_on_each_window() -> None:
    # the rolling fit of end day t is the single fit of days t - 13 .. t (definition)
    y = _cases(12, regions=3, days=30, r=-0.03)
    y[1, 17] = np.nan
    rolling = rolling_growth_rate(y, max_missing=1)
    for end in range(13, 30):
        single = growth_rate(y[:, end - 13 : end + 1], max_missing=1)
        assert_allclose(rolling.estimate[:, end], single.estimate, rtol=1e-12, atol=1e-15)
        assert_allclose(rolling.std_error[:, end], single.std_error, rtol=1e-12)


def test_growth_rate_of_identical_weeks_is_zero_with_unbounded_doubling_time() -> None:
    # two identical weeks: the Poisson MLE of r is exactly 0 (the level totals of both weeks
    # agree), the fit is exact (Pearson chi2 = 0) and the doubling time is unbounded
    week = np.array([4.0, 9.0, 7.0, 7.0, 6.0, 2.0, 3.0])
    result = growth_rate(np.tile(week, 2), clamp_dispersion=False)
    assert result.estimate[0] == 0.0
    assert result.pearson_dispersion[0] == 0.0
    assert np.isinf(result.doubling_time[0]) and np.isinf(result.doubling_upper[0])
