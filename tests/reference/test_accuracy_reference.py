"""Weighted interval score against its definition (Bracher et al. 2021, PLoS Comput Biol
17:e1008618) and the scoringrules package (0.10.0).

scoringrules' own ``weighted_interval_score`` is not used: its numpy backend (0.10.0,
core/interval/_score.py) adds ``w_median * median`` where eq. 2 of Bracher et al. has
``w_median * |y - median|`` (y = 10, median 8 gives 2.32 there, 1.12 by the definition). The WIS
is compared through scoringrules' interval score and quantile score instead.
"""

from __future__ import annotations

import numpy as np
import pytest
import scoringrules as sr
from numpy.testing import assert_allclose

from server.indicators.accuracy import weighted_interval_score

# 23 quantiles as in the forecast hubs Bracher et al. (2021) discuss: median and 11 intervals.
ALPHAS = np.array([0.02, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9])


def _random_forecasts(seed: int, n: int) -> tuple[np.ndarray, ...]:
    rng = np.random.default_rng(seed)
    y = rng.poisson(rng.uniform(5, 500, n)).astype(float)
    centre = y * np.exp(rng.normal(0, 0.3, n))
    spread = np.sort(rng.gamma(2.0, 0.2, (n, ALPHAS.size)), axis=1)[:, ::-1]  # wider for small a
    lower = centre[:, None] * np.exp(-spread)
    upper = centre[:, None] * np.exp(spread * rng.uniform(0.5, 1.5, (n, 1)))
    return y, centre, lower, upper


def test_wis_hand_example_from_the_definition() -> None:
    # Bracher et al. (2021) eq. 2 with w_0 = 1/2, w_k = alpha_k / 2, by hand: y = 10, median 8,
    # 50 % interval [6, 11] (IS = 5), 90 % interval [3, 14] (IS = 11):
    # WIS = (0.5 * 2 + 0.25 * 5 + 0.05 * 11) / 2.5 = 2.8 / 2.5 = 1.12.
    res = weighted_interval_score([10.0], [8.0], [[6.0, 3.0]], [[11.0, 14.0]], [0.5, 0.1])
    assert_allclose(res.wis, [1.12])
    # decomposition: dispersion (0.25 * 5 + 0.05 * 11) / 2.5 = 0.72; underprediction
    # 0.5 * (10 - 8) / 2.5 = 0.4 (observation above the median, inside both intervals)
    assert_allclose(res.dispersion, [0.72])
    assert_allclose(res.underprediction, [0.4])
    assert_allclose(res.overprediction, [0.0])


def test_wis_hand_example_observation_outside_intervals() -> None:
    # y = 2 below both intervals: IS_0.5 = 5 + (2/0.5)(6 - 2) = 21, IS_0.1 = 11 + 20 * 1 = 31;
    # WIS = (0.5 * 6 + 0.25 * 21 + 0.05 * 31) / 2.5 = 9.8 / 2.5 = 3.92, all but 0.72 overprediction
    res = weighted_interval_score([2.0], [8.0], [[6.0, 3.0]], [[11.0, 14.0]], [0.5, 0.1])
    assert_allclose(res.wis, [3.92])
    assert_allclose(res.overprediction, [3.2])


def test_interval_parts_equal_scoringrules_interval_score() -> None:
    # scoringrules.interval_score is Gneiting & Raftery's (2007) IS_alpha; WIS with one interval
    # and the median equal to the observation is (alpha/2) IS_alpha / 1.5.
    y, _, lower, upper = _random_forecasts(7, 500)
    for k, alpha in enumerate(ALPHAS):
        ref = sr.interval_score(y, lower[:, k], upper[:, k], alpha, backend="numpy")
        res = weighted_interval_score(y, y, lower[:, k : k + 1], upper[:, k : k + 1], [alpha])
        assert_allclose(res.wis, alpha / 2 * ref / 1.5, rtol=1e-12)


def test_wis_equals_mean_quantile_score_from_scoringrules() -> None:
    # Bracher et al. (2021) [memory of where it is stated]: with w_k = alpha_k / 2 the WIS is the
    # mean of the 2K + 1 quantile (pinball) scores times 2; quantile scores by
    # scoringrules.quantile_score (Koenker & Bassett 1978). Random cases, observations inside and
    # outside the intervals.
    y, median, lower, upper = _random_forecasts(2021, 1000)
    res = weighted_interval_score(y, median, lower, upper, ALPHAS)
    levels = [*(ALPHAS / 2), 0.5, *(1 - ALPHAS / 2)]
    forecasts = [*lower.T, median, *upper.T]
    pinball = sum(
        sr.quantile_score(y, q, tau, backend="numpy")
        for q, tau in zip(forecasts, levels, strict=True)
    )
    assert_allclose(res.wis, 2 * pinball / (2 * ALPHAS.size + 1), rtol=1e-10)
    assert_allclose(res.wis, res.dispersion + res.underprediction + res.overprediction)


def test_wis_missing_input_is_nan_and_crossing_bounds_raise() -> None:
    res = weighted_interval_score([np.nan, 3.0], [2.0, 2.0], [[1.0], [1.0]], [[4.0], [4.0]], [0.2])
    assert np.isnan(res.wis[0]) and np.isfinite(res.wis[1])
    with pytest.raises(ValueError, match="upper: below lower at index"):
        weighted_interval_score([3.0], [2.0], [[4.0]], [[1.0]], [0.2])
    with pytest.raises(ValueError, match="alphas: expected levels in"):
        weighted_interval_score([3.0], [2.0], [[1.0]], [[4.0]], [1.5])
