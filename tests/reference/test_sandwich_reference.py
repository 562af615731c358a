"""The Newey-West (HAC) sandwich against statsmodels.

- ``bartlett_meat`` against statsmodels 0.14 ``stats.sandwich_covariance.S_hac_simple`` (the
  Bartlett-weighted sum of the scores' autocovariances, Newey & West 1987, Econometrica 55:703,
  weights ``1 - l / (L + 1)``).
- ``hac_sandwich`` against statsmodels' ``GLM(..., family=Poisson()).fit(cov_type='HAC',
  cov_kwds={'maxlags': L, 'use_correction': False})`` on the same design.
- ``hac_covariance`` of a kink fit against the same GLM on ``kink_design`` (dates fixed) and,
  with Muggeo's (2003, Stat Med 22:3055) date columns, against the sandwich assembled from
  statsmodels' ``hessian`` (expected information) and ``score_obs`` on ``[X, V]``.
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from statsmodels.stats.sandwich_covariance import S_hac_simple

from server.indicators.changepoints import fit_kinks, hac_covariance, kink_design
from server.indicators.sandwich import bartlett_meat, hac_sandwich

WEEKDAY = np.array([0.0, 0.12, 0.05, 0.02, -0.08, -0.45, -0.7])


def _series(seed: int, n: int) -> np.ndarray:
    """Counts with two kinks, weekday effects and residuals correlated over about 10 days."""
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    wander = np.convolve(rng.normal(0.0, 0.06, n + 30), np.ones(10), "same")[15 : 15 + n]
    eta = (np.log(150) + 0.02 * t - 0.05 * np.maximum(t - 70, 0)
           + 0.045 * np.maximum(t - 130, 0) + WEEKDAY[t % 7] + wander)
    return rng.poisson(np.exp(eta)).astype(float)


@pytest.mark.parametrize("lags", [0, 1, 9, 40])
def test_bartlett_meat_matches_statsmodels(lags: int) -> None:
    rng = np.random.default_rng(lags)
    scores = rng.normal(size=(3, 120, 4)).cumsum(axis=1) * 0.1
    ours = bartlett_meat(scores, lags)
    for i in range(3):
        assert_allclose(ours[i], S_hac_simple(scores[i], nlags=lags), rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("seed,lags", [(1, 6), (2, 20)], ids=["seed1-L6", "seed2-L20"])
def test_hac_sandwich_matches_statsmodels_glm_hac(seed: int, lags: int) -> None:
    y = _series(seed, 200)
    x = kink_design(200, np.array([[70, 130]]))[0]
    model = sm.GLM(y, x, family=sm.families.Poisson())
    ref = model.fit(tol=1e-13, maxiter=100, cov_type="HAC",
                    cov_kwds={"maxlags": lags, "use_correction": False})
    ours = hac_sandwich(x[None], y[None], ref.mu[None], lags)[0]
    assert_allclose(ours, ref.cov_params(), rtol=1e-7, atol=1e-14)


@pytest.mark.parametrize("seed", [3, 4], ids=["seed3", "seed4"])
def test_hac_covariance_of_a_kink_fit_matches_statsmodels(seed: int) -> None:
    n, lags = 210, 13
    y = _series(seed, n)
    fit = fit_kinks(y, [70, 130])
    x = kink_design(n, np.array([[70, 130]]))[0]
    # dates fixed: statsmodels' HAC fit on the same columns
    ref = sm.GLM(y, x, family=sm.families.Poisson()).fit(
        tol=1e-13, maxiter=100, cov_type="HAC", cov_kwds={"maxlags": lags,
                                                         "use_correction": False})
    ours = hac_covariance(fit, y[None], lags, date_free=False)[0]
    assert_allclose(ours, ref.cov_params(), rtol=1e-6, atol=1e-13)
    # dates free: Muggeo's V = -delta 1(t > tau) appended; bread from statsmodels' expected
    # information on [X, V], meat from S_hac_simple of its score_obs, both at our estimates
    # (V's coefficient 0)
    t = np.arange(n)
    delta = fit.coef[0, 2:4] / n
    v = -delta[None, :] * (t[:, None] > np.array([70, 130])[None, :])
    xv = np.concatenate([x, v], axis=1)
    model = sm.GLM(y, xv, family=sm.families.Poisson())
    params = np.r_[fit.coef[0], 0.0, 0.0]
    bread = np.linalg.inv(-model.hessian(params, observed=False))
    meat = S_hac_simple(model.score_obs(params), nlags=lags)
    ref_free = (bread @ meat @ bread)[: x.shape[1], : x.shape[1]]
    ours_free = hac_covariance(fit, y[None], lags)[0]
    assert_allclose(ours_free, ref_free, rtol=1e-6, atol=1e-13)


def test_bartlett_meat_refuses_negative_lags() -> None:
    with pytest.raises(ValueError, match="lags"):
        bartlett_meat(np.zeros((1, 10, 2)), -1)
