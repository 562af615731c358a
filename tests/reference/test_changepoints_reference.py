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
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators.changepoints import detect_changepoints, fit_piecewise

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
