"""Tests for demo_seed.delays against scipy.stats and numpy.convolve."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from demo_seed.delays import (
    convolve_days,
    discretised_gamma,
    discretised_lognormal,
    mean_of_pmf,
)
from demo_seed.errors import ScenarioArgumentError


@pytest.mark.parametrize(("mean", "sd"), [(10.0, 4.0), (5.1, 3.0), (8.5, 3.5)],
                         ids=["admission", "incubation", "to_test"])
def test_discretised_gamma_mean_matches_scipy(mean: float, sd: float) -> None:
    pmf = discretised_gamma(mean, sd, max_lag=80)
    continuous = stats.gamma(a=(mean / sd) ** 2, scale=sd**2 / mean).mean()
    # rounding to the nearest day keeps the mean to within a few hundredths of a day
    assert_allclose(mean_of_pmf(pmf), continuous, atol=0.05)


def test_discretised_gamma_sums_to_one() -> None:
    assert_allclose(discretised_gamma(3.0, 2.5, max_lag=30).sum(), 1.0)


def test_discretised_lognormal_quartiles_match_rees_2020() -> None:
    pmf = discretised_lognormal(8.0, 0.71, max_lag=120)
    cdf = np.cumsum(pmf)
    q25, q50, q75 = (int(np.searchsorted(cdf, q)) for q in (0.25, 0.5, 0.75))
    # Rees et al. 2020, BMC Med 18:270: ICU stay median 8 days, IQR 5-13 (China)
    assert (q25, q50, q75) == (5, 8, 13)


def test_convolve_days_matches_numpy_convolve_per_row() -> None:
    rng = np.random.default_rng(5)
    series = rng.poisson(20.0, size=(3, 50)).astype(float)
    pmf = discretised_gamma(4.0, 2.0, max_lag=12)
    expected = np.stack([np.convolve(row, pmf)[:50] for row in series])
    assert_allclose(convolve_days(series, pmf), expected, rtol=1e-12)


def test_convolve_days_offset_shifts_by_one_day() -> None:
    pmf = np.array([1.0])
    series = np.arange(6.0)
    assert_allclose(convolve_days(series, pmf, offset=1), [0.0, 0.0, 1.0, 2.0, 3.0, 4.0])


def test_discretised_gamma_negative_sd_raises() -> None:
    with pytest.raises(ScenarioArgumentError, match="sd=-1.0"):
        discretised_gamma(4.0, -1.0, max_lag=10)
