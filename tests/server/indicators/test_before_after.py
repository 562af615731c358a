"""Tests for server.indicators.before_after.

References: statsmodels GLM (Poisson family; quasi-Poisson through ``scale="X2"``, the Pearson
dispersion, McCullagh & Nelder 1989, 4.5) fitted to the same two windows with an independently
built design (pandas/patsy-free: numpy columns written out here); Wallinga & Lipsitch (2007)
eq. 2.7 through the closed form R = (1 + r*scale)^shape for a gamma interval, and the check values
in /work/shared/REFERENCES.md (gamma mean 4.7, sd 2.9: r = 0.1 -> R = 1.5409).
"""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import optimize, stats

from server.indicators.before_after import before_after
from server.indicators.serial_interval import gamma_serial_interval


def _statsmodels_fit(y: np.ndarray, first: int, window: int, gap: int, *, dow: bool,
                     scale: str | float):
    """The same model built column by column and fitted by statsmodels."""
    days = np.concatenate([first + np.arange(window), first + window + gap + np.arange(window)])
    after = np.r_[np.zeros(window), np.ones(window)]
    t = np.r_[np.arange(window), np.arange(window)] - (window - 1) / 2
    cols = [1 - after, after, t * (1 - after), t * after]
    if dow:
        cols += [(days % 7 == d).astype(float) for d in range(1, 7)]
    x = np.column_stack(cols)
    keep = np.isfinite(y)
    return sm.GLM(y[keep], x[keep], family=sm.families.Poisson()).fit(scale=scale, tol=1e-13)


def _series(seed: int, days: int, kink: int, rb: float, ra: float, level: float = 40.0,
            size: float | None = None) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(days)
    log_mu = np.log(level) + np.where(t < kink, rb * (t - kink), ra * (t - kink))
    log_mu += np.log([1.0, 1.1, 1.05, 1.0, 0.95, 0.7, 0.6])[t % 7]
    mu = np.exp(log_mu)
    if size is None:
        return rng.poisson(mu).astype(float)
    return rng.negative_binomial(size, size / (size + mu)).astype(float)


@pytest.mark.parametrize("seed,dow,missing", [(1, True, False), (2, True, True), (3, False, False),
                                              (4, False, True)],
                         ids=["dow", "dow-missing", "plain", "plain-missing"])
def test_before_after_matches_statsmodels_quasipoisson(seed: int, dow: bool, missing: bool) -> None:
    # Reference: statsmodels GLM Poisson, scale="X2" (quasi-Poisson Pearson dispersion).
    y = _series(seed, 80, 40, 0.05, -0.04, size=20.0)
    if missing:
        y[30] = np.nan
        y[55] = np.nan
    res = before_after(y, [0], [35], window=14, delay=7, transition=7, lead=3, day_of_week=dow,
                       clamp_dispersion=False)
    assert res.status[0] == "ready"
    first = 35 + 7 - 3 - 14  # before window ends lead = 3 days before event + delay
    seg = np.concatenate([y[first:first + 14], y[first + 24:first + 38]])
    ref = _statsmodels_fit(seg, first, 14, 10, dow=dow, scale="X2")
    assert_allclose(res.r_before[0], ref.params[2], rtol=1e-6, atol=1e-9)
    assert_allclose(res.r_after[0], ref.params[3], rtol=1e-6, atol=1e-9)
    assert_allclose(res.dispersion[0], ref.scale, rtol=1e-6)
    cov = ref.cov_params()
    se = np.sqrt(cov[3, 3] + cov[2, 2] - 2 * cov[2, 3])
    # Estimated dispersion: Student t on the residual degrees of freedom (R's summary.glm).
    z = stats.t.ppf(0.975, ref.df_resid)
    assert_allclose(res.r_change[0], ref.params[3] - ref.params[2], rtol=1e-6, atol=1e-9)
    assert_allclose(res.std_error_change[0], se, rtol=1e-6)
    assert_allclose(res.r_change_lower[0], ref.params[3] - ref.params[2] - z * se, rtol=1e-6,
                    atol=1e-9)
    se_b = np.sqrt(cov[2, 2])
    assert_allclose([res.r_before_lower[0], res.r_before_upper[0]],
                    [ref.params[2] - z * se_b, ref.params[2] + z * se_b], rtol=1e-6, atol=1e-9)


