"""Forecast scoring against outside references: scoringrules (0.10.0), scipy's Poisson
distribution, and the relation of the WIS to the CRPS (Bracher et al. 2021, PLoS Comput Biol
17:e1008618).

The coverage checks are the plumbing check of the record: forecasts whose truth is known (the
simulator's Poisson rates) must cover at the rate the Poisson distribution says.
"""

from __future__ import annotations

import numpy as np
import scoringrules as sr
from numpy.testing import assert_allclose
from scipy import stats

from server.indicators.accuracy import weighted_interval_score
from server.indicators.forecast_scores import (
    forecast_record,
    last_week_mean,
    poisson_persistence,
    score_forecasts,
)
from server.indicators.quantile_forecast import DEFAULT_LEVELS

LEVELS = np.array(DEFAULT_LEVELS)
HORIZONS = np.arange(1, 22)


def test_score_forecasts_wis_equals_scoringrules_quantile_scores() -> None:
    # WIS = 2 / (2K + 1) * sum of the 2K + 1 quantile scores (Bracher et al. 2021, with
    # w_k = alpha_k / 2); quantile scores from scoringrules.quantile_score. Random forecasts
    # (shape (N, H, L)) not tuned to anything, outcomes inside and outside the intervals.
    rng = np.random.default_rng(13)
    levels = np.array([0.025, 0.1, 0.25, 0.5, 0.75, 0.9, 0.975])
    n, h = 300, 4
    centre = rng.uniform(1, 300, (n, h))
    spread = np.sort(rng.gamma(2.0, 0.3, (n, h, 3)), axis=2)[..., ::-1]
    values = np.concatenate(
        [centre[..., None] * np.exp(-spread), centre[..., None],
         centre[..., None] * np.exp(spread[..., ::-1])], axis=2)
    y = rng.poisson(centre * np.exp(rng.normal(0, 0.4, (n, h)))).astype(float)
    s = score_forecasts(values, levels, y, np.full(n, 50.0))
    pinball = sum(sr.quantile_score(y, values[..., k], tau, backend="numpy")
                  for k, tau in enumerate(levels))
    assert_allclose(s.wis, 2 * pinball / levels.size, rtol=1e-10)
    assert_allclose(s.naive_error, np.abs(y - 50.0))
    assert_allclose(s.inside_50, (values[..., 2] <= y) & (y <= values[..., 4]))
    assert not s.has_90 and not s.inside_90.any()  # no 5 % and 95 % levels here


def test_wis_tends_to_crps_of_normal_forecast_as_intervals_grow() -> None:
    # Bracher et al. (2021), section on the WIS and the CRPS [from memory]: with equally spaced
    # alpha_k the WIS approximates the CRPS, closer as K grows. Reference CRPS of N(0, 1):
    # scoringrules.crps_normal (closed form, Gneiting & Raftery 2007). The quadrature error of
    # the quantile-score representation falls like 1/K, measured 0.044 at K = 11, 0.0050 at
    # K = 99 and 0.0010 at K = 499 (max over y in [-3, 3]).
    y = np.linspace(-3, 3, 13)
    crps = sr.crps_normal(y, 0.0, 1.0, backend="numpy")
    errors = []
    for k in (11, 99, 499):
        alphas = np.arange(1, k + 1) / (k + 1)
        lower = np.broadcast_to(stats.norm.ppf(alphas / 2), (y.size, k))
        wis = weighted_interval_score(y, np.zeros_like(y), lower, -lower, alphas).wis
        errors.append(np.max(np.abs(wis / crps - 1)))
    assert errors[1] < 0.01
    assert errors[2] < errors[1] / 4 < errors[0] / 16


def _stationary(seed: int, regions: int, days: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    rate = rng.uniform(2.0, 60.0, regions)
    return rate, rng.poisson(rate[:, None], (regions, days)).astype(float)


def _replay(y: np.ndarray, forecast, first: int = 13):  # type: ignore[no-untyped-def]
    regions, days = y.shape
    vals, obs, base, order = [], [], [], []
    for o in range(first, days - HORIZONS[-1]):
        vals.append(forecast(y[:, : o + 1]))
        obs.append(y[:, o + HORIZONS])
        base.append(last_week_mean(y[:, : o + 1]))
        order.append(np.full(regions, o))
    s = score_forecasts(np.concatenate(vals), LEVELS, np.concatenate(obs), np.concatenate(base))
    groups = np.tile(np.arange(regions), len(vals))
    return s, groups, np.concatenate(order)


def test_coverage_of_true_poisson_quantiles_equals_scipy_probability() -> None:
    # Forecasts from the simulator's true rates: each interval [q_a, q_1-a] holds the outcome
    # with probability F(q_1-a) - F(q_a - 1) under scipy.stats.poisson; the record's coverage
    # must equal the average of those within binomial noise (4 standard errors).
    rate, y = _stationary(21, 150, 100)
    q = stats.poisson.ppf(LEVELS[None, :], rate[:, None])
    s, groups, order = _replay(y, lambda h: np.repeat(q[:, None, :], HORIZONS.size, axis=1))
    rec = forecast_record(s, groups=groups, n_groups=rate.size, order=order, horizons=HORIZONS)
    for (lo, hi), got in (((1, 3), rec.inside_50), ((0, 4), rec.inside_90)):
        p = stats.poisson.cdf(q[:, hi], rate) - stats.poisson.cdf(q[:, lo] - 1, rate)
        n = rec.forecasts.sum()
        expected = float((p[:, None] * rec.forecasts).sum() / n)
        se = np.sqrt(expected * (1 - expected) / n)
        assert abs(got.sum() / n - expected) < 4 * se


def test_persistence_covers_about_nominal_on_stationary_counts() -> None:
    # The plug-in Poisson persistence forecast on stationary Poisson counts (rates 2-60 a day):
    # measured 53.7 % (50 % interval) and 89.8 % (90 % interval) over 200 regions x the newest
    # 60 origins x 21 horizons (seed 5); the true-rate forecast would cover 56.5 % and 92.0 %
    # (scipy, integer bounds included), the 7-day estimate of the rate takes a little off.
    # Bounds: nominal +- 5 points (common practice, no source).
    rate, y = _stationary(5, 200, 120)
    s, groups, order = _replay(y, lambda h: poisson_persistence(h, horizons=HORIZONS,
                                                                levels=LEVELS))
    rec = forecast_record(s, groups=groups, n_groups=rate.size, order=order, horizons=HORIZONS,
                          last=60)
    assert np.all(rec.forecasts == 60)
    cov50 = rec.inside_50.sum() / rec.forecasts.sum()
    cov90 = rec.inside_90.sum() / rec.forecasts.sum()
    assert 0.45 < cov50 < 0.60 and 0.85 < cov90 < 0.95
    # the median is the rounded baseline, so the WIS is well under the baseline's error
    assert np.nanmean(rec.relative_wis) < 1.0
