"""Reference checks for EARS and the improved Farrington method against their definitions."""

from __future__ import annotations

import statistics

import numpy as np
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats

from server.indicators.aberration import ears, farrington_flexible

# Hand-computed series. Days 0..6 = 4, 6, 5, 7, 3, 5, 5 (C1 baseline of day 7):
#   mean = 35 / 7 = 5; squared deviations 1+1+0+4+4+0+0 = 10; sample sd = sqrt(10 / 6) = 1.29099.
# EARS uses the sample sd (ddof = 1) (Hutwagner et al. 2003; Fricker et al. 2008) [memory].
SERIES = [4.0, 6.0, 5.0, 7.0, 3.0, 5.0, 5.0, 12.0, 6.0, 5.0, 14.0]


def test_ears_c1_hand_computed_day_seven() -> None:
    result = ears(SERIES, method="C1")
    # C1_7 = (12 - 5) / sqrt(10/6) = 5.42218 (hand computation above)
    assert_allclose(result.expected[0, 7], 5.0)
    assert_allclose(result.sd[0, 7], np.sqrt(10.0 / 6.0))
    assert_allclose(result.statistic[0, 7], 7.0 / np.sqrt(10.0 / 6.0))
    assert bool(result.alarm[0, 7])


def test_ears_c1_sd_matches_statistics_stdev() -> None:
    result = ears(SERIES, method="C1")
    # Day 10: baseline days 3..9 = 7, 3, 5, 5, 12, 6, 5; Python's statistics.stdev is the sample sd.
    baseline = SERIES[3:10]
    assert_allclose(result.expected[0, 10], statistics.mean(baseline))
    assert_allclose(result.sd[0, 10], statistics.stdev(baseline))


def test_ears_c2_uses_two_day_guard_band() -> None:
    result = ears(SERIES, method="C2")
    # Day 10: C2 baseline t-9..t-3 = days 1..7 = 6, 5, 7, 3, 5, 5, 12: mean 43/7, numpy sample sd
    baseline = np.array(SERIES[1:8])
    expected = (14.0 - baseline.mean()) / baseline.std(ddof=1)
    assert_allclose(result.statistic[0, 10], expected)


def test_ears_c3_sums_three_days_of_c2_excess() -> None:
    series = [5.0, 5.0, *SERIES]  # two more days so that C2 exists on days 9, 10 and 11
    c2 = ears(series, method="C2").statistic[0]
    c3 = ears(series, method="C3").statistic[0]
    # C3_t = sum_{j=0..2} max(0, C2_{t-j} - 1) (Hutwagner et al. 2003)
    manual = sum(max(0.0, c2[12 - j] - 1.0) for j in range(3))
    assert manual > 0.0
    assert_allclose(c3[12], manual)