def test_before_after_poisson_matches_statsmodels_scale_one() -> None:
    # Reference: statsmodels GLM Poisson with scale 1.
    y = _series(7, 70, 35, -0.02, 0.03)
    res = before_after(y, [0], [30], dispersion="poisson")
    ref = _statsmodels_fit(np.r_[y[20:34], y[44:58]], 20, 14, 10, dow=True, scale=1.0)
    assert_allclose([res.r_before[0], res.r_after[0]], ref.params[2:4], rtol=1e-6)
    lo, hi = ref.conf_int()[3]
    assert_allclose([res.r_after_lower[0], res.r_after_upper[0]], [lo, hi], rtol=1e-6)


def test_before_after_rt_through_wallinga_lipsitch() -> None:
    # Reference: Wallinga & Lipsitch (2007) eq. 2.7, R = (1 + r*scale)^shape; gamma mean 4.7,
    # sd 2.9 (REFERENCES.md check value: r = 0.1 -> R = 1.5409).
    t = np.arange(60)
    y = np.round(50 * np.exp(np.where(t < 30, 0.1 * (t - 30), -0.05 * (t - 30))) * 100) / 100
    res = before_after(y * 1000, [0], [30 - 4], day_of_week=False, dispersion="poisson")
    assert_allclose(res.r_before[0], 0.1, atol=2e-4)
    shape, scale = (4.7 / 2.9) ** 2, 2.9**2 / 4.7
    assert_allclose(res.rt_before[0], (1 + res.r_before[0] * scale) ** shape, rtol=1e-12)
    assert_allclose((1 + 0.1 * scale) ** shape, 1.5409, atol=1e-4)
    assert_allclose(res.rt_ratio[0], res.rt_after[0] / res.rt_before[0], rtol=1e-12)


def test_before_after_too_early_names_the_day() -> None:
    y = _series(3, 50, 25, 0.0, 0.0)
    res = before_after(y, [0, 0], [30, 2])
    # event day 30: after window 30+7+7 .. +14, last day 57 > 49 -> too early until day 57;
    # event day 2: before window would start at 2 + 7 - 3 - 14 < 0.
    assert list(res.status) == ["too_early", "no_history"]
    assert res.ready_day[0] == 30 + 7 + 7 + 14 - 1
    assert np.isnan(res.r_change[0])


def test_before_after_refuses_a_window_without_cases() -> None:
    y = _series(5, 70, 35, 0.0, 0.0)
    y[44:58] = 0.0  # the after window of an event on day 30
    res = before_after(y, [0], [30])
    assert res.status[0] == "unfit"


def test_before_after_refuses_bad_arguments() -> None:
    with pytest.raises(ValueError, match="delay: expected a whole number"):
        before_after(np.ones(60), [0], [10], delay=-1)
    with pytest.raises(ValueError, match="region: row indices"):
        before_after(np.ones(60), [1], [10])


