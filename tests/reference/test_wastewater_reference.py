"""Wastewater smoothing and trend against statsmodels (reference implementations)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from statsmodels.nonparametric.smoothers_lowess import lowess

from server.indicators.wastewater import level, smooth, trend


def _samples(plants: int, days: int, per_plant: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    y = np.full((plants, days), np.nan)
    for p in range(plants):
        idx = np.sort(rng.choice(days, per_plant, replace=False))
        y[p, idx] = np.sin(idx / 15.0 + p) + rng.normal(0.0, 0.25, idx.size)
    return y


@pytest.mark.parametrize("frac", [0.1, 0.25, 0.6], ids=["frac0.1", "frac0.25", "frac0.6"])
def test_smooth_matches_statsmodels_lowess_on_every_day(frac: float) -> None:
    # statsmodels.nonparametric.lowess, degree 1, it=0, delta=0 (Cleveland 1979 LOWESS)
    y = _samples(4, 150, 45, seed=20)
    res = smooth(y, frac=frac)
    for p in range(4):
        idx = np.flatnonzero(np.isfinite(y[p]))
        grid = np.arange(idx[0], idx[-1] + 1, dtype=float)
        ref = lowess(y[p, idx], idx.astype(float), frac=frac, it=0, delta=0.0, xvals=grid)
        assert_allclose(res.estimate[p, idx[0] : idx[-1] + 1], ref, rtol=1e-9, atol=1e-12)


def test_smooth_matches_statsmodels_lowess_at_sample_points() -> None:
    # statsmodels.nonparametric.lowess fitted values at the data points
    y = _samples(3, 90, 30, seed=21)
    res = smooth(y, frac=0.3)
    for p in range(3):
        idx = np.flatnonzero(np.isfinite(y[p]))
        ref = lowess(y[p, idx], idx.astype(float), frac=0.3, it=0, delta=0.0, return_sorted=False)
        assert_allclose(res.estimate[p, idx], ref, rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("day", [20, 47, 89], ids=["day20", "day47", "day89"])
def test_trend_matches_statsmodels_ols(day: int) -> None:
    # statsmodels OLS slope and conf_int(alpha=0.05) on the samples of days (day-14 .. day)
    y = _samples(3, 90, 40, seed=22)
    res = trend(y, window=15, level=0.95)
    for p in range(3):
        idx = np.flatnonzero(np.isfinite(y[p, day - 14 : day + 1])) + day - 14
        fit = sm.OLS(y[p, idx], sm.add_constant(idx.astype(float))).fit()
        lo, hi = fit.conf_int(alpha=0.05)[1]
        assert_allclose(res.slope[p, day], fit.params[1], rtol=1e-9)
        assert_allclose([res.slope_lower[p, day], res.slope_upper[p, day]], [lo, hi], rtol=1e-9)
        assert_allclose(res.estimate[p, day], 100 * np.expm1(fit.params[1]), rtol=1e-9)


def test_level_matches_numpy_quantile_and_sd_over_trailing_year() -> None:
    # baseline = 10th percentile of log values over the last 12 months, sd of the same
    # (REFERENCES.md, Wastewater, "widely used level method"); numpy.quantile / numpy.std
    y = _samples(2, 500, 200, seed=23)
    current = np.full_like(y, 1.25)
    res = level(y, current=current, baseline_days=365, quantile=0.1)
    for p in range(2):
        block = y[p, 500 - 365 :]
        vals = block[np.isfinite(block)]
        base = np.quantile(vals, 0.1)
        sd = np.std(vals, ddof=1)
        assert_allclose(res.baseline[p, -1], base, rtol=1e-12)
        assert_allclose(res.sd[p, -1], sd, rtol=1e-12)
        assert_allclose(res.estimate[p, -1], (1.25 - base) / sd, rtol=1e-12)


def test_level_matches_numpy_quantile_on_every_day() -> None:
    # numpy.quantile (linear method, Hyndman & Fan 1996 definition 7) and numpy.std(ddof=1) of the
    # samples in each trailing 60-day period, day by day
    y = _samples(3, 200, 90, seed=24)
    res = level(y, baseline_days=60, quantile=0.25, min_samples=5)
    for p in range(3):
        for day in range(200):
            block = y[p, max(0, day - 59) : day + 1]
            vals = block[np.isfinite(block)]
            if vals.size < 5:
                assert np.isnan(res.baseline[p, day])
                continue
            assert_allclose(res.baseline[p, day], np.quantile(vals, 0.25), rtol=1e-12)
            assert_allclose(res.sd[p, day], np.std(vals, ddof=1), rtol=1e-10)


def test_level_constant_baseline_has_zero_sd_and_no_level() -> None:
    # a flat baseline has sd exactly 0, so no level is defined (division by zero avoided)
    y = np.full((1, 30), 2.5)
    res = level(y, baseline_days=10, min_samples=3)
    assert_allclose(res.sd[0, 5:], 0.0, atol=0)
    assert np.isnan(res.estimate).all()
