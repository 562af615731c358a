"""Exact Poisson (Garwood 1936) intervals and the conditional rate-ratio interval against
published tables and reference libraries."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.proportion import proportion_confint

from server.indicators.poisson import poisson_interval, rate_ratio


@pytest.mark.parametrize(
    ("count", "lower", "upper", "decimals"),
    [
        # Garwood (1936) exact 95% limits as tabulated in REFERENCES.md ("Check values for the
        # statistics", [seen]).
        (0, 0.0, 3.6889, 4),
        (1, 0.0253, 5.5716, 4),
        (3, 0.6187, 8.7673, 4),
        (5, 1.6235, 11.6683, 4),
        (10, 4.795, 18.390, 3),
    ],
    ids=["x0", "x1", "x3", "x5", "x10"],
)
def test_poisson_interval_matches_garwood_table(
    count: int, lower: float, upper: float, decimals: int
) -> None:
    result = poisson_interval([float(count)])
    assert_allclose(np.round(result.lower[0], decimals), lower)
    assert_allclose(np.round(result.upper[0], decimals), upper)


def test_poisson_interval_matches_scipy_chi2_on_random_counts() -> None:
    counts = np.random.default_rng(20).integers(1, 5000, size=200).astype(float)
    result = poisson_interval(counts, level=0.9)
    # Reference: Garwood (1936) as chi-square quantiles, scipy.stats.chi2.ppf.
    assert_allclose(result.lower, stats.chi2.ppf(0.05, 2 * counts) / 2, rtol=1e-10)
    assert_allclose(result.upper, stats.chi2.ppf(0.95, 2 * counts + 2) / 2, rtol=1e-10)


def test_rate_ratio_matches_statsmodels_clopper_pearson() -> None:
    rng = np.random.default_rng(21)
    x = rng.poisson(9, size=(1, 21)).astype(float)
    x[0, 18] = np.nan  # one missing day in the current week: exposure 6 days against 7
    result = rate_ratio(x, 7, max_missing=1)
    x1 = np.nansum(x[0, 14:21])
    x2 = np.nansum(x[0, 7:14])
    # Reference: statsmodels proportion_confint(method="beta") (Clopper & Pearson 1934) on
    # x1 / (x1 + x2), mapped to the rate ratio pi / (1 - pi) * e2 / e1 with exposures 6 and 7
    # days (Breslow & Day 1987, vol. II, section 2.2, conditional inference on a rate ratio).
    low, upp = proportion_confint(x1, x1 + x2, alpha=0.05, method="beta")
    assert_allclose(result.lower[0, 20], low / (1 - low) * 7 / 6, rtol=1e-8)
    assert_allclose(result.upper[0, 20], upp / (1 - upp) * 7 / 6, rtol=1e-8)
    assert_allclose(result.estimate[0, 20], (x1 / 6) / (x2 / 7))