def test_before_after_interval_coverage_on_step_changes() -> None:
    # Coverage of the 95 % intervals (t quantiles for the estimated dispersion) on simulated
    # step changes whose truth is known: 800 events,
    # growth r_b ~ U(-0.08, 0.08) before and r_a ~ U(-0.08, 0.08) after the kink at
    # event + delay, negative-binomial counts (size 30) with day-of-week effects. Nominal 0.95;
    # binomial sd sqrt(.95*.05/800) = 0.0077, so 0.92..0.975 allows > 3 sd.
    rng = np.random.default_rng(2026)
    n, days = 800, 80
    rb, ra = rng.uniform(-0.08, 0.08, n), rng.uniform(-0.08, 0.08, n)
    t = np.arange(days)
    kink = 40
    log_mu = np.log(60) + np.where(t < kink, rb[:, None] * (t - kink), ra[:, None] * (t - kink))
    log_mu += np.log([1.0, 1.1, 1.05, 1.0, 0.95, 0.7, 0.6])[t % 7]
    mu = np.exp(log_mu)
    y = rng.negative_binomial(30, 30 / (30 + mu)).astype(float)
    res = before_after(y, np.arange(n), np.full(n, kink - 7), transition=0, lead=0)
    assert (res.status == "ready").all()
    cover = (res.r_change_lower <= ra - rb) & (ra - rb <= res.r_change_upper)
    cover_b = (res.r_before_lower <= rb) & (rb <= res.r_before_upper)
    shape, scale = (4.7 / 2.9) ** 2, 2.9**2 / 4.7
    ratio = ((1 + ra * scale) / (1 + rb * scale)) ** shape
    cover_ratio = (res.rt_ratio_lower <= ratio) & (ratio <= res.rt_ratio_upper)
    for c in (cover, cover_b, cover_ratio):
        assert 0.92 <= c.mean() <= 0.975, c.mean()


def test_before_after_coverage_with_delays_and_default_windows() -> None:
    # Infections from the renewal equation with R stepping at the event (R ~ U(0.7, 1.4) before
    # and after; gamma generation interval mean 4.7, sd 2.9), reported after a log-normal
    # incubation (median 5.1 d, 97.5 % within 11.5 d: Lauer et al. 2020) plus 2 days; Poisson
    # counts. Truth: the Euler-Lotka growth rates of the two R (Wallinga & Lipsitch 2007), via
    # scipy's brentq on 1/M(-r) = R, independent of the closed form used by the estimator.
    rng = np.random.default_rng(77)
    n, days, event = 600, 150, 95
    w = gamma_serial_interval(4.7, 2.9).pmf
    r_b, r_a = rng.uniform(0.7, 1.4, n), rng.uniform(0.7, 1.4, n)
    shape, scale = (4.7 / 2.9) ** 2, 2.9**2 / 4.7

    def growth(big_r: float) -> float:
        return optimize.brentq(lambda r: (1 + r * scale) ** -shape - 1 / big_r, -0.3, 0.5)

    rb = np.array([growth(v) for v in r_b])
    ra = np.array([growth(v) for v in r_a])
    inf = np.zeros((n, days))
    inf[:, :10] = 200.0 * np.exp(rb[:, None] * (np.arange(10) - 9))
    for t in range(10, days):
        k = min(t, w.size - 1)
        lam = (inf[:, t - k:t][:, ::-1] * w[1:k + 1]).sum(axis=1)
        inf[:, t] = np.where(t < event, r_b, r_a) * lam
    sigma = np.log(11.5 / 5.1) / stats.norm.ppf(0.975)
    delay = np.diff(np.r_[0.0, stats.lognorm.cdf(np.arange(40) + 0.5 - 2, sigma, scale=5.1)])
    expected = np.stack([np.convolve(row, delay / delay.sum())[:days] for row in inf])
    y = rng.poisson(expected).astype(float)
    res = before_after(y, np.arange(n), np.full(n, event), day_of_week=False)
    ok = res.status == "ready"  # a fading epidemic (R 0.7 twice) may leave a window empty
    assert ok.mean() >= 0.98
    cover = ((res.r_change_lower <= ra - rb) & (ra - rb <= res.r_change_upper))[ok]
    cover_b = ((res.r_before_lower <= rb) & (rb <= res.r_before_upper))[ok]
    cover_a = ((res.r_after_lower <= ra) & (ra <= res.r_after_upper))[ok]
    # Nominal 0.95; binomial sd sqrt(.95*.05/600) = 0.009. Measured 0.97 in the bench: the
    # clamp max(phi, 1) widens Poisson-noise intervals a little (common practice, no source).
    for c in (cover, cover_b, cover_a):
        assert 0.92 <= c.mean() <= 0.99, c.mean()
