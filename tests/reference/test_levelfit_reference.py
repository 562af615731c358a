"""The level-intercept Poisson fit (profile Newton) against statsmodels GLM fits."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators._levelfit import Levels, fit_levels


def _design(levels: np.ndarray, t: np.ndarray | None) -> np.ndarray:
    dummies = [(levels == k).astype(float) for k in range(1, levels.max() + 1)]
    cols = [np.ones(levels.size)] + ([t] if t is not None else []) + dummies
    return np.column_stack(cols)


@pytest.mark.parametrize("weighted", [False, True], ids=["unit-weights", "prior-weights"])
def test_fit_levels_block_levels_match_statsmodels_glm(weighted: bool) -> None:
    # Reference: statsmodels GLM, Poisson family, var_weights as prior weights
    # (McCullagh & Nelder 1989, section 2.5); columns sorted by level, as the callers do.
    rng = np.random.default_rng(61)
    sizes = (7, 5, 5, 6)
    levels = np.repeat(np.arange(4), sizes)
    t = rng.permutation(levels.size).astype(float) - 11.0
    rows = 6
    mean = np.exp(2.5 + 0.03 * t + 0.4 * (levels == 2))[None, :] * rng.uniform(0.5, 2, (rows, 1))
    y = rng.poisson(mean).astype(float)
    w = rng.uniform(0.3, 1.7, y.shape) if weighted else np.ones_like(y)
    w[0, 3] = 0.0  # left out
    fit = fit_levels(y, w, Levels(n=levels.size, sizes=sizes), t)
    x = _design(levels, t)
    for i in range(rows):
        keep = w[i] > 0
        ref = sm.GLM(y[i, keep], x[keep], family=sm.families.Poisson(), var_weights=w[i, keep])
        res = ref.fit(tol=1e-13)
        assert fit.exists[i]
        assert_allclose(fit.slope[i], res.params[1], rtol=1e-8)
        assert_allclose(fit.slope_var[i], res.cov_params()[1, 1], rtol=1e-7)
        assert_allclose(fit.mu[i, keep], res.mu, rtol=1e-8)
        assert_allclose(fit.intercepts[i, 0], res.params[0], rtol=1e-8, atol=1e-10)
        hat = res.get_influence().hat_matrix_diag
        assert_allclose(fit.leverage[i, keep], hat, rtol=1e-7, atol=1e-12)


def test_fit_levels_weekday_levels_with_missing_day_match_statsmodels() -> None:
    # Reference: statsmodels GLM (Poisson) with weekday dummies on the observed days.
    rng = np.random.default_rng(62)
    n = 17
    t = np.arange(n) - (n - 1) / 2
    y = rng.poisson(30 * np.exp(-0.05 * t), (4, n)).astype(float)
    w = np.ones_like(y)
    w[1, 9] = 0.0
    fit = fit_levels(y, w, Levels(n=n, period=7), t)
    x = _design(np.arange(n) % 7, t)
    for i in range(4):
        keep = w[i] > 0
        res = sm.GLM(y[i, keep], x[keep], family=sm.families.Poisson()).fit(tol=1e-13)
        assert_allclose(fit.slope[i], res.params[1], rtol=1e-8)
        assert_allclose(fit.slope_var[i], res.cov_params()[1, 1], rtol=1e-7)


def test_fit_levels_without_slope_is_the_level_mean() -> None:
    # closed form of the Poisson MLE with one intercept per level: the weighted level mean
    y = np.array([[3.0, 5.0, 2.0, 8.0, 6.0]])
    w = np.array([[1.0, 1.0, 0.0, 2.0, 1.0]])
    fit = fit_levels(y, w, Levels(n=5, sizes=(3, 2)), None)
    assert_allclose(np.exp(fit.intercepts), [[4.0, (16.0 + 6.0) / 3.0]])


def test_fit_levels_reports_counts_only_at_one_end_as_not_existing() -> None:
    # all counts on the last day of each level: the likelihood grows without bound in the slope
    y = np.array([[0.0, 4.0, 0.0, 0.0, 7.0], [1.0, 4.0, 0.0, 2.0, 7.0]])
    fit = fit_levels(y, np.ones_like(y), Levels(n=5, sizes=(2, 3)), np.arange(5.0))
    assert not fit.exists[0]
    assert fit.exists[1]
