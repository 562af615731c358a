"""Tests for server.indicators.renewal (references: scipy quadrature and gamma quantiles)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, stats

from server.indicators.renewal import infectiousness, reproduction_number
from server.indicators.serial_interval import (
    discrete_serial_interval,
    gamma_serial_interval,
    growth_to_reproduction,
    reproduction_to_growth,
)


def test_gamma_serial_interval_matches_triangular_kernel_quadrature() -> None:
    mean, sd = 4.7, 2.9
    a, b = ((mean - 1) / sd) ** 2, sd**2 / (mean - 1)
    si = gamma_serial_interval(mean, sd, lags=80)  # mass beyond 80 days is < 1e-12
    # Reference: Cori et al. (2013) Web Appendix 11 discretise the serial interval 1 + Gamma(a, b)
    # with a triangular kernel, w_k = int (1 - |k - x|)_+ g(x - 1) dx; here by scipy quad.
    expected = [
        integrate.quad(
            lambda x, k=k: max(0.0, 1 - abs(k - x)) * stats.gamma.pdf(x - 1, a, scale=b),
            k - 1,
            k + 1,
            points=[k],
        )[0]
        for k in range(12)
    ]
    assert_allclose(si.pmf[:12], expected, rtol=1e-7, atol=1e-12)


def test_gamma_serial_interval_keeps_the_mean() -> None:
    si = gamma_serial_interval(6.5, 4.0, lags=200)
    # Cori et al. (2013) Web Appendix 11: the discretisation preserves the mean of 1 + Gamma.
    assert_allclose(si.mean, 6.5, rtol=1e-6)
    assert si.pmf[0] == 0.0


def test_gamma_serial_interval_mean_at_most_one_raises() -> None:
    with pytest.raises(ValueError, match="mean: the offset gamma needs a mean above 1 day"):
        gamma_serial_interval(0.8, 1.0)


@pytest.mark.parametrize(
    ("pmf", "message"),
    [([0.2, 0.8], "w_0 must be 0"), ([0.0, 0.5, 0.4], "must sum to 1, got 0.9")],
    ids=["w0", "sum"],
)
def test_discrete_serial_interval_invalid_raises(pmf: list[float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        discrete_serial_interval(pmf)


def test_reproduction_number_hand_example() -> None:
    si = discrete_serial_interval([0.0, 0.5, 0.5])
    incidence = np.array([[2.0, 4.0, 6.0, 8.0, 10.0]])
    result = reproduction_number(incidence, si, window=2)
    # By hand (Cori et al. 2013, eq. 2; prior shape 1, scale 5 so rate 0.2):
    # Lambda_2 = .5*4 + .5*2 = 3, Lambda_3 = .5*6 + .5*4 = 5, Lambda_4 = .5*8 + .5*6 = 7.
    # t=3: shape 1 + 6 + 8 = 15, rate 0.2 + 3 + 5 = 8.2;  t=4: shape 19, rate 12.2.
    # Days before the series count as 0 (EpiEstim overall_infectivity): Lambda_1 = .5*2 = 1, so
    # t=2 (window days 1..2): shape 1 + 4 + 6 = 11, rate 0.2 + 1 + 3 = 4.2.
    assert_allclose(result.shape[0, 2:], [11.0, 15.0, 19.0])
    assert_allclose(result.rate[0, 2:], [4.2, 8.2, 12.2])
    assert_allclose(result.estimate[0, 2:], [11 / 4.2, 15 / 8.2, 19 / 12.2])
    assert_allclose(result.cv[0, 2:], [11**-0.5, 15**-0.5, 19**-0.5])
    # no window may hold day 0 (EpiEstim: t_start >= 2)
    assert np.all(np.isnan(result.estimate[0, :2]))


def test_reproduction_number_quantiles_match_scipy_gamma() -> None:
    rng = np.random.default_rng(50)
    incidence = rng.poisson(30, size=(4, 60)).astype(float)
    result = reproduction_number(incidence, gamma_serial_interval(4.7, 2.9), level=0.9)
    ok = np.isfinite(result.estimate)
    # Reference: scipy.stats.gamma.ppf of the posterior gamma(shape, scale = 1/rate).
    lower = stats.gamma.ppf(0.05, result.shape[ok], scale=1 / result.rate[ok])
    upper = stats.gamma.ppf(0.95, result.shape[ok], scale=1 / result.rate[ok])
    assert_allclose(result.lower[ok], lower, rtol=1e-9)
    assert_allclose(result.upper[ok], upper, rtol=1e-9)


def test_reproduction_number_missing_day_blanks_windows_and_history() -> None:
    si = discrete_serial_interval([0.0, 0.5, 0.3, 0.2])  # K = 3 lags
    incidence = np.random.default_rng(51).poisson(20, size=(2, 40)).astype(float)
    incidence[1, 20] = np.nan
    result = reproduction_number(incidence, si, window=5)
    # Day 20 is in the window of end days 20..24 and in the history (3 days) of end days 21..27.
    assert np.all(np.isnan(result.estimate[1, 20:28]))
    assert np.isfinite(result.estimate[1, 19]) and np.isfinite(result.estimate[1, 28])
    assert np.isfinite(result.estimate[0, 20:28]).all()


def test_reproduction_number_light_missing_history_counts_as_zero() -> None:
    si = discrete_serial_interval([0.0, 0.6, 0.39995, 0.00005])
    incidence = np.full((1, 30), 10.0)
    incidence[0, 10] = np.nan
    result = reproduction_number(incidence, si, window=3)
    # Day 10 is at lag 3 (weight 5e-5 <= 1e-4) of day 13 only: Lambda_13 counts it as 0, by hand
    # 0.6*10 + 0.39995*10 = 9.9995; Lambda_11 and Lambda_12 (lags 1 and 2) are blank, so are
    # the windows holding day 10, 11 or 12.
    lam = infectiousness(incidence, si)
    assert_allclose(lam[0, 13], 9.9995)
    assert np.isnan(lam[0, 11:13]).all() and np.isfinite(lam[0, 10])
    assert np.isnan(result.estimate[0, 10:15]).all() and np.isfinite(result.estimate[0, 15])


@pytest.mark.parametrize(
    ("window", "mean", "first"),
    # EpiEstim estimate_R: t_start >= 2 and t_end > mean_si (days counted from 1), so the first
    # 0-based end day is max(window, floor(mean)).
    [(7, 2.0, 7), (3, 5.5, 5), (2, 9.0, 9), (7, 9.5, 9)],
    ids=["window", "mean5.5", "mean-integer", "mean9.5"],
)
def test_reproduction_number_first_estimate_follows_epiestim_rule(
    window: int, mean: float, first: int
) -> None:
    k = int(2 * mean - 1)  # two lags placed symmetrically around the mean
    pmf = np.zeros(k + 1)
    pmf[1] = pmf[k] = 0.5
    si = discrete_serial_interval(pmf)
    assert_allclose(si.mean, mean)
    result = reproduction_number(np.full((1, 30), 5.0), si, window=window)
    assert np.isnan(result.estimate[0, :first]).all()
    assert np.isfinite(result.estimate[0, first:]).all()


def test_reproduction_number_zero_infectiousness_is_nan() -> None:
    incidence = np.zeros((1, 30))
    incidence[0, 25] = 4.0
    result = reproduction_number(incidence, discrete_serial_interval([0.0, 1.0]), window=3)
    # Lambda is exactly 0 up to day 25, so windows ending on days <= 25 are NaN.
    assert np.isnan(result.estimate[0, :26]).all()
    assert np.isfinite(result.estimate[0, 26])


def test_infectiousness_matches_numpy_convolve() -> None:
    si = gamma_serial_interval(4.7, 2.9)
    incidence = np.random.default_rng(52).poisson(50, size=(3, 80)).astype(float)
    lam = infectiousness(incidence, si)
    assert np.isnan(lam[:, 0]).all()  # no history on the first day
    for region in range(3):
        # Reference: numpy.convolve, Lambda_t = sum_k w_k I_{t-k} (0 before the series).
        expected = np.convolve(incidence[region], si.pmf)[:80]
        assert_allclose(lam[region, 1:], expected[1:], rtol=1e-10)


def test_growth_to_reproduction_matches_mgf_quadrature() -> None:
    mean, sd = 5.2, 2.1
    shape, scale = (mean / sd) ** 2, sd**2 / mean
    for r in (-0.1, 0.03, 0.2):
        # Reference: Wallinga & Lipsitch (2007) eq. 2.7, R = 1 / int exp(-r a) g(a) da, by
        # scipy quad of the gamma density.
        mgf = integrate.quad(
            lambda a, r=r: np.exp(-r * a + stats.gamma.logpdf(a, shape, scale=scale)), 0, 200
        )[0]
        assert_allclose(growth_to_reproduction(r, mean, sd), 1 / mgf, rtol=1e-7)


def test_reproduction_to_growth_inverts_growth_to_reproduction() -> None:
    r = np.linspace(-0.15, 0.3, 10)
    assert_allclose(reproduction_to_growth(growth_to_reproduction(r, 4.7, 2.9), 4.7, 2.9), r)


def test_reproduction_to_growth_negative_raises() -> None:
    with pytest.raises(ValueError, match="reproduction: values must be non-negative"):
        reproduction_to_growth([-1.0], 4.7, 2.9)
