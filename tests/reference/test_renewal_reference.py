"""Cori et al. (2013) posterior and the Wallinga & Lipsitch (2007) r-R relation."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from server.indicators.renewal import reproduction_number
from server.indicators.serial_interval import (
    discrete_serial_interval,
    gamma_serial_interval,
    growth_to_reproduction,
    growth_to_reproduction_discrete,
)


def test_cori_posterior_closed_form_hand_example() -> None:
    si = discrete_serial_interval([0.0, 0.25, 0.5, 0.25])
    incidence = np.array([[10.0, 12.0, 9.0, 14.0, 16.0, 20.0]])
    result = reproduction_number(incidence, si, window=3, prior_mean=2.0, prior_sd=1.0)
    # By hand, Cori et al. (2013) eq. 2 and Web Appendix 1 (posterior gamma):
    # prior shape (2/1)^2 = 4, scale 1/2, so prior rate 2.
    # Lambda_3 = .25*9 + .5*12 + .25*10 = 10.75; Lambda_4 = .25*14 + .5*9 + .25*12 = 11.0;
    # Lambda_5 = .25*16 + .5*14 + .25*9 = 13.25.
    # Window 3..5: shape 4 + 14 + 16 + 20 = 54; rate 2 + 10.75 + 11 + 13.25 = 37.
    assert_allclose(result.shape[0, 5], 54.0)
    assert_allclose(result.rate[0, 5], 37.0)
    assert_allclose(result.estimate[0, 5], 54 / 37)
    assert_allclose(result.cv[0, 5], 1 / np.sqrt(54))
    # Quantiles of gamma(54, scale 1/37), scipy.stats.gamma.ppf.
    assert_allclose(result.lower[0, 5], stats.gamma.ppf(0.025, 54, scale=1 / 37))
    assert_allclose(result.upper[0, 5], stats.gamma.ppf(0.975, 54, scale=1 / 37))
    assert np.isnan(result.estimate[0, :5]).all()


@pytest.mark.parametrize("r", [0.1, -0.05, 0.02], ids=["grow", "decline", "slow"])
def test_cori_estimate_on_exponential_series_converges_to_wallinga_lipsitch(r: float) -> None:
    si = gamma_serial_interval(4.7, 2.9)
    t = np.arange(90, dtype=np.float64)
    incidence = 1e9 * np.exp(r * t)[np.newaxis, :]
    result = reproduction_number(incidence, si)
    # Discrete analogue of Wallinga & Lipsitch (2007) eq. 2.7: R = 1 / sum_k w_k exp(-r k),
    # with the same discretised serial interval; with I_0 = 1e9 the prior's pull is < 1e-7.
    expected = 1.0 / np.sum(si.pmf * np.exp(-r * np.arange(si.pmf.size)))
    assert_allclose(result.estimate[0, -30:], expected, rtol=1e-6)
    assert_allclose(growth_to_reproduction_discrete(r, si), expected)


@pytest.mark.parametrize(
    ("r", "expected"),
    # Gamma generation interval, mean 4.7, sd 2.9 (Nishiura et al. 2020 [memory of which fit]):
    # R = (1 + r * scale)^shape, Wallinga & Lipsitch (2007); values from REFERENCES.md.
    [(0.1, 1.5409), (-0.05, 0.7818)],
    ids=["r0.1", "r-0.05"],
)
def test_growth_to_reproduction_gamma_formula(r: float, expected: float) -> None:
    assert_allclose(np.round(growth_to_reproduction(r, 4.7, 2.9), 4), expected)
