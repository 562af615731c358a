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


# Bracher et al. (2021) illustrate the WIS on a worked example in the paper; its exact numbers
# are not recalled here (from memory: a figure with a few predictive distributions and one
# observation), so they are NOT reproduced. Instead the example below is worked by hand from
# the paper's definitions, equation numbers as recalled [from memory: eq. 1 the interval score,
# eq. 2 the WIS]:
#   IS_alpha(F, y) = (u - l) + 2/alpha (l - y) 1(y < l) + 2/alpha (y - u) 1(y > u)      (eq. 1)
#   WIS(F, y) = 1/(K + 1/2) (w_0 |y - m| + sum_k w_k IS_alpha_k(F, y)),
#               w_0 = 1/2, w_k = alpha_k / 2                                               (eq. 2)
# Forecast: the project's default levels 0.05, 0.25, 0.5, 0.75, 0.95 with quantiles
# 20, 30, 40, 55, 80, so K = 2: alpha = 0.5 on [30, 55] (u - l = 25), alpha = 0.1 on [20, 80]
# (u - l = 60), median m = 40.
HAND_QUANTILES = [20.0, 30.0, 40.0, 55.0, 80.0]
HAND_CASES = [
    # y, IS_0.5, IS_0.1, WIS, inside 50 %, inside 90 %
    # y = 40 (the median): IS_0.5 = 25, IS_0.1 = 60;
    #   WIS = (0.5*0 + 0.25*25 + 0.05*60) / 2.5 = 9.25 / 2.5 = 3.7
    (40.0, 25.0, 60.0, 3.7, True, True),
    # y = 62 (between the 75 % and 95 % quantiles): IS_0.5 = 25 + 4*(62 - 55) = 53, IS_0.1 = 60;
    #   WIS = (0.5*22 + 0.25*53 + 0.05*60) / 2.5 = 27.25 / 2.5 = 10.9
    (62.0, 53.0, 60.0, 10.9, False, True),
    # y = 95 (above all): IS_0.5 = 25 + 4*40 = 185, IS_0.1 = 60 + 20*15 = 360;
    #   WIS = (0.5*55 + 0.25*185 + 0.05*360) / 2.5 = 91.75 / 2.5 = 36.7
    (95.0, 185.0, 360.0, 36.7, False, False),
    # y = 12 (below all): IS_0.5 = 25 + 4*18 = 97, IS_0.1 = 60 + 20*8 = 220;
    #   WIS = (0.5*28 + 0.25*97 + 0.05*220) / 2.5 = 49.25 / 2.5 = 19.7
    (12.0, 97.0, 220.0, 19.7, False, False),
    # y = 30 (on the 25 % quantile, bounds included): IS_0.5 = 25, IS_0.1 = 60;
    #   WIS = (0.5*10 + 0.25*25 + 0.05*60) / 2.5 = 14.25 / 2.5 = 5.7
    (30.0, 25.0, 60.0, 5.7, True, True),
]


def test_score_forecasts_hand_worked_example_from_bracher_equations() -> None:
    y = np.array([[c[0] for c in HAND_CASES]])  # one forecast, horizons = the cases
    values = np.broadcast_to(HAND_QUANTILES, (1, len(HAND_CASES), 5))
    s = score_forecasts(values, LEVELS, y, [41.0])
    assert_allclose(s.wis[0], [c[3] for c in HAND_CASES], rtol=1e-12)
    assert s.inside_50[0].tolist() == [c[4] for c in HAND_CASES]
    assert s.inside_90[0].tolist() == [c[5] for c in HAND_CASES]
    assert_allclose(s.naive_error[0], np.abs(y[0] - 41.0))  # |y - baseline|, the K = 0 WIS
    # the interval scores (eq. 1) behind each case, through the one-interval WIS with the
    # median at y: WIS = (alpha/2) IS_alpha / 1.5
    for alpha, lo, hi, col in ((0.5, 30.0, 55.0, 1), (0.1, 20.0, 80.0, 2)):
        ys = np.array([c[0] for c in HAND_CASES])
        one = weighted_interval_score(ys, ys, np.full((ys.size, 1), lo), np.full((ys.size, 1), hi),
                                      [alpha]).wis
        assert_allclose(one * 1.5 / (alpha / 2), [c[col] for c in HAND_CASES], rtol=1e-12)


def _crps_by_quadrature(y: float, mu: float, sigma: float) -> float:
    # CRPS(F, y) = int (F(x) - 1{x >= y})^2 dx (Gneiting & Raftery 2007, eq. 20), integrated by
    # scipy.integrate.quad on both sides of y.
    from scipy import integrate

    left = integrate.quad(lambda x: stats.norm.cdf(x, mu, sigma) ** 2, -np.inf, y,
                          epsabs=1e-12, epsrel=1e-12)[0]
    right = integrate.quad(lambda x: stats.norm.sf(x, mu, sigma) ** 2, y, np.inf,
                           epsabs=1e-12, epsrel=1e-12)[0]
    return left + right


def test_wis_of_many_levels_tends_to_scipy_integrated_crps() -> None:
    # Bracher et al. (2021), section 2.3 [section number from memory]: with quantile levels
    # equally spaced the WIS approximates the CRPS, the closer the more levels. Reference: the
    # CRPS of N(mu, sigma) integrated by scipy, which itself must match the closed form of
    # Gneiting & Raftery (2007, eq. 5): sigma (z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi)).
    # Forecasts through score_forecasts (the quantile format the record stores); mu = 120,
    # sigma = 15 (invented), outcomes from 75 to 170, not tuned.
    mu, sigma = 120.0, 15.0
    ys = np.array([75.0, 98.0, 113.0, 120.0, 131.5, 150.0, 170.0])
    crps = np.array([_crps_by_quadrature(v, mu, sigma) for v in ys])
    z = (ys - mu) / sigma
    closed = sigma * (z * (2 * stats.norm.cdf(z) - 1) + 2 * stats.norm.pdf(z) - 1 / np.sqrt(np.pi))
    assert_allclose(crps, closed, rtol=1e-8)
    errors = []
    for k in (4, 19, 99, 499):  # K intervals: 2K + 1 levels j / (2K + 2)
        levels = np.arange(1, 2 * k + 2) / (2 * k + 2)
        q = stats.norm.ppf(levels, mu, sigma)
        values = np.broadcast_to(q, (1, ys.size, levels.size))
        s = score_forecasts(values, levels, ys[None, :], [mu])
        errors.append(float(np.max(np.abs(s.wis[0] / crps - 1))))
    # measured 0.107, 0.025, 0.0050, 0.0010 (max over the outcomes): falls about like 1/K
    assert errors[-1] < 0.002
    assert all(b < a / 3 for a, b in zip(errors, errors[1:], strict=False))
