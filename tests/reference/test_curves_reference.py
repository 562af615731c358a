"""Reference checks for logistic and Richards growth curves (Richards 1959, J Exp Bot 10:290)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize

from server.indicators.curves import (
    fit_growth_curve,
    richards_cumulative,
    richards_inflection,
    richards_peak_incidence,
)


def _numeric_slope(t: float, k: float, a: float, t0: float, v: float) -> float:
    h = 1e-5
    up = richards_cumulative(t + h, k, a, t0, v)
    down = richards_cumulative(t - h, k, a, t0, v)
    return float((up - down) / (2 * h))


@pytest.mark.parametrize("v", [0.3, 1.0, 2.5], ids=["v0.3", "logistic", "v2.5"])
def test_richards_inflection_value_matches_maximum_slope(v: float) -> None:
    k, a, t0 = 1000.0, 0.2, 30.0
    # the day of steepest growth, found by scipy on a numerical derivative (outside the module)
    best = optimize.minimize_scalar(
        lambda t: -_numeric_slope(t, k, a, t0, v), bounds=(0, 60), method="bounded",
        options={"xatol": 1e-8},
    )
    # Richards (1959): inflection at Y = K (1 + v)^(-1/v)
    assert_allclose(best.x, t0, atol=1e-3)
    assert_allclose(richards_cumulative(t0, k, a, t0, v), k * (1 + v) ** (-1 / v), rtol=1e-12)
    assert_allclose(richards_inflection(k, v), k * (1 + v) ** (-1 / v))


def test_logistic_turns_at_half_final_size() -> None:
    # logistic (v = 1): inflection at K/2 (Verhulst; Richards 1959)
    assert_allclose(richards_cumulative(12.0, 800.0, 0.3, 12.0, 1.0), 400.0)
    assert_allclose(richards_inflection(800.0, 1.0), 400.0)


def test_logistic_peak_incidence_is_a_k_over_four() -> None:
    k, a = 2000.0, 0.25
    # dC/dt at the inflection of the logistic = a K / 4 (Richards 1959)
    assert_allclose(_numeric_slope(40.0, k, a, 40.0, 1.0), a * k / 4, rtol=1e-6)
    assert_allclose(richards_peak_incidence(k, a, 1.0), a * k / 4)


def test_richards_peak_incidence_matches_numeric_derivative() -> None:
    k, a, t0, v = 1500.0, 0.15, 25.0, 0.4
    assert_allclose(richards_peak_incidence(k, a, v), _numeric_slope(t0, k, a, t0, v), rtol=1e-6)


def _simulate(k: float, a: float, t0: float, v: float, days: int, seed: int) -> np.ndarray:
    t = np.arange(days, dtype=float)
    mu = richards_cumulative(t, k, a, t0, v) - richards_cumulative(t - 1, k, a, t0, v)
    return np.random.default_rng(seed).poisson(mu).astype(float)


def test_logistic_fit_recovers_parameters_and_covers_truth() -> None:
    k, a, t0 = 4000.0, 0.18, 30.0
    y = _simulate(k, a, t0, 1.0, 60, seed=11)
    fit = fit_growth_curve(y, model="logistic", n_boot=150, seed=3)
    for interval, truth in ((fit.final_size, k), (fit.rate, a), (fit.turning_day, t0)):
        assert_allclose(interval.estimate[0], truth, rtol=0.05)
        assert interval.lower[0] <= truth <= interval.upper[0]


def test_richards_fit_recovers_parameters_and_covers_truth() -> None:
    k, a, t0, v = 6000.0, 0.15, 35.0, 0.5
    y = _simulate(k, a, t0, v, 75, seed=13)
    fit = fit_growth_curve(y, model="richards", n_boot=150, seed=4)
    # a and v are strongly correlated (Richards 1959), so only loose point checks on them
    for interval, truth, tol in (
        (fit.final_size, k, 0.05), (fit.rate, a, 0.25), (fit.turning_day, t0, 0.05),
        (fit.shape, v, 0.5),
    ):
        assert_allclose(interval.estimate[0], truth, rtol=tol)
        assert interval.lower[0] <= truth <= interval.upper[0]


def test_richards_fit_deviance_not_above_truth() -> None:
    # a maximum-likelihood fit cannot have a larger Poisson deviance than the true parameters
    k, a, t0, v = 6000.0, 0.15, 35.0, 0.5
    y = _simulate(k, a, t0, v, 75, seed=12)
    fit = fit_growth_curve(y, model="richards", n_boot=0)
    t = np.arange(75, dtype=float)
    mu = richards_cumulative(t, k, a, t0, v) - richards_cumulative(t - 1, k, a, t0, v)
    ratio = np.where(y > 0, y / mu, 1.0)
    deviance_truth = 2 * np.sum(np.where(y > 0, y * np.log(ratio), 0.0) - (y - mu))
    assert fit.deviance[0] <= deviance_truth + 1e-6


@pytest.mark.slow
def test_logistic_bootstrap_interval_coverage_near_nominal() -> None:
    k, a, t0 = 3000.0, 0.2, 28.0
    covered = 0
    runs = 20
    for seed in range(runs):
        y = _simulate(k, a, t0, 1.0, 45, seed=100 + seed)
        fit = fit_growth_curve(y, n_boot=100, seed=seed)
        covered += int(fit.final_size.lower[0] <= k <= fit.final_size.upper[0])
    # nominal 95 %; with 20 runs at least 16 covered (binomial 5 % lower tail ~ 17, margin kept)
    assert covered >= 16


def test_batched_logistic_fit_reaches_scipy_minimize_optimum_on_simulated_waves() -> None:
    # The curve fit is batched (all regions at once, server/indicators/_richards.py); its
    # Poisson deviance must reach the minimum scipy.optimize.minimize (Nelder-Mead, then L-BFGS-B
    # polish) finds from the true parameters, region by region. Eight invented single waves,
    # before and after their turning points, not tuned to the fit.
    rng = np.random.default_rng(77)
    rows, days = 8, 55
    truth = np.column_stack([rng.uniform(1500, 9000, rows), rng.uniform(0.12, 0.3, rows),
                             rng.uniform(25, 60, rows)])
    t = np.arange(days, dtype=float)
    mu = (richards_cumulative(t, *truth.T[:, :, None])
          - richards_cumulative(t - 1, *truth.T[:, :, None]))
    y = rng.poisson(mu).astype(float)
    fit = fit_growth_curve(y, n_boot=0)

    def deviance(p: np.ndarray, yy: np.ndarray) -> float:
        m = np.maximum(richards_cumulative(t, np.exp(p[0]), np.exp(p[1]), p[2])
                       - richards_cumulative(t - 1, np.exp(p[0]), np.exp(p[1]), p[2]), 1e-10)
        return float(2 * np.sum(np.where(yy > 0, yy * np.log(np.where(yy > 0, yy, 1) / m), 0)
                                - (yy - m)))

    for r in range(rows):
        x0 = np.array([np.log(truth[r, 0]), np.log(truth[r, 1]), truth[r, 2]])
        nm = optimize.minimize(deviance, x0, args=(y[r],), method="Nelder-Mead",
                               options={"xatol": 1e-8, "fatol": 1e-10, "maxiter": 5000})
        ref = optimize.minimize(deviance, nm.x, args=(y[r],), method="L-BFGS-B")
        assert fit.deviance[r] <= min(ref.fun, nm.fun) + 1e-3
