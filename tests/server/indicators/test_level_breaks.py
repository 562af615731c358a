"""Kinks in log concentrations (Gaussian errors): the fit against statsmodels OLS, recovery of
known kinks on simulated plant series, interval coverage, argument errors."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators._segmentation import line_design
from server.indicators.level_breaks import detect_level_breaks, fit_level_kinks

SAMPLE_DAYS = (0, 2, 4)  # three samples a week, as a plant on fixed weekdays


def _plant(seed: int, n: int = 200, kink: int = 100, r0: float = 0.03, r1: float = -0.03,
           sd: float = 0.45) -> np.ndarray:
    """Log-linear concentration with one kink, log-normal noise, sampled 3 days a week."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    eta = np.log(5e4) + r0 * t + (r1 - r0) * np.maximum(t - kink, 0)
    y = np.exp(eta + rng.normal(0.0, sd, n))
    sampled = np.isin(t % 7, SAMPLE_DAYS) & (rng.random(n) > 0.05)
    return np.where(sampled, y, np.nan)


@pytest.mark.parametrize("seed", [3, 17, 29], ids=["s3", "s17", "s29"])
def test_fit_level_kinks_equals_statsmodels_ols(seed: int) -> None:
    # reference: statsmodels OLS (Seabold & Perktold 2010) on the same design matrix over the
    # sampled days: coefficients, standard errors and residual variance to 1e-6
    y = _plant(seed)
    kinks = np.array([[60, 130]])
    fit = fit_level_kinks(y, kinks)
    x = line_design(y.size, kinks)[0]
    obs = np.isfinite(y)
    ref = sm.OLS(np.log(y[obs]), x[obs]).fit()
    assert_allclose(fit.coef[0], ref.params, rtol=1e-6, atol=1e-9)
    assert_allclose(np.sqrt(np.diag(fit.covariance[0])), ref.bse, rtol=1e-6)
    assert_allclose(fit.sigma2[0], ref.scale, rtol=1e-6)
    assert fit.df[0] == int(ref.df_resid)


def test_fit_level_kinks_padding_kink_is_a_zero_column() -> None:
    # a -1 kink adds nothing: the same fit as without it (statsmodels on the smaller design)
    y = _plant(5)
    fit = fit_level_kinks(y, np.array([[90, -1]]))
    obs = np.isfinite(y)
    ref = sm.OLS(np.log(y[obs]), line_design(y.size, np.array([[90]]))[0][obs]).fit()
    assert_allclose(fit.coef[0, :3], ref.params, rtol=1e-6)
    assert fit.coef[0, 3] == 0.0


def test_detect_level_breaks_finds_known_kinks_on_held_out_seeds() -> None:
    # 40 simulated plants (seeds 1000-1039, not used while writing the method): one kink of
    # growth 0.03 -> -0.03 per day at day 100 (R about 1.15 -> 0.87), sd 0.45 on the log scale
    y = np.stack([_plant(1000 + s) for s in range(40)])
    res = detect_level_breaks(y)
    near = np.abs(np.where(res.breaks >= 0, res.breaks, 10_000) - 100).min(axis=1) <= 7
    assert near.mean() >= 0.85
    assert (res.n_breaks > 1).mean() <= 0.15  # extra breaks where there is one change
    # 95 % interval of the first segment's growth covers the truth in most plants
    first = (res.growth_lower[:, 0] <= 0.03) & (0.03 <= res.growth_upper[:, 0])
    assert first[near].mean() >= 0.85


def test_detect_level_breaks_quiet_series_has_no_break() -> None:
    # a straight log-linear series: no break in most of 40 plants (false breaks)
    y = np.stack([_plant(2000 + s, r0=0.01, r1=0.01) for s in range(40)])
    res = detect_level_breaks(y)
    assert (res.n_breaks == 0).mean() >= 0.85


def test_detect_level_breaks_min_change_drops_small_kinks() -> None:
    # growth 0.010 -> 0.004: R changes by about 3 % (gamma 4.7/2.9, Wallinga & Lipsitch 2007),
    # below the default 10 %; with min_change 0 the BIC may keep it
    y = np.stack([_plant(3000 + s, r0=0.010, r1=0.004, sd=0.05) for s in range(10)])
    kept = detect_level_breaks(y, min_change=0.0)
    dropped = detect_level_breaks(y)
    assert kept.n_breaks.sum() > 0
    assert dropped.n_breaks.sum() == 0


def test_detect_level_breaks_interval_contains_the_date() -> None:
    res = detect_level_breaks(_plant(7)[None, :])
    assert res.n_breaks[0] >= 1
    k = res.breaks[0, : res.n_breaks[0]]
    assert np.all(res.break_lower[0, : k.size] <= k)
    assert np.all(k <= res.break_upper[0, : k.size])


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"min_segment": 3}, "min_segment"),
    ({"level": 1.5}, "level"),
    ({"min_change": -0.1}, "min_change"),
], ids=["segment", "level", "min-change"])
def test_detect_level_breaks_refuses_bad_arguments(kwargs: dict, match: str) -> None:
    with pytest.raises(ValueError, match=match):
        detect_level_breaks(_plant(1), **kwargs)


def test_fit_level_kinks_refuses_a_kink_outside_the_series() -> None:
    with pytest.raises(ValueError, match="kinks"):
        fit_level_kinks(_plant(1), np.array([[500]]))
