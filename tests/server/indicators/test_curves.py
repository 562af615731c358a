"""Unit tests for server.indicators.curves (shapes, missing data, validation, reproducibility)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from server.indicators.curves import fit_growth_curve, richards_cumulative


def _logistic_counts(k: float, a: float, t0: float, days: int, seed: int) -> np.ndarray:
    t = np.arange(days, dtype=float)
    mu = richards_cumulative(t, k, a, t0) - richards_cumulative(t - 1, k, a, t0)
    return np.random.default_rng(seed).poisson(mu).astype(float)


def test_fit_growth_curve_shapes_follow_regions_and_horizons() -> None:
    y = np.vstack([_logistic_counts(2000, 0.2, 25, 50, s) for s in (1, 2)])
    fit = fit_growth_curve(y, horizons=(3, 7, 14), n_boot=20)
    assert fit.final_size.estimate.shape == (2,)
    assert fit.projection.estimate.shape == (2, 3)
    assert fit.projection.lower.shape == (2, 3)
    assert fit.horizons == (3, 7, 14)


def test_fit_growth_curve_projection_grows_with_horizon() -> None:
    y = _logistic_counts(2000, 0.2, 30, 35, 3)
    fit = fit_growth_curve(y, horizons=(7, 14), n_boot=30)
    est = fit.projection.estimate[0]
    assert fit.last_cumulative[0] < est[0] < est[1]
    assert (fit.projection.lower[0] <= est).all() and (est <= fit.projection.upper[0]).all()


def test_fit_growth_curve_seed_makes_intervals_reproducible() -> None:
    y = _logistic_counts(1500, 0.25, 20, 40, 4)
    first = fit_growth_curve(y, n_boot=15, seed=9)
    second = fit_growth_curve(y, n_boot=15, seed=9)
    assert_array_equal(first.final_size.lower, second.final_size.lower)


def test_fit_growth_curve_without_bootstrap_has_nan_bounds() -> None:
    fit = fit_growth_curve(_logistic_counts(1500, 0.25, 20, 40, 5), n_boot=0)
    assert np.isfinite(fit.final_size.estimate).all()
    assert np.isnan(fit.final_size.lower).all()


def test_fit_growth_curve_missing_days_are_left_out() -> None:
    y = _logistic_counts(3000, 0.2, 25, 50, 6)
    gappy = y.copy()
    gappy[[10, 26, 27]] = np.nan
    fit = fit_growth_curve(gappy, n_boot=0)
    assert fit.n_observed[0] == 47
    assert_allclose(fit.final_size.estimate[0], 3000, rtol=0.06)


def test_fit_growth_curve_empty_region_is_nan() -> None:
    y = np.vstack([_logistic_counts(3000, 0.2, 25, 50, 7), np.zeros(50)])
    fit = fit_growth_curve(y, n_boot=5)
    assert np.isnan(fit.final_size.estimate[1]) and not fit.converged[1]
    assert np.isfinite(fit.final_size.estimate[0])


def test_fit_growth_curve_share_reached_passes_half_after_turning() -> None:
    early = fit_growth_curve(_logistic_counts(5000, 0.2, 30, 26, 8), n_boot=0)
    late = fit_growth_curve(_logistic_counts(5000, 0.2, 30, 40, 8), n_boot=0)
    assert early.share_reached.estimate[0] < 0.5 < late.share_reached.estimate[0]


def test_fit_growth_curve_overdispersion_widens_interval() -> None:
    rng = np.random.default_rng(10)
    t = np.arange(50, dtype=float)
    mu = richards_cumulative(t, 4000, 0.2, 25) - richards_cumulative(t - 1, 4000, 0.2, 25)
    poisson = rng.poisson(mu).astype(float)
    noisy = rng.poisson(rng.gamma(shape=mu / 4.0, scale=4.0)).astype(float)  # variance 5 mu
    fit_p = fit_growth_curve(poisson, n_boot=60, seed=1)
    fit_n = fit_growth_curve(noisy, n_boot=60, seed=1)
    assert fit_n.dispersion[0] > 2.0 and fit_p.dispersion[0] < 1.6
    width_p = fit_p.final_size.upper[0] - fit_p.final_size.lower[0]
    width_n = fit_n.final_size.upper[0] - fit_n.final_size.lower[0]
    assert width_n > 1.5 * width_p


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"model": "gompertz"}, "model"),
        ({"horizons": ()}, "horizons"),
        ({"horizons": (0,)}, "horizons"),
        ({"n_boot": -1}, "n_boot"),
        ({"level": 1.5}, "level"),
    ],
    ids=["model", "no-horizon", "zero-horizon", "negative-boot", "level"],
)
def test_fit_growth_curve_rejects_bad_arguments(kwargs: dict, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        fit_growth_curve(np.ones(30), **kwargs)


def test_fit_growth_curve_rejects_negative_counts() -> None:
    with pytest.raises(ValueError, match="counts: negative count"):
        fit_growth_curve([1.0, -2.0, 3.0])
