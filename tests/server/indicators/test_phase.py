"""Tests of server.indicators.phase: the batched wave fit and the phase of each wave.

References used below:
- Richards FJ (1959), J Exp Bot 10:290: the curve K (1 + v e^{-a v (t - t0)})^{-1/v} turns at
  C = K (1 + v)^{-1/v}; the logistic (v = 1) at K / 2 (REFERENCES.md, [seen]).
- scipy.optimize.minimize (L-BFGS-B) on the same Poisson negative log-likelihood, region by region,
  from starting values of its own: an independent optimiser as the reference of the batched one.
- Simulated waves: Poisson counts around a known logistic or Richards curve; the fit must recover
  the simulator's parameters and its intervals must cover them at about the nominal rate.
- Growth rate of weekly counts, r = log(N0 / N1) / 7 (the exponential growth rate between
  consecutive weeks), and Var(log N) ~ 1 / N for a Poisson count by the delta method
  (e.g. Casella & Berger 2002, Statistical Inference, section 5.5.4 [from memory]).
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.optimize import minimize

from server.indicators.curves import richards_cumulative
from server.indicators.phase import (
    DECLINING,
    GROWING,
    PAST_TURNING_POINT,
    SLOWING,
    _mean_and_jac,
    classify,
    fit_phase,
    wave_start,
)


def _means(days: int, k: float, a: float, t0: float, v: float = 1.0) -> np.ndarray:
    t = np.arange(days, dtype=float)
    return richards_cumulative(t, k, a, t0, v) - richards_cumulative(t - 1, k, a, t0, v)


def _simulate(reps: int, days: int, k: float, a: float, t0: float, v: float, seed: int
              ) -> np.ndarray:
    mu = _means(days, k, a, t0, v)
    return np.random.default_rng(seed).poisson(np.broadcast_to(mu, (reps, days))).astype(float)


def _covers(iv, truth: float) -> float:  # type: ignore[no-untyped-def]
    return float(np.mean((iv.lower <= truth) & (truth <= iv.upper)))


def test_jacobian_matches_central_differences() -> None:
    # Reference: central finite differences of the expected counts (numerical derivative).
    theta = np.array([[np.log(5000), np.log(0.2), 40.0, np.log(1.7)],
                      [np.log(300), np.log(0.1), 10.0, np.log(0.4)]])
    t = np.arange(60.0)
    _, jac = _mean_and_jac(theta, t)
    assert jac is not None
    for k in range(4):
        step = np.zeros(4)
        step[k] = 1e-6
        up, _ = _mean_and_jac(theta + step, t, jac=False)
        down, _ = _mean_and_jac(theta - step, t, jac=False)
        assert_allclose(jac[..., k], (up - down) / 2e-6, rtol=1e-5, atol=1e-6)


def test_logistic_after_turning_point_recovers_parameters_and_covers() -> None:
    # Simulator truth: K = 5000, a = 0.2, t0 = 40, observed to day 59 (past the turn).
    y = _simulate(300, 60, 5000, 0.2, 40, 1.0, seed=11)
    fit = fit_phase(y, model="logistic", start=np.zeros(300, dtype=int))
    assert fit.converged.all()
    assert abs(np.median(fit.final_size.estimate) / 5000 - 1) < 0.01
    assert abs(np.median(fit.turning_day.estimate) - 40) < 0.2
    assert abs(np.median(fit.rate.estimate) / 0.2 - 1) < 0.02
    for iv, truth in ((fit.final_size, 5000), (fit.turning_day, 40), (fit.rate, 0.2)):
        assert 0.90 <= _covers(iv, truth) <= 0.99
    # Share reached at day 59: 1 / (1 + exp(-0.2 * 19)) (logistic, Richards 1959 with v = 1).
    share = 1 / (1 + np.exp(-0.2 * 19))
    assert 0.90 <= _covers(fit.share_reached, share) <= 0.995
    assert not fit.final_size_is_lower_bound.any()
    assert_allclose(fit.share_at_turning_point, 0.5)


def test_richards_after_turning_point_recovers_parameters_and_covers() -> None:
    # Simulator truth: K = 8000, a = 0.15, t0 = 45, v = 2.5, observed to day 79.
    y = _simulate(300, 80, 8000, 0.15, 45, 2.5, seed=12)
    fit = fit_phase(y, model="richards", start=np.zeros(300, dtype=int))
    assert fit.converged.all() and (fit.model == 1).all()
    assert abs(np.median(fit.final_size.estimate) / 8000 - 1) < 0.01
    assert abs(np.median(fit.turning_day.estimate) - 45) < 0.3
    assert abs(np.median(fit.shape.estimate) / 2.5 - 1) < 0.1
    for iv, truth in ((fit.final_size, 8000), (fit.turning_day, 45), (fit.shape, 2.5)):
        assert 0.90 <= _covers(iv, truth) <= 0.99
    # Share at the turning point (1 + v)^(-1/v) (Richards 1959): 3.5^(-0.4) = 0.6057 at v = 2.5.
    assert abs(np.median(fit.share_at_turning_point) - 3.5 ** -0.4) < 0.02


def test_aic_keeps_the_logistic_for_logistic_waves_and_richards_for_skewed_ones() -> None:
    logistic = fit_phase(_simulate(100, 70, 6000, 0.2, 40, 1.0, seed=13))
    skewed = fit_phase(_simulate(100, 80, 8000, 0.15, 45, 4.0, seed=14))
    # AIC (Akaike 1974) with 2 parameters' worth of deviance: a wrong pick about 16 % of the
    # time for nested models differing by one parameter (chi-square(1) > 2: 0.157).
    assert logistic.model.mean() < 0.3
    assert skewed.model.mean() > 0.9


def test_before_turning_point_final_size_is_a_lower_bound() -> None:
    # The held-out case of issue 13: 25 days of a logistic wave that turns at day 40, K = 5000.
    y = _simulate(200, 25, 5000, 0.2, 40, 1.0, seed=15)
    fit = fit_phase(y, model="logistic", start=np.zeros(200, dtype=int))
    assert fit.final_size_is_lower_bound.mean() > 0.95
    fitted = np.isfinite(fit.final_size.estimate)
    assert np.median(fit.final_size.estimate[fitted]) < 5000  # such fits underestimate it
    known = np.isfinite(fit.phase)
    assert np.isin(fit.phase[known], (GROWING, SLOWING)).mean() > 0.9


def test_phase_across_a_wave_follows_the_stated_rules() -> None:
    mu = _means(100, 20000, 0.2, 50, 1.0)
    y = np.random.default_rng(16).poisson(mu).astype(float)
    ends = (30, 46, 56, 80)  # growing; just before the turn; just after; well after
    rows = np.full((4, 100), np.nan)
    for i, end in enumerate(ends):
        rows[i, : end + 1] = y[: end + 1]
    fit = fit_phase(rows, model="logistic", start=np.zeros(4, dtype=int))
    assert fit.phase[0] == GROWING
    assert fit.phase[1] in (GROWING, SLOWING)
    assert fit.phase[2] in (PAST_TURNING_POINT, DECLINING)
    assert fit.phase[3] == DECLINING
    assert list(fit.last_day) == list(ends)


def test_weekly_growth_diagnostics_match_a_hand_worked_case() -> None:
    # Weeks of 100, 200 and 300 cases (oldest first), spread evenly over each week's days.
    y = np.repeat([100 / 7, 200 / 7, 300 / 7], 7)[None, :]
    fit = fit_phase(y, min_days=5, start=np.zeros(1, dtype=int))
    # Hand-worked: r = ln(300 / 200) / 7 = 0.0579236; dr = ln(300 * 100 / 200^2) / 7 = -0.0410974.
    assert_allclose(fit.growth_rate.estimate, np.log(1.5) / 7, rtol=1e-12)
    assert_allclose(fit.growth_change.estimate, np.log(0.75) / 7, rtol=1e-12)
    phi = fit.weekly_dispersion[0]  # fewer than p + 3 weeks: the daily counts' dispersion
    assert phi == fit.dispersion[0]
    se_r = np.sqrt(phi * (1 / 300 + 1 / 200)) / 7
    se_dr = np.sqrt(phi * (1 / 300 + 4 / 200 + 1 / 100)) / 7
    assert_allclose(fit.growth_rate.upper - fit.growth_rate.estimate, 1.959964 * se_r, rtol=1e-5)
    assert_allclose(fit.growth_change.upper - fit.growth_change.estimate, 1.959964 * se_dr,
                    rtol=1e-5)


def test_weekday_pattern_inflates_the_daily_dispersion_but_not_the_weekly_one() -> None:
    # Weekly sums carry no weekday pattern: the weekly diagnostics keep Poisson-sized intervals.
    mu = _means(84, 3000, 0.15, 45)
    pattern = np.array([1.5, 1.3, 1.0, 1.0, 0.9, 0.7, 0.6])
    pattern = np.tile(pattern / pattern.mean(), 12)
    y = np.random.default_rng(21).poisson(np.broadcast_to(mu * pattern, (50, 84))).astype(float)
    fit = fit_phase(y, model="logistic", start=np.zeros(50, dtype=int))
    # (measured 4.2 and 1.5; within-week trend x pattern leaves some weekly excess)
    assert np.median(fit.dispersion) > 3
    assert np.median(fit.weekly_dispersion) < 0.5 * np.median(fit.dispersion)


def test_share_reached_on_an_exact_logistic() -> None:
    # Expected counts, no noise: the fit recovers the curve, so C(T)/K at T = t0 + ln 3 / a is
    # 1 / (1 + e^{-ln 3}) = 0.75 (logistic, Richards 1959 with v = 1; hand-worked).
    a, t0 = np.log(3) / 5, 40.0  # T = t0 + 5 = t0 + ln 3 / a exactly
    days = 46
    mu = _means(days, 5000, a, t0)
    fit = fit_phase(mu[None, :], model="logistic", start=np.zeros(1, dtype=int))
    t_last = days - 1
    assert_allclose(fit.share_reached.estimate, 1 / (1 + np.exp(-a * (t_last - t0))), rtol=1e-4)
    assert_allclose(fit.share_reached.estimate, 0.75, atol=0.01)
    assert_allclose(fit.turning_day.estimate, t0, atol=1e-3)


def test_classify_table() -> None:
    # The phase rules stated in the module docstring (ours, common practice, no source).
    turned = np.array([False, False, True, True, False, True])
    growth_upper = np.array([0.1, 0.1, 0.1, -0.01, np.nan, np.nan])
    change_upper = np.array([0.05, -0.02, -0.02, -0.02, np.nan, np.nan])
    assert list(classify(turned, growth_upper, change_upper)) == [
        GROWING, SLOWING, PAST_TURNING_POINT, DECLINING, GROWING, PAST_TURNING_POINT]


def _scipy_fit(y: np.ndarray, richards: bool) -> tuple[float, np.ndarray]:
    """Per-region reference: L-BFGS-B on the Poisson NLL from a grid of its own starts."""
    t = np.arange(y.size, dtype=float)

    def nll(p: np.ndarray) -> float:
        v = np.exp(p[3]) if richards else 1.0
        mu = richards_cumulative(t, np.exp(p[0]), np.exp(p[1]), p[2], v) - richards_cumulative(
            t - 1, np.exp(p[0]), np.exp(p[1]), p[2], v)
        mu = np.maximum(mu, 1e-10)
        return float(np.sum(mu - y * np.log(mu)))

    best = None
    total = y.sum()
    bounds = [(np.log(0.5 * total), np.log(1e4 * total)), (np.log(1e-3), np.log(3.0)),
              (-2 * y.size, 6 * y.size), (np.log(0.05), np.log(20.0))]
    for mult in (1.2, 2.0, 4.0):
        for a in (0.08, 0.25):
            for t0 in (0.6 * y.size, 1.2 * y.size):
                for lv in ((np.log(0.5), np.log(2.0)) if richards else (0.0,)):
                    x0 = [np.log(mult * total), np.log(a), t0, lv][: 4 if richards else 3]
                    r = minimize(nll, x0, method="L-BFGS-B", bounds=bounds[: len(x0)])
                    if best is None or r.fun < best.fun:
                        best = r
    assert best is not None
    return -best.fun, best.x


@pytest.mark.slow
@pytest.mark.parametrize("richards", [False, True])
def test_batched_fit_matches_scipy_minimize_on_random_waves(richards: bool) -> None:
    rng = np.random.default_rng(2718 + richards)  # cases drawn here, not tuned to
    rows = []
    for _ in range(5):
        k, a, t0 = rng.uniform(500, 20000), rng.uniform(0.08, 0.35), rng.uniform(15, 45)
        v = rng.choice([0.5, 1.5, 3.0]) if richards else 1.0
        days = int(t0 + rng.uniform(10, 30))
        rows.append(rng.poisson(_means(days, k, a, t0, v)).astype(float))
    y = np.full((len(rows), max(r.size for r in rows)), np.nan)
    for i, r in enumerate(rows):
        y[i, : r.size] = r
    fit = fit_phase(y, model="richards" if richards else "logistic",
                    start=np.zeros(len(rows), dtype=int))
    for i, r in enumerate(rows):
        ll_ref, x_ref = _scipy_fit(r, richards)
        # measured: log-likelihoods within 1e-7, final sizes within 1e-5, turning days 2e-4
        assert fit.loglik[i] >= ll_ref - 1e-4
        assert abs(fit.loglik[i] - ll_ref) < 1e-3
        assert_allclose(fit.final_size.estimate[i], np.exp(x_ref[0]), rtol=1e-3)
        assert_allclose(fit.turning_day.estimate[i], x_ref[2], atol=0.01)


def test_wave_start_finds_the_trough_before_the_current_wave() -> None:
    t = np.arange(140)
    first = _means(140, 6000, 0.2, 30)
    second = _means(140, 9000, 0.18, 110)
    y = np.random.default_rng(17).poisson(first + second + 1.0).astype(float)
    true_trough = int(np.argmin((first + second)[30:110])) + 30
    start = wave_start(y[None, :])[0]
    assert abs(start - true_trough) <= 7
    # Up to day 60 only the first wave is seen: it started at the beginning of the window.
    assert wave_start(y[None, :60])[0] <= 5
    assert t[-1] == 139


def test_wave_start_skips_a_small_earlier_bump_lower_window_start() -> None:
    # The window opens lower (1/day) than the trough (4/day) after a small bump (8/day) that
    # precedes the big wave: the big wave starts at the trough, not at the window's first day.
    bump = _means(150, 400, 0.25, 20)
    big = _means(150, 15000, 0.12, 110)
    base = np.r_[np.full(8, 1.0), np.full(142, 3.5)]
    mean = bump + big + base
    y = np.random.default_rng(22).poisson(np.broadcast_to(mean, (20, 150))).astype(float)
    trough = int(np.argmin(mean[25:100])) + 25
    start = wave_start(y)
    assert (np.abs(start - trough) <= 14).all() and np.median(start) > 30


def test_wave_start_ignores_noise_at_small_counts() -> None:
    # A wave that ended, then a tail of 0-2 cases a day: no new wave (rise of 3 a day needed).
    y = np.concatenate([np.random.default_rng(18).poisson(_means(60, 3000, 0.25, 25)),
                        np.random.default_rng(19).poisson(0.4, 40)]).astype(float)
    assert wave_start(y[None, :])[0] <= 5


def test_rows_with_too_few_cases_are_not_fitted() -> None:
    y = np.vstack([np.zeros(30), np.r_[np.full(25, np.nan), np.ones(5)]])
    fit = fit_phase(y)
    assert np.isnan(fit.phase).all() and not fit.converged.any()


@pytest.mark.parametrize(("kwargs", "message"), [
    ({"model": "gompertz"}, "model"),
    ({"start": [0, 99]}, "start"),
    ({"level": 1.5}, "level"),
])
def test_bad_arguments_are_refused(kwargs: dict, message: str) -> None:  # type: ignore[type-arg]
    with pytest.raises(ValueError, match=message):
        fit_phase(np.ones((2, 30)), **kwargs)
