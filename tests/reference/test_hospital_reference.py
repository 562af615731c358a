"""ICU projection against numpy/scipy and Little's law; length of stay against scipy.stats."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import signal, stats

from server.indicators.hospital import length_of_stay, project_icu


def test_projection_new_patients_equal_numpy_convolve() -> None:
    # new-admission occupancy O_h = sum_s A_s S(h-s): a discrete convolution (numpy.convolve)
    los = length_of_stay(median=7.0, quartiles=(4.0, 11.0))
    a0, r, horizon = np.array([3.0, 7.5]), np.array([0.04, -0.02]), 21
    res = project_icu(a0, [0.0, 0.0], [50.0, 50.0], r, r, r, los=los, horizon=horizon)
    for i in range(2):
        adm = a0[i] * np.exp(r[i] * np.arange(horizon + 1))
        adm[0] = 0.0  # today's admissions are inside today's occupancy
        ref = np.convolve(adm, los.survival)[: horizon + 1]
        assert_allclose(res.estimate[i], ref, rtol=1e-12, atol=1e-12)


def test_projection_equals_scipy_fftconvolve() -> None:
    # same convolution through scipy.signal.fftconvolve
    los = length_of_stay(distribution="gamma")
    adm = 4.0 * np.exp(0.03 * np.arange(15))
    adm[0] = 0.0
    res = project_icu([4.0], [0.0], [30.0], [0.03], [0.03], [0.03], los=los, horizon=14)
    ref = signal.fftconvolve(adm, los.survival)[:15]
    assert_allclose(res.estimate[0], ref, rtol=1e-9, atol=1e-9)


@pytest.mark.parametrize("admissions", [0.5, 4.0, 12.0], ids=["A0.5", "A4", "A12"])
def test_constant_admissions_reach_littles_law_occupancy(admissions: float) -> None:
    # Little's law (Little 1961, Oper Res 9:383): occupancy -> arrival rate x mean stay
    los = length_of_stay(max_days=60)
    res = project_icu([admissions], [0.0], [100.0], [0.0], [0.0], [0.0], los=los, horizon=120)
    assert_allclose(res.estimate[0, -1], admissions * los.mean, rtol=1e-12)


def test_steady_state_occupancy_stays_put_with_residual_discharge() -> None:
    # Little's law steady state L = lambda W (Little 1961) is a fixed point of the projection
    los = length_of_stay()
    occ = 5.0 * los.mean
    res = project_icu([5.0], [occ], [100.0], [0.0], [0.0], [0.0], los=los, horizon=21)
    assert_allclose(res.estimate[0], occ, rtol=1e-12)


@pytest.mark.parametrize(
    ("distribution", "median", "quartiles"),
    [("lognormal", 8.0, (5.0, 13.0)), ("gamma", 7.0, (4.0, 11.0))],
    ids=["lognormal-china", "gamma-elsewhere"],
)
def test_length_of_stay_matches_published_median(
    distribution: str, median: float, quartiles: tuple[float, float]
) -> None:
    # ICU stay median 8 (IQR 5-13) in China, 7 (4-11) elsewhere (Rees et al. 2020, BMC Med
    # 18:270); census days L = ceil(X), so P(L <= m) = F(m) and the discrete median is m
    los = length_of_stay(distribution=distribution, median=median, quartiles=quartiles)  # type: ignore[arg-type]
    cdf = np.cumsum(los.pmf)
    assert int(np.searchsorted(cdf, 0.5)) == int(median)
    assert_allclose(cdf[int(median)], 0.5, atol=1e-12)  # F(m) = 1/2: nothing renormalised


def test_lognormal_length_of_stay_quartile_ratio_matches_scipy() -> None:
    # sigma = ln(q3/q1) / (2 z_0.75): check the fitted law with scipy.stats.lognorm
    los = length_of_stay(median=8.0, quartiles=(5.0, 13.0), max_days=400)
    sigma = np.log(13.0 / 5.0) / (2 * stats.norm.ppf(0.75))
    ref = stats.lognorm(s=sigma, scale=8.0)
    k = np.arange(1, 31)
    assert_allclose(los.pmf[1:31], ref.cdf(k) - ref.cdf(k - 1), rtol=1e-6, atol=1e-12)
    assert_allclose(los.mean, sum(ref.sf(np.arange(400))), rtol=1e-6)


@pytest.mark.parametrize("current", ["residual", "survival"])
def test_projection_equals_direct_sum_with_untruncated_length_of_stay(current: str) -> None:
    # Direct sum with the untruncated lognormal stay (scipy.stats.lognorm.sf; census days
    # L = ceil(X), so P(L > k) = P(X > k)) over 200 000 days, median 8, IQR 5-13 (Rees et al.
    # 2020, BMC Med 18:270): O_h = O_0 R(h) + sum_{s=1}^{h} A_0 e^{rs} S(h - s), R(h) = S(h)
    # ("survival") or sum_{j>=h} S(j) / sum_{j>=0} S(j) ("residual").
    dist = stats.lognorm(s=np.log(13.0 / 5.0) / (2 * stats.norm.ppf(0.75)), scale=8.0)
    sf = dist.sf(np.arange(200_000.0))
    horizon, a0, o0, r = 21, 6.0, 70.0, 0.03
    tail = np.cumsum(sf[::-1])[::-1]
    remain = sf[: horizon + 1] if current == "survival" else tail[: horizon + 1] / tail[0]
    expected = np.array([
        o0 * remain[h] + sum(a0 * np.exp(r * s) * sf[h - s] for s in range(1, h + 1))
        for h in range(horizon + 1)
    ])
    res = project_icu([a0], [o0], [100.0], [r], [r], [r], los=length_of_stay(), horizon=horizon,
                      current_patients=current)  # type: ignore[arg-type]
    assert_allclose(res.estimate[0], expected, rtol=1e-9)


def test_default_length_of_stay_mean_equals_untruncated_mean() -> None:
    # E[L] = sum_{k>=0} P(X > k) with scipy's lognormal survival function: 10.781 days, where the
    # former 90-day cut with renormalisation gave 10.750.
    dist = stats.lognorm(s=np.log(13.0 / 5.0) / (2 * stats.norm.ppf(0.75)), scale=8.0)
    expected = dist.sf(np.arange(200_000.0)).sum()
    assert_allclose(length_of_stay().mean, expected, rtol=1e-9)
    assert_allclose(expected, 10.781, atol=5e-4)
    assert_allclose(length_of_stay(max_days=90).mean, 10.750, atol=5e-4)