def _farrington_by_statsmodels(y: np.ndarray, t0: int, years: int) -> tuple[float, float]:
    """Noufaily et al. (2013) expected count and dispersion, built with statsmodels GLM."""
    weeks = np.arange(t0 - 52 * years - 3, t0 - 26)
    offset = (weeks - t0) % 52
    level = np.where((offset <= 3) | (offset >= 49), 0, 1 + (offset - 4) // 5)  # 45 weeks / 9
    x = np.column_stack(
        [np.ones(weeks.size), weeks - t0] + [(level == k).astype(float) for k in range(1, 10)]
    )
    yb = y[weeks]
    first = sm.GLM(yb, x, family=sm.families.Poisson()).fit(scale="X2")
    mu = first.mu
    phi = max(1.0, first.pearson_chi2 / first.df_resid)
    hat = first.get_influence().hat_matrix_diag
    s = 1.5 * (yb ** (2 / 3) - mu ** (2 / 3)) / (mu ** (1 / 6) * np.sqrt(phi * (1 - hat)))
    omega = np.where(s > 2.58, s**-2.0, 1.0)  # Noufaily et al. (2013): threshold 2.58
    omega *= yb.size / omega.sum()
    second = sm.GLM(yb, x, family=sm.families.Poisson(), var_weights=omega).fit(scale="X2")
    phi2 = max(1.0, float(np.sum(omega * (yb - second.mu) ** 2 / second.mu)) / second.df_resid)
    return float(np.exp(second.params[0])), phi2


def test_farrington_expected_matches_statsmodels_glm() -> None:
    rng = np.random.default_rng(20130401)
    weeks = np.arange(52 * 4 + 10)
    mu = 40.0 * np.exp(-0.004 * weeks + 0.4 * np.sin(2 * np.pi * weeks / 52))  # falling trend
    y = rng.poisson(mu).astype(float)
    y[60] += 60.0  # a past outbreak, down-weighted by the reweighting step
    t0 = weeks.size - 1
    result = farrington_flexible(y[None, :], years_back=3, min_years=3)
    assert bool(result.trend[0, t0])
    mu0, phi = _farrington_by_statsmodels(y, t0, years=3)
    assert_allclose(result.expected[0, t0], mu0, rtol=1e-6)
    assert_allclose(result.dispersion[0, t0], phi, rtol=1e-6)


def test_farrington_upper_is_negative_binomial_quantile() -> None:
    rng = np.random.default_rng(7)
    y = rng.negative_binomial(5, 5 / (5 + 20.0), size=(1, 52 * 3 + 5)).astype(float)
    result = farrington_flexible(y, years_back=2)
    t0 = y.shape[1] - 1
    mu0, phi = result.expected[0, t0], result.dispersion[0, t0]
    assert phi > 1.0
    # Noufaily et al. (2013): NB with mean mu0 and variance phi mu0, 99.5 % quantile [memory]
    assert_allclose(result.upper[0, t0], stats.nbinom.ppf(0.995, mu0 / (phi - 1), 1 / phi))


def test_farrington_false_alarm_rate_near_nominal_on_stable_poisson() -> None:
    rng = np.random.default_rng(1996)
    weeks = np.arange(52 * 6)
    mu = 12.0 * np.exp(0.5 * np.sin(2 * np.pi * weeks / 52))
    y = rng.poisson(mu, size=(25, weeks.size)).astype(float)
    result = farrington_flexible(y)
    rate = result.alarm[:, 52 * 5 :].mean()
    # nominal one-sided level 0.005 (Noufaily et al. 2013); allow estimation noise up to 0.02
    assert rate < 0.02


def test_farrington_flags_injected_outbreak() -> None:
    rng = np.random.default_rng(1206)
    weeks = np.arange(52 * 6)
    mu = 12.0 * np.exp(0.5 * np.sin(2 * np.pi * weeks / 52))
    y = rng.poisson(mu, size=(10, weeks.size)).astype(float)
    y[:, -8] += 4.0 * np.sqrt(mu[-8]) * 3  # about 12 standard deviations above the mean
    result = farrington_flexible(y)
    assert result.alarm[:, -8].all()
    assert (result.exceedance[:, -8] > 1.0).all()


def _farrington_flat_by_statsmodels(y: np.ndarray, t0: int) -> tuple[float, float]:
    """Noufaily et al. (2013) without trend (two years of history), with statsmodels GLM."""
    weeks = np.arange(t0 - 52 * 2 - 3, t0 - 26)
    offset = (weeks - t0) % 52
    level = np.where((offset <= 3) | (offset >= 49), 0, 1 + (offset - 4) // 5)
    x = np.column_stack([np.ones(weeks.size)] + [(level == k).astype(float) for k in range(1, 10)])
    yb = y[weeks]
    first = sm.GLM(yb, x, family=sm.families.Poisson()).fit(scale="X2")
    phi = max(1.0, first.pearson_chi2 / (weeks.size - 10))
    hat = first.get_influence().hat_matrix_diag
    mu = first.mu
    s = 1.5 * (yb ** (2 / 3) - mu ** (2 / 3)) / (mu ** (1 / 6) * np.sqrt(phi * (1 - hat)))
    omega = np.where(s > 2.58, s**-2.0, 1.0)
    omega *= yb.size / omega.sum()
    second = sm.GLM(yb, x, family=sm.families.Poisson(), var_weights=omega).fit()
    pearson = float(np.sum(omega * (yb - second.mu) ** 2 / second.mu))
    return float(np.exp(second.params[0])), max(1.0, pearson / (weeks.size - 10))


def test_farrington_batched_weeks_match_statsmodels_per_week() -> None:
    # every (region, week) fit of the batch equals its own statsmodels GLM fit (Noufaily 2013)
    rng = np.random.default_rng(2013)
    weeks = np.arange(52 * 2 + 12)
    mu = rng.uniform(5, 60, (3, 1)) * np.exp(0.3 * np.cos(2 * np.pi * weeks / 52))
    y = rng.negative_binomial(6, 6 / (6 + mu)).astype(float)
    y[1, 40] += 50.0
    result = farrington_flexible(y)
    for region in range(3):
        for t0 in (52 * 2 + 3, 52 * 2 + 7, 52 * 2 + 11):
            mu0, phi = _farrington_flat_by_statsmodels(y[region], t0)
            assert_allclose(result.expected[region, t0], mu0, rtol=1e-8)
            assert_allclose(result.dispersion[region, t0], phi, rtol=1e-8)


# ------------------------------------------------------------------ earsC (R package surveillance)
# R cannot run here. The values below are computed by hand from earsC's documented formulas
# (help page earsC.Rd, Salmon et al. 2016 J Stat Softw 70(10)) and, for C3, from its code
# (R/earsC.R, where the bound differs from the help page): z = qnorm(1 - alpha) with alpha
# 0.001 (C1, C2) and 0.025 (C3); minSigma 0; alarm when observed > upperbound.


def test_ears_surveillance_c1_upper_is_mean_plus_z_sd() -> None:
    result = ears(SERIES, method="C1", definition="surveillance")
    # help page: U1(t) = mean + z_{1-alpha} S1(t); day 7: 5 + qnorm(0.999) sqrt(10/6) = 8.98948
    z = stats.norm.ppf(0.999)
    assert_allclose(result.threshold, 3.090232306, rtol=1e-9)
    assert_allclose(result.upper[0, 7], 5.0 + z * np.sqrt(10.0 / 6.0))
    assert_allclose(result.upper[0, 7], 8.98948, atol=1e-5)
    assert bool(result.alarm[0, 7])
    assert result.sd_floor == 0.0


def test_ears_surveillance_flat_baseline_alarms_above_the_mean() -> None:
    # minSigma = 0 (earsC default): a flat baseline has U1 = mean, so 6 > 5 alarms, 5 does not
    result = ears([[5.0] * 7 + [6.0], [5.0] * 8], method="C1", definition="surveillance")
    assert result.alarm[0, 7] and not result.alarm[1, 7]
    assert_allclose(result.upper[:, 7], 5.0)
    # the CDC definition floors the sd at 0.2: upper 5 + 3 * 0.2 = 5.6, so 6 alarms there too
    assert_allclose(ears([5.0] * 7 + [6.0], method="C1").upper[0, 7], 5.6)


SPIKE = [4.0, 6.0, 5.0, 7.0, 3.0, 5.0, 5.0, 4.0, 6.0, 5.0, 5.0, 30.0, 5.0, 2.0]


def _c2_by_hand(y: list[float], t: int) -> tuple[float, float, float]:
    base = y[t - 9 : t - 2]  # days t-9 .. t-3
    m, s = statistics.mean(base), statistics.stdev(base)
    return (y[t] - m) / s, m, s


def test_ears_c3_cdc_alarms_on_the_spike_day_surveillance_on_the_next() -> None:
    cdc = ears(SPIKE, method="C3")
    surv = ears(SPIKE, method="C3", definition="surveillance")
    z = stats.norm.ppf(0.975)  # 1.95996, earsC's C3 default (alpha 0.025)
    # day 11 (the spike): C2_11 = (30 - 5) / 1.2910 = 19.4; C2_9, C2_10 below 1, so P_11 = 0.
    c2 = {t: _c2_by_hand(SPIKE, t) for t in (9, 10, 11, 12)}
    p11 = max(0.0, c2[10][0] - 1) + max(0.0, c2[9][0] - 1)
    assert p11 == 0.0
    # CDC (Fricker et al. 2008): C3_11 = sum of three days' excess = C2_11 - 1 > 2: alarm.
    assert_allclose(cdc.statistic[0, 11], c2[11][0] - 1.0)
    assert bool(cdc.alarm[0, 11])
    # earsC code: upper_11 = max(0, y_11 + S2(11) (z - P_11)) = 30 + 1.291 z > 30: no alarm.
    assert_allclose(surv.upper[0, 11], 30.0 + c2[11][2] * z)
    assert not surv.alarm[0, 11]
    # day 12: P_12 = max(0, C2_11 - 1) + max(0, C2_10 - 1) > z and y_12 = 5 > 0: earsC alarms,
    # with upper_12 = max(0, 5 + S2(12) (z - P_12)) = 0 here.
    p12 = max(0.0, c2[11][0] - 1) + max(0.0, c2[10][0] - 1)
    assert_allclose(surv.statistic[0, 12], p12)
    assert_allclose(surv.upper[0, 12], max(0.0, 5.0 + c2[12][2] * (z - p12)))
    assert bool(surv.alarm[0, 12])
