"""Change points against outside references.

- Piecewise fits with given breaks against statsmodels' Poisson GLM on the same design matrix
  (statsmodels 0.14, ``GLM(..., family=Poisson())``; Pearson dispersion as in its
  ``pearson_chi2 / df_resid``).
- Reproduction numbers from segment growth rates against Wallinga & Lipsitch (2007, Proc R Soc B
  274:599, eq. 2.7 for a gamma generation interval, R = (1 + r theta)^k); check values for mean
  4.7, sd 2.9 (shared REFERENCES.md: computed from that formula, not read in the paper).
- Break dates against the exact dynamic-programming segmentation of ``ruptures`` (Truong,
  Oudre & Vayatis 2020, Signal Processing 167:107299) with its linear-regression cost on the
  log counts: a plausibility check of the screening, not an exact reference.
- The continuous (kink) model with given kinks and a level shift against statsmodels' Poisson
  GLM on the same design matrix; its break detection against ``ruptures``' exact segmentation
  with the continuous piecewise-linear cost (``clinear``) on the log counts (plausibility).
- Where a step in R shows as a kink: the asymptotes of the renewal equation
  ``i_t = R_t sum_s w_s i_{t-s}`` (Fraser 2007, PLoS ONE 2:e758; Wallinga & Lipsitch 2007)
  after a step at day d meet at ``d - E[T^2] / (2 E[T])`` to first order in the growth rate
  (derived here: the mean age of the generation interval's forward recurrence, Feller 1971,
  vol. II, XI.4), checked by iterating the renewal equation itself.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators.changepoints import (
    detect_changepoints,
    fit_kinks,
    fit_piecewise,
    kink_design,
)

WEEKDAY = np.array([0.0, 0.12, 0.05, 0.02, -0.08, -0.45, -0.7])


def _series(seed: int, n: int, breaks: list[int], growth: list[float], jump: list[float],
            base: float = 80.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    eta = np.empty(n)
    level = np.log(base)
    edges = [0, *breaks, n]
    for j in range(len(edges) - 1):
        s, e = edges[j], edges[j + 1]
        if j:
            level += jump[j - 1]
        eta[s:e] = level + growth[j] * (t[s:e] - s)
        level = eta[e - 1] + growth[j]
    return rng.poisson(np.exp(eta + WEEKDAY[t % 7])).astype(float)


def _design(n: int, breaks: list[int], observed: np.ndarray) -> np.ndarray:
    edges = [0, *breaks, n]
    segs = len(edges) - 1
    t = np.arange(n)
    x = np.zeros((n, 2 * segs + 6))
    for j in range(segs):
        s, e = edges[j], edges[j + 1]
        inside = (t >= s) & (t < e)
        x[inside, j] = 1.0
        x[inside, segs + j] = t[inside] - 0.5 * (s + e - 1)
    for k in range(1, 7):
        x[:, 2 * segs + k - 1] = t % 7 == k
    return x[observed]


@pytest.mark.parametrize("seed", [3, 4], ids=["seed3", "seed4"])
def test_fit_piecewise_matches_statsmodels_glm(seed: int) -> None:
    n, breaks = 150, [50, 97]
    y = _series(seed, n, breaks, [0.03, -0.04, 0.01], [0.1, -0.2])
    y[[10, 77, 120]] = np.nan  # missing days are left out, never zero
    observed = np.isfinite(y)
    fit = fit_piecewise(y, breaks)
    # statsmodels 0.14 GLM, Poisson family, same design matrix
    ref = sm.GLM(y[observed], _design(n, breaks, observed),
                 family=sm.families.Poisson()).fit(tol=1e-13, maxiter=100)
    ours = np.concatenate([fit.level[0], fit.growth[0], fit.weekday[0, 1:]])
    assert fit.converged[0]
    assert_allclose(ours, ref.params, rtol=0, atol=1e-6)
    assert_allclose(fit.covariance[0], ref.cov_params(), rtol=1e-6, atol=1e-12)
    assert_allclose(fit.mu[0, observed], ref.fittedvalues, rtol=1e-6)
    assert_allclose(fit.loglik[0], ref.llf + np.sum([np.log(np.arange(1, v + 1)).sum()
                                                     for v in y[observed].astype(int)]),
                    rtol=1e-9)
    # quasi-Poisson: Pearson chi-square over residual df, one more df per break date
    phi = ref.pearson_chi2 / (ref.df_resid - len(breaks))
    assert_allclose(fit.dispersion[0], max(phi, 1.0), rtol=1e-6)


def test_detect_changepoints_reproduction_follows_wallinga_lipsitch() -> None:
    y = _series(5, 160, [80], [0.05, -0.03], [-0.1])
    res = detect_changepoints(y, si_mean=4.7, si_sd=2.9)
    shape, scale = (4.7 / 2.9) ** 2, 2.9**2 / 4.7
    r = res.growth[0, : res.n_breaks[0] + 1]
    # Wallinga & Lipsitch 2007 eq. 2.7 with a gamma generation interval
    assert_allclose(res.reproduction[0, : r.size], (1 + r * scale) ** shape, rtol=1e-12)
    # check values (REFERENCES.md, computed from the formula): r = 0.1 -> 1.5409, -0.05 -> 0.7818
    assert_allclose((1 + 0.1 * scale) ** shape, 1.5409, atol=5e-5)
    assert_allclose((1 - 0.05 * scale) ** shape, 0.7818, atol=5e-5)


@pytest.mark.parametrize("seed", [11, 12, 13], ids=["seed11", "seed12", "seed13"])
def test_detect_changepoints_agrees_with_ruptures_dynp(seed: int) -> None:
    import ruptures as rpt  # the test extra brings it (plausibility check only)
    n, truth = 180, [60, 120]
    y = _series(seed, n, truth, [0.04, -0.03, 0.02], [0.0, 0.0], base=150.0)
    ours = detect_changepoints(y)
    found = sorted(int(b) for b in ours.breaks[0] if b >= 0)
    # ruptures: exact segmentation with a linear-regression cost on weekly-smoothed log counts
    smooth = np.convolve(np.log(y + 0.5), np.ones(7) / 7, mode="same")
    signal = np.column_stack([smooth, np.ones(n), np.arange(n) / n])
    theirs = rpt.Dynp(model="linear", min_size=14, jump=1).fit(signal).predict(n_bkps=2)[:-1]
    assert len(found) == 2
    # a plausibility check: a least-squares fit of the smoothed log counts lands within a week
    assert np.all(np.abs(np.array(found) - np.array(theirs)) <= 7)
    # a change of slope alone (no jump) is dated less sharply: within 5 days on these seeds
    assert np.all(np.abs(np.array(found) - np.array(truth)) <= 5)


@pytest.mark.parametrize("seed", [6, 7], ids=["seed6", "seed7"])
def test_fit_kinks_matches_statsmodels_glm(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = 160
    t = np.arange(n)
    eta = (np.log(90) + 0.03 * t - 0.06 * np.maximum(t - 55, 0) + 0.05 * np.maximum(t - 110, 0)
           + np.where(t >= 130, 0.4, 0.0) + WEEKDAY[t % 7])
    y = rng.poisson(np.exp(eta)).astype(float)
    y[[9, 80, 81]] = np.nan
    observed = np.isfinite(y)
    fit = fit_kinks(y, [110, 55], level_shifts=[130])
    x = kink_design(n, np.array([[55, 110]]), np.array([[130]]))[0]
    # statsmodels 0.14 GLM, Poisson family, the same columns
    ref = sm.GLM(y[observed], x[observed], family=sm.families.Poisson()).fit(tol=1e-13,
                                                                           maxiter=100)
    assert fit.converged[0]
    assert_allclose(fit.coef[0], ref.params, rtol=0, atol=1e-6)
    assert_allclose(fit.covariance[0], ref.cov_params(), rtol=1e-6, atol=1e-12)
    assert_allclose(fit.mu[0, observed], ref.fittedvalues, rtol=1e-6)
    phi = ref.pearson_chi2 / (ref.df_resid - 2)  # one more df per kink date
    assert_allclose(fit.dispersion[0], max(phi, 1.0), rtol=1e-6)


@pytest.mark.parametrize("seed", [14, 15, 16], ids=["seed14", "seed15", "seed16"])
def test_detect_kinks_agree_with_ruptures_clinear(seed: int) -> None:
    import ruptures as rpt
    rng = np.random.default_rng(seed)
    n, truth = 180, [60, 120]
    t = np.arange(n)
    eta = np.log(150) + 0.04 * t - 0.07 * np.maximum(t - 60, 0) + 0.05 * np.maximum(t - 120, 0)
    y = rng.poisson(np.exp(eta + WEEKDAY[t % 7])).astype(float)
    ours = sorted(int(b) for b in detect_changepoints(y).breaks[0] if b >= 0)
    # ruptures 1.1: exact segmentation, continuous piecewise-linear cost, on the 7-day mean of
    # the log counts (ends padded with the end values, so the mean is not pulled down there)
    smooth = np.convolve(np.pad(np.log(y + 0.5), 3, mode="edge"), np.ones(7) / 7, mode="valid")
    theirs = rpt.Dynp(model="clinear", min_size=14, jump=1).fit(smooth[:, None]).predict(
        n_bkps=2)[:-1]
    assert len(ours) == 2
    assert np.all(np.abs(np.array(ours) - np.array(theirs)) <= 5)  # plausibility
    assert np.all(np.abs(np.array(ours) - np.array(truth)) <= 3)


@pytest.mark.parametrize(("r1", "r2"), [(0.8, 1.2), (1.25, 0.85), (1.0, 1.3)])
def test_step_in_r_shows_as_a_kink_at_the_mean_age(r1: float, r2: float) -> None:
    from scipy import optimize, stats
    mean, sd = 7.0, 5.0
    shape, scale = (mean / sd) ** 2, sd**2 / mean
    lags = np.arange(1, 41)
    w = np.diff(stats.gamma.cdf(np.arange(0, 41), shape, scale=scale))
    w /= w.sum()
    m1, m2 = (w * lags).sum(), (w * lags**2).sum()

    def growth(big_r: float) -> float:  # Euler-Lotka for the discrete pmf
        return float(optimize.brentq(lambda r: big_r * np.sum(w * np.exp(-r * lags)) - 1,
                                     -0.5, 0.5))

    g1, g2 = growth(r1), growth(r2)
    n, d = 500, 250
    i = np.exp(g1 * np.arange(n))
    for day in range(d, n):
        i[day] = r2 * np.sum(w * i[day - lags])
    li = np.log(i)
    after = np.polyfit(np.arange(d + 80, d + 140), li[d + 80 : d + 140], 1)
    before_at_d = li[d - 1] + g1
    meet = d + (np.polyval(after, d) - before_at_d) / (g1 - g2)
    # first order in r; measured 0.64, 0.2 and 0.3 days off on these three steps
    assert abs((meet - d) + m2 / (2 * m1)) <= 1.0


@pytest.mark.parametrize("seed", [21, 22], ids=["seed21", "seed22"])
def test_date_aware_covariance_matches_statsmodels_with_muggeo_columns(seed: int) -> None:
    # Muggeo (2003, Stat Med 22:3055, section 2): with the break date a parameter, the design
    # gains V = -delta 1(t > tau) per kink, the derivative of the linear predictor in tau; the
    # covariance of the other coefficients is their block of the inverse of the expected
    # information of the augmented design. Reference: statsmodels 0.14 GLM(Poisson).hessian
    # (expected information, observed=False) on [X, V] at the fitted coefficients (V's own
    # coefficient 0, so the means are ours).
    from server.indicators.changepoints import date_aware_covariance

    rng = np.random.default_rng(seed)
    n = 170
    t = np.arange(n)
    eta = (np.log(120) + 0.025 * t - 0.05 * np.maximum(t - 60, 0)
           + 0.04 * np.maximum(t - 115, 0) + WEEKDAY[t % 7])
    y = rng.poisson(np.exp(eta)).astype(float)
    y[[5, 90]] = np.nan
    observed = np.isfinite(y)
    fit = fit_kinks(y, [60, 115])
    ours = date_aware_covariance(fit)[0]
    x = kink_design(n, np.array([[60, 115]]))[0]
    delta = fit.coef[0, 2:4] / n
    v = -delta[None, :] * (t[:, None] > np.array([60, 115])[None, :])
    xv = np.concatenate([x, v], axis=1)[observed]
    model = sm.GLM(y[observed], xv, family=sm.families.Poisson())
    info = -model.hessian(np.r_[fit.coef[0], 0.0, 0.0], observed=False)
    ref = np.linalg.inv(info)[: x.shape[1], : x.shape[1]]
    assert_allclose(ours, ref, rtol=1e-6, atol=1e-12)
    # the slope changes are less certain once their dates are
    assert np.all(np.diag(ours)[2:4] > np.diag(fit.covariance[0])[2:4])


def test_smooth_ramp_follows_the_renewal_equation_after_a_small_step() -> None:
    # A small step of log R (1e-4) in the renewal equation i_t = R_t sum_a w_a i_{t-a}
    # (Fraser 2007, PLoS ONE 2:e758) at constant incidence, then cases by report date from
    # a daily delay pmf: the day-to-day change of log cases, times the mean generation
    # interval and over the step, against the slope of smooth_ramp (the same moments).
    # Iterated directly here, not derived from the renewal function. Daily (lattice)
    # sums smear the continuous shape by about half a day: measured 0.115 at most.
    from scipy import stats

    from server.indicators.kinkfit import smooth_ramp

    lags = np.arange(1, 61)
    w = np.diff(stats.gamma.cdf(np.arange(0, 61) + 0.5, (7.0 / 5.0) ** 2, scale=25.0 / 7.0))
    w /= w.sum()
    n, s, delta = 300, 150, 1e-4
    i = np.ones(n)
    for day in range(s, n):
        i[day] = np.exp(delta) * np.sum(w * i[day - lags])
    dl = np.arange(0, 41)
    g = np.diff(stats.gamma.cdf(np.arange(0, 42) - 0.5, (8.5 / 3.5) ** 2,
                                scale=3.5**2 / 8.5).clip(0))
    g /= g.sum()
    log_c = np.log(np.convolve(i, g)[:n]) / delta
    m1, m2 = (w * lags).sum(), (w * lags**2).sum()
    gm, gv = (g * dl).sum(), (g * dl**2).sum() - (g * dl).sum() ** 2
    lag = gm - m2 / (2 * m1)
    ramp = smooth_ramp(n, m1, np.sqrt(m2 - m1**2), gm, np.sqrt(gv))
    k = np.interp(np.arange(n) - s - lag, np.arange(-n, n + 1), ramp[0])
    part = slice(s - 20, n)
    assert np.abs(np.diff(m1 * log_c[part]) - np.diff(k[part])).max() <= 0.15
    # far from the step the smoothed hinge is the plain one
    u = np.arange(-n, n + 1)
    assert_allclose(ramp[0][np.abs(u) >= 60], np.maximum(u, 0)[np.abs(u) >= 60], atol=1e-9)


@pytest.mark.parametrize("seed", [8, 9], ids=["seed8", "seed9"])
def test_fit_kinks_with_smoothed_hinges_matches_statsmodels_glm(seed: int) -> None:
    # For fixed kink days the smoothed model is still a Poisson GLM on a known design:
    # statsmodels 0.14 GLM, Poisson family, on kink_design(..., ramp) gives the same
    # coefficients, covariance and means; Muggeo's date columns (2003, section 2) become
    # -delta K'(t - tau) / n, checked against statsmodels' expected information as above.
    from server.indicators.changepoints import date_aware_covariance
    from server.indicators.kinkfit import smooth_ramp

    rng = np.random.default_rng(seed)
    n = 160
    t = np.arange(n)
    ramp = smooth_ramp(n, 7.0, 5.0, 8.5, 3.5)
    eta = (np.log(90) + 0.03 * t - 0.06 * ramp[0][n + t - 55] + 0.05 * ramp[0][n + t - 110]
           + np.where(t >= 130, 0.4, 0.0) + WEEKDAY[t % 7])
    y = rng.poisson(np.exp(eta)).astype(float)
    y[[9, 80, 81]] = np.nan
    observed = np.isfinite(y)
    fit = fit_kinks(y, [110, 55], level_shifts=[130], ramp=ramp)
    x = kink_design(n, np.array([[55, 110]]), np.array([[130]]), ramp=ramp)[0]
    assert_allclose(x[:, 2], ramp[0][n + t - 55] / n)
    ref = sm.GLM(y[observed], x[observed], family=sm.families.Poisson()).fit(tol=1e-13,
                                                                           maxiter=100)
    assert fit.converged[0]
    assert_allclose(fit.coef[0], ref.params, rtol=0, atol=1e-6)
    assert_allclose(fit.covariance[0], ref.cov_params(), rtol=1e-6, atol=1e-12)
    assert_allclose(fit.mu[0, observed], ref.fittedvalues, rtol=1e-6)
    ours = date_aware_covariance(fit, ramp=ramp)[0]
    assert_allclose(ours, _muggeo_reference(y, x, fit.coef[0], fit.coef[0, 2:4], [55, 110],
                                            ramp), rtol=1e-6, atol=1e-12)


def _muggeo_reference(y: np.ndarray, x: np.ndarray, coef: np.ndarray, slopes: np.ndarray,
                      kinks: list[int], ramp: np.ndarray) -> np.ndarray:
    """statsmodels' inverse expected information of the design ``x`` with Muggeo's date
    columns ``-(d_k / n) K'(t - tau_k)`` for ``kinks`` (slope changes ``slopes``, times n),
    its block of the other coefficients."""
    n = y.shape[0]
    t = np.arange(n)
    observed = np.isfinite(y)
    v = -(np.asarray(slopes) / n)[None, :] * np.stack([ramp[1][n + t - k] for k in kinks],
                                                      axis=1)
    xv = np.concatenate([x, v], axis=1)[observed]
    info = -sm.GLM(y[observed], xv, family=sm.families.Poisson()).hessian(
        np.r_[coef, np.zeros(len(kinks))], observed=False)
    return np.linalg.inv(info)[: x.shape[1], : x.shape[1]]


@pytest.mark.parametrize("seed", [31, 32], ids=["seed31", "seed32"])
def test_local_refit_matches_statsmodels_glm_with_fixed_knots(seed: int) -> None:
    # The local change of growth (server.indicators.local_change): the kink model refitted
    # with fixed knots `window` days either side of each kink is a Poisson GLM on a spline
    # design with known knots (Hastie, Tibshirani & Friedman 2009, ESL 2nd ed., 5.2);
    # statsmodels 0.14 GLM(Poisson) on kink_design(kinks + knots, ramp) gives the same
    # coefficients, and the covariance with Muggeo's date columns for the kinks only (2003,
    # section 2) matches the block of statsmodels' inverse expected information.
    from server.indicators.changepoints import date_aware_covariance
    from server.indicators.kinkfit import smooth_ramp
    from server.indicators.local_change import fit_local

    rng = np.random.default_rng(seed)
    n = 220
    t = np.arange(n)
    ramp = smooth_ramp(n, 7.0, 5.0, 8.5, 3.5)
    # growth drifting within the long last segment (a slow bend the kinks do not model)
    eta = (np.log(80) + 0.03 * t - 0.06 * ramp[0][n + t - 60] + 0.05 * ramp[0][n + t - 110]
           - 0.0002 * np.maximum(t - 110, 0) ** 2 / 2 + WEEKDAY[t % 7])
    y = rng.poisson(np.exp(eta)).astype(float)
    y[[7, 150]] = np.nan
    observed = np.isfinite(y)
    fit = fit_kinks(y, [60, 110], ramp=ramp)
    local = fit_local(y, fit, window=42, min_gap=14, dispersion="quasipoisson", ramp=ramp)
    # knots: 60 - 42 = 18 and 110 + 42 = 152 (60 + 42 and 110 - 42 are within 42 of a kink)
    assert local.fit.kinks[0, :4].tolist() == [18, 60, 110, 152]
    assert np.all(local.fit.kinks[0, 4:] == -1)  # room for two knots per kink
    assert local.position[0].tolist() == [1, 2]
    assert local.dated[0, :4].tolist() == [False, True, True, False]
    x = kink_design(n, np.array([[18, 60, 110, 152]]), ramp=ramp)[0]
    ref = sm.GLM(y[observed], x[observed], family=sm.families.Poisson()).fit(tol=1e-13,
                                                                           maxiter=100)
    assert local.fit.converged[0]
    used = np.r_[0:6, 8:14]  # the two unused hinge columns are zero padding
    assert_allclose(local.fit.coef[0, 6:8], 0.0)
    assert_allclose(local.fit.coef[0, used], ref.params, rtol=0, atol=1e-6)
    ours = date_aware_covariance(local.fit, ramp=ramp, dated=local.dated)[0][np.ix_(used, used)]
    assert_allclose(ours, _muggeo_reference(y, x, local.fit.coef[0, used],
                                            local.fit.coef[0, 3:5], [60, 110], ramp),
                    rtol=1e-6, atol=1e-12)
