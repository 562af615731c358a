"""Tests for server.indicators._levelfit (reference: statsmodels GLM, Poisson family).

Every fit is compared with ``statsmodels.api.GLM(..., family=Poisson())`` on the same data, with one
dummy per level (the first level the reference) and the slope column: McCullagh & Nelder (1989),
Generalized Linear Models, 2nd ed., sections 2.5 and 6.3.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose

from server.indicators._levelfit import Levels, fit_levels


def _design(level: np.ndarray, t: np.ndarray | None) -> np.ndarray:
    """Intercept, slope column (if any) and dummies for levels 1..K-1."""
    dummies = [(level == k).astype(float) for k in range(1, int(level.max()) + 1)]
    return np.column_stack([np.ones(level.size)] + ([t] if t is not None else []) + dummies)


def _statsmodels(y: np.ndarray, x: np.ndarray, weights: np.ndarray | None = None) -> Any:
    # Reference: statsmodels GLM, Poisson family (var_weights are the prior weights).
    model = sm.GLM(y, x, family=sm.families.Poisson(), var_weights=weights)
    return model.fit(tol=1e-13, maxiter=200)


@pytest.mark.parametrize("n", [14, 17, 25], ids=["two-weeks", "uneven-levels", "uneven-25"])
def test_weekday_levels_with_slope_match_statsmodels(n: int) -> None:
    rng = np.random.default_rng(100 + n)
    rows = 8
    t = np.arange(n, dtype=float) - (n - 1) / 2.0
    dow = rng.uniform(0.5, 1.5, 7)
    r = rng.uniform(-0.08, 0.08, (rows, 1))
    mean = rng.uniform(3.0, 300.0, (rows, 1)) * np.exp(r * t) * dow[np.arange(n) % 7]
    y = np.maximum(rng.poisson(mean), 1).astype(float)  # every level has a count
    fit = fit_levels(y, np.ones_like(y), Levels(n=n, period=7), t)
    level = np.arange(n) % 7
    x = _design(level, t)
    for i in range(rows):
        res = _statsmodels(y[i], x)
        assert fit.exists[i]
        assert_allclose(fit.slope[i], res.params[1], rtol=1e-8, atol=1e-12)
        assert_allclose(fit.slope_var[i], res.cov_params()[1, 1], rtol=1e-7)
        assert_allclose(fit.mu[i], res.mu, rtol=1e-8)
        # level intercepts in the dummy coding: a_0 = const, a_k = const + dummy_k
        expected = res.params[0] + np.concatenate([[0.0], res.params[2:]])
        assert_allclose(fit.intercepts[i], expected, rtol=1e-8, atol=1e-10)
        hat = res.get_influence().hat_matrix_diag
        assert_allclose(fit.leverage[i], hat, rtol=1e-7, atol=1e-12)


def test_missing_days_are_left_out_like_statsmodels_on_the_observed_days() -> None:
    rng = np.random.default_rng(7)
    n, rows = 21, 6
    t = np.arange(n, dtype=float)  # uncentred on purpose
    y = rng.poisson(40.0 * np.exp(0.03 * t), (rows, n)).astype(float)
    w = np.ones_like(y)
    w[0, [3, 11]] = 0.0
    w[1, 20] = 0.0  # the last day
    w[2, [0, 7]] = 0.0  # weekday level 0 keeps one day: its intercept, no slope information
    y_garbage = y.copy()
    y_garbage[w == 0] = 1e6  # a left-out day's value must not matter
    fit = fit_levels(y_garbage, w, Levels(n=n, period=7), t)
    level = np.arange(n) % 7
    for i in range(rows):
        keep = w[i] > 0
        res = _statsmodels(y[i, keep], _design(level[keep], t[keep]))
        assert fit.exists[i]
        assert_allclose(fit.slope[i], res.params[1], rtol=1e-8)
        assert_allclose(fit.slope_var[i], res.cov_params()[1, 1], rtol=1e-7)
        assert_allclose(fit.mu[i, keep], res.mu, rtol=1e-8)
        assert np.all(fit.leverage[i, ~keep] == 0.0)
        assert_allclose(fit.leverage[i, keep], res.get_influence().hat_matrix_diag, rtol=1e-7,
                        atol=1e-12)


def test_block_levels_with_prior_weights_and_no_slope_match_statsmodels() -> None:
    rng = np.random.default_rng(8)
    sizes = (4, 9, 3, 6)
    level = np.repeat(np.arange(len(sizes)), sizes)
    rows = 5
    y = rng.poisson(rng.uniform(2.0, 50.0, (rows, len(sizes)))[:, level]).astype(float)
    y[:, np.cumsum(sizes) - 1] += 1.0  # every level has a count
    w = rng.uniform(0.2, 2.0, y.shape)
    fit = fit_levels(y, w, Levels(n=level.size, sizes=sizes), None)
    for i in range(rows):
        res = _statsmodels(y[i], _design(level, None), w[i])
        expected = res.params[0] + np.concatenate([[0.0], res.params[1:]])
        assert fit.exists[i]
        assert_allclose(fit.intercepts[i], expected, rtol=1e-9, atol=1e-12)
        assert_allclose(fit.mu[i], res.mu, rtol=1e-9)
        assert_allclose(fit.leverage[i], res.get_influence().hat_matrix_diag, rtol=1e-7)
    assert np.all(fit.slope == 0.0) and np.all(np.isnan(fit.slope_var))


def test_start_value_does_not_change_the_estimate() -> None:
    rng = np.random.default_rng(9)
    n = 28
    t = np.arange(n, dtype=float) - 13.5
    y = rng.poisson(25.0 * np.exp(-0.04 * t), (20, n)).astype(float) + 1.0
    levels = Levels(n=n, period=7)
    base = fit_levels(y, np.ones_like(y), levels, t)
    for start in (np.full(20, 0.5), np.full(20, -0.5), np.full(20, np.nan)):
        other = fit_levels(y, np.ones_like(y), levels, t, start=start)
        assert np.all(other.exists)
        assert_allclose(other.slope, base.slope, rtol=1e-10, atol=1e-13)


def test_symmetric_counts_have_slope_exactly_at_the_root() -> None:
    # counts mirrored about the centre of t: the score is 0 at slope 0 (statsmodels agrees);
    # a zero score at the start must stop the iteration there, not bisect away from it
    half = np.array([[5.0, 9.0, 2.0, 7.0, 7.0, 2.0, 9.0, 5.0]])
    t = np.arange(8, dtype=float) - 3.5
    fit = fit_levels(half, np.ones_like(half), Levels(n=8, sizes=(8,)), t)
    res = _statsmodels(half[0], _design(np.zeros(8, dtype=int), t))
    assert fit.exists[0]
    assert_allclose(fit.slope[0], res.params[1], atol=1e-12)
    assert abs(fit.slope[0]) < 1e-14


def test_a_level_without_counts_has_no_estimate() -> None:
    # Poisson MLE of a level intercept is log(0) = -inf when the level's counts are all 0
    # (McCullagh & Nelder 1989, section 6.3: the level total is its sufficient statistic)
    rng = np.random.default_rng(10)
    n = 14
    t = np.arange(n, dtype=float)
    y = rng.poisson(30.0, (3, n)).astype(float) + 1.0
    y[1, [2, 9]] = 0.0  # weekday level 2 empty
    w = np.ones_like(y)
    y[2, 5] = 0.0
    w[2, 12] = 0.0  # level 5: one day zero, the other missing -> empty
    fit = fit_levels(y, w, Levels(n=n, period=7), t)
    assert fit.exists.tolist() == [True, False, False]
    flat = fit_levels(y, w, Levels(n=n, period=7), None)
    assert flat.exists.tolist() == [True, False, False]


def test_counts_only_at_one_end_of_every_level_have_no_estimate() -> None:
    # all counts in the second week: the likelihood increases without bound in the slope
    n = 14
    t = np.arange(n, dtype=float)
    y = np.zeros((3, n))
    y[0, 7:] = 3.0
    y[1, :7] = 3.0  # first week only: unbounded towards -inf
    y[2, 7:] = 3.0
    y[2, 0] = 1.0  # one count in the first week of level 0: the estimate exists
    fit = fit_levels(y, np.ones_like(y), Levels(n=n, period=7), t)
    assert fit.exists.tolist() == [False, False, True]
    level = np.arange(n) % 7
    res = _statsmodels(y[2], _design(level, t))
    assert_allclose(fit.slope[2], res.params[1], rtol=1e-8)


def test_level_sums_and_expansion_equal_indicator_matrix_products() -> None:
    # numpy reference: products with the 0/1 level-membership matrix
    rng = np.random.default_rng(11)
    a = rng.normal(size=(4, 17))
    for levels, level in (
        (Levels(n=17, period=7), np.arange(17) % 7),
        (Levels(n=17, sizes=(5, 2, 10)), np.repeat(np.arange(3), (5, 2, 10))),
    ):
        onehot = (level[:, None] == np.arange(levels.count)[None, :]).astype(float)
        assert_allclose(levels.sum(a), a @ onehot, rtol=1e-12)
        v = rng.normal(size=(4, levels.count))
        assert_allclose(levels.expand(v), v @ onehot.T, rtol=1e-12)
