"""Change points: recovery of known breaks, missing days, argument errors."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from server.indicators._segmentation import hinge_scan, line_design, scan_kinks
from server.indicators.changepoints import (
    block_dispersion,
    detect_changepoints,
    fit_kinks,
    fit_piecewise,
    screen_breaks,
)

WEEKDAY = np.array([0.0, 0.1, 0.05, 0.0, -0.1, -0.4, -0.6])


def _two_regimes(seed: int, n: int = 160, brk: int = 80, base: float = 100.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    eta = np.where(t < brk, np.log(base) + 0.03 * t,
                   np.log(base) + 0.03 * brk - 0.25 - 0.04 * (t - brk))
    return rng.poisson(np.exp(eta + WEEKDAY[t % 7])).astype(float)


def test_detect_changepoints_finds_a_clear_break() -> None:
    # a jump and a change of slope: the step model (a line per segment)
    res = detect_changepoints(_two_regimes(1), shape="step")
    assert res.n_breaks[0] == 1
    assert abs(res.breaks[0, 0] - 80) <= 2
    assert res.break_lower[0, 0] <= res.breaks[0, 0] <= res.break_upper[0, 0]
    assert res.growth_lower[0, 0] < 0.03 < res.growth_upper[0, 0]
    assert res.growth_lower[0, 1] < -0.04 < res.growth_upper[0, 1]
    assert res.growth_change_lower[0, 0] < -0.07 < res.growth_change_upper[0, 0]
    assert res.level_change_lower[0, 0] < -0.25 < res.level_change_upper[0, 0]


@pytest.mark.parametrize("shape", ["kink", "step"])
def test_detect_changepoints_pads_after_the_last_break(shape: str) -> None:
    res = detect_changepoints(_two_regimes(2), shape=shape)
    k = int(res.n_breaks[0])
    assert np.all(res.breaks[0, k:] == -1)
    assert np.all(np.isnan(res.growth[0, k + 1 :]))
    assert res.segment_start[0, 0] == 0 and res.segment_end[0, k] == 160


@pytest.mark.parametrize("shape", ["kink", "step"])
def test_detect_changepoints_rarely_breaks_a_single_exponential(shape: str) -> None:
    rng = np.random.default_rng(3)
    t = np.arange(150)
    y = rng.poisson(np.exp(np.log(60) + 0.01 * t + WEEKDAY[t % 7])[None, :].repeat(30, 0))
    res = detect_changepoints(y.astype(float), shape=shape)
    assert np.mean(res.n_breaks > 0) <= 0.15  # measured 0.10 on similar series (BIC)


def test_detect_changepoints_missing_days_stay_missing() -> None:
    y = _two_regimes(4)
    gappy = y.copy()
    gappy[[5, 40, 41, 100]] = np.nan
    res = detect_changepoints(gappy, shape="step")
    assert np.all(np.isnan(res.fit.mu[0, [5, 40, 41, 100]]))
    assert abs(res.breaks[0, 0] - 80) <= 2
    with pytest.raises(AssertionError):  # a zero in place of NaN changes the fit
        assert_allclose(fit_piecewise(np.nan_to_num(gappy), [80]).growth,
                        fit_piecewise(gappy, [80]).growth, rtol=1e-6)


def test_fit_piecewise_breaks_in_any_order_give_one_fit() -> None:
    y = _two_regimes(5)
    a = fit_piecewise(y, [100, 60])
    b = fit_piecewise(y, [60, 100])
    assert_allclose(a.growth, b.growth, rtol=1e-12)
    assert list(a.bounds[0]) == [0, 60, 100, 160]


def test_fit_piecewise_regions_with_different_break_counts() -> None:
    y = np.stack([_two_regimes(6), _two_regimes(7)])
    fit = fit_piecewise(y, [[80, -1], [50, 110]])
    single = fit_piecewise(y[0], [80])
    assert_allclose(fit.growth[0, :2], single.growth[0], rtol=1e-9)
    assert np.isnan(fit.growth[0, 2])
    assert np.all(fit.converged)


def test_fit_piecewise_flags_a_segment_without_counts() -> None:
    y = _two_regimes(8)
    y[100:] = 0.0
    fit = fit_piecewise(y, [100])
    assert not fit.converged[0]
    assert np.all(np.isnan(fit.growth[0]))


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"min_segment": 5}, "min_segment: must be an integer >= 7"),
        ({"max_breaks": -1}, "max_breaks: must be an integer >= 0"),
        ({"penalty": 0.0}, "penalty: must be positive"),
    ],
    ids=["short-segment", "negative-breaks", "zero-penalty"],
)
def test_screen_breaks_refuses_bad_arguments(kwargs: dict, message: str) -> None:  # type: ignore[type-arg]
    with pytest.raises(ValueError, match=message):
        screen_breaks(_two_regimes(9), **kwargs)


def test_detect_changepoints_refuses_too_short_series() -> None:
    with pytest.raises(ValueError, match="fewer than 2 \\* min_segment"):
        detect_changepoints(np.ones(20))


def test_fit_piecewise_refuses_breaks_outside_the_series() -> None:
    with pytest.raises(ValueError, match="breaks: day indices must lie in 1..159"):
        fit_piecewise(_two_regimes(10), [160])


def test_detect_changepoints_refuses_negative_counts() -> None:
    y = _two_regimes(11)
    y[3] = -1
    with pytest.raises(ValueError, match="counts: negative count"):
        detect_changepoints(y)


def _kinked(seed: int, n: int = 200, kinks: tuple[int, ...] = (70, 140), base: float = 150.0,
            slopes: tuple[float, ...] = (0.03, -0.03, 0.01), shift: int | None = None
            ) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    eta = np.log(base) + slopes[0] * t
    for k, (a, b) in zip(kinks, zip(slopes[:-1], slopes[1:], strict=True), strict=True):
        eta += (b - a) * np.maximum(t - k, 0)
    if shift is not None:
        eta += np.where(t >= shift, np.log(1.6), 0.0)
    return rng.poisson(np.exp(eta + WEEKDAY[t % 7])).astype(float)


def test_detect_changepoints_dates_kinks_and_their_slope_changes() -> None:
    res = detect_changepoints(_kinked(21))
    assert res.n_breaks[0] == 2
    assert np.all(np.abs(res.breaks[0, :2] - np.array([70, 140])) <= 3)
    for k, truth in enumerate((-0.06, 0.04)):
        assert res.growth_change_lower[0, k] < truth < res.growth_change_upper[0, k]
        assert res.break_lower[0, k] <= res.breaks[0, k] <= res.break_upper[0, k]
    # the kink model is continuous: no level change
    assert np.all(np.isnan(res.level_change[0]))


def test_detect_changepoints_level_shift_absorbs_a_testing_change() -> None:
    y = _kinked(22, kinks=(70,), slopes=(0.02, -0.02), shift=130)
    plain = detect_changepoints(y)
    shifted = detect_changepoints(y, level_shifts=[130])
    # without the shift the jump in cases needs extra kinks near day 130
    assert np.any(np.abs(plain.breaks[0] - 130) <= 10)
    assert shifted.n_breaks[0] == 1 and abs(shifted.breaks[0, 0] - 70) <= 3


def test_transmission_day_is_the_break_less_the_delay_plus_mean_age() -> None:
    res = detect_changepoints(_kinked(23), infection_delay=8.5, si_mean=7.0, si_sd=5.0)
    lag = 8.5 - (5.0**2 + 7.0**2) / (2 * 7.0)
    k = int(res.n_breaks[0])
    assert_allclose(res.transmission_day[0, :k], res.breaks[0, :k] - lag)
    # the interval of whole break days [lower, upper] is the continuous span from half a day
    # before lower to half a day after upper
    assert_allclose(res.transmission_lower[0, :k], res.break_lower[0, :k] - 0.5 - lag)
    assert_allclose(res.transmission_upper[0, :k], res.break_upper[0, :k] + 0.5 - lag)
    assert np.all(np.isnan(detect_changepoints(_kinked(23)).transmission_day))


def test_break_date_intervals_use_the_long_run_dispersion_when_it_is_larger() -> None:
    # residuals correlated over weeks (a slow wave on top of the kinks) raise the long-run
    # dispersion above the daily one: the date intervals widen with it (and the F(1, df)
    # cut-off), never narrow; the dates themselves do not move
    rng = np.random.default_rng(33)
    t = np.arange(200)
    wave = 0.15 * np.sin(2 * np.pi * t / 40)
    eta = (np.log(150) + 0.03 * t - 0.06 * np.maximum(t - 70, 0)
           + 0.04 * np.maximum(t - 140, 0) + wave + WEEKDAY[t % 7])
    y = np.stack([rng.poisson(np.exp(eta)).astype(float), _kinked(34)])
    plain = detect_changepoints(y, dependence_block=None)
    wide = detect_changepoints(y, dependence_block=42)
    has = plain.breaks >= 0
    assert_allclose(wide.breaks, plain.breaks)
    w0 = (plain.break_upper - plain.break_lower)[has]
    w1 = (wide.break_upper - wide.break_lower)[has]
    assert np.all(w1 >= w0)
    assert np.any(w1[: int(has[0].sum())] > w0[: int(has[0].sum())])


def test_hinge_scan_gain_matches_a_direct_least_squares_fit() -> None:
    # numpy.linalg.lstsq (LAPACK gelsd) on the weighted design with the hinge column added
    rng = np.random.default_rng(24)
    n = 60
    z = rng.normal(size=(1, n)).cumsum(axis=1)
    w = rng.uniform(0.5, 2.0, size=(1, n))
    x = line_design(n, np.array([[20]]))
    rss0, gain = hinge_scan(z, w, x)
    sw = np.sqrt(w[0])
    for tau in (5, 33, 50):
        h = np.maximum(np.arange(n) - tau, 0) / n
        full = np.column_stack([x[0], h]) * sw[:, None]
        coef = np.linalg.lstsq(full, z[0] * sw, rcond=None)[0]
        rss = np.sum((z[0] * sw - full @ coef) ** 2)
        assert_allclose(rss0[0] - gain[0, tau], rss, rtol=1e-9)


def test_fit_kinks_refuses_a_repeated_day() -> None:
    with pytest.raises(ValueError, match="kinks: a day appears twice"):
        fit_kinks(_kinked(25), [70, 70])


def test_scan_kinks_grouped_equals_the_full_design() -> None:
    # grouping rows by kink count drops all-zero hinge columns; numpy.linalg.lstsq on the full
    # padded design (zero columns included) is the reference
    rng = np.random.default_rng(26)
    n = 90
    z = rng.normal(size=(3, n)).cumsum(axis=1)
    w = rng.uniform(0.5, 2.0, size=(3, n))
    kinks = np.array([[30, -1, 60], [-1, -1, -1], [20, 45, 70]])
    rss, gain = scan_kinks(z, w, kinks)
    for i in range(3):
        x = line_design(n, kinks[i : i + 1])[0]
        sw = np.sqrt(w[i])
        for tau in (10, 50, 80):
            h = np.maximum(np.arange(n) - tau, 0) / n
            full = np.column_stack([x, h]) * sw[:, None]
            coef = np.linalg.lstsq(full, z[i] * sw, rcond=None)[0]
            assert_allclose(rss[i] - gain[i, tau], np.sum((z[i] * sw - full @ coef) ** 2),
                            rtol=1e-8)


def _wls_rss(z: np.ndarray, w: np.ndarray, x: np.ndarray) -> float:
    """Weighted residual sum of squares by numpy.linalg.lstsq (LAPACK gelsd)."""
    sw = np.sqrt(w)
    coef = np.linalg.lstsq(x * sw[:, None], z * sw, rcond=None)[0]
    return float(np.sum((z * sw - (x * sw[:, None]) @ coef) ** 2))


def test_scanner_leave_one_out_rss_and_drop_costs_match_direct_fits() -> None:
    # KinkScanner.scan_drop_one (a rank-one downdate), .rss and .drop_costs against
    # numpy.linalg.lstsq on the explicit designs: the leave-one-out gains are those of a scan
    # with that kink removed, rss that of the design, a drop cost the rise of the RSS
    from server.indicators._segmentation import KinkScanner

    rng = np.random.default_rng(27)
    n = 100
    z = rng.normal(size=(3, n)).cumsum(axis=1)
    w = rng.uniform(0.5, 2.0, size=(3, n))
    weekday = np.broadcast_to(
        (np.arange(n)[:, None] % 7 == np.arange(1, 7)[None, :]).astype(float), (3, n, 6))
    kinks = np.array([[25, 60, -1], [30, 50, 75], [-1, -1, -1]])
    scanner = KinkScanner(z, w, weekday)
    drop = scanner.scan_drop_one(kinks)
    rss = scanner.rss(kinks)
    for i in range(3):
        mine = kinks[i][kinks[i] >= 0]
        x = line_design(n, mine[None, :], weekday[i : i + 1])[0]
        assert_allclose(rss[i], _wls_rss(z[i], w[i], x), rtol=1e-8)
        if mine.size == 0:
            assert np.all(drop[i] == 0)
            continue
        costs = scanner.drop_costs(mine[None, :], np.array([i]))[0]
        for j in range(mine.size):
            rest = np.delete(mine, j)
            xr = line_design(n, rest[None, :], weekday[i : i + 1])[0]
            base = _wls_rss(z[i], w[i], xr)
            assert_allclose(costs[j], base - rss[i], rtol=1e-7)
            for tau in (10, 45, 90):
                h = np.maximum(np.arange(n) - tau, 0) / n
                direct = base - _wls_rss(z[i], w[i], np.column_stack([xr, h]))
                assert_allclose(drop[i, j, tau], direct, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("rho", [0.0, 0.5])
def test_block_dispersion_matches_the_long_run_variance_of_an_ar1(rho: float) -> None:
    # y = mu + sqrt(mu) x with x a unit-variance AR(1): the variance of a sum of B consecutive
    # x is sum_{|h|<B} (B - |h|) rho^|h| (Brockwell and Davis 1991, Time Series: Theory and
    # Methods, sec. 7.1), so E[phi_B] is that over B (no fitted parameters: q = 0)
    rng = np.random.default_rng(27)
    n, block, mu = 140_000, 28, 400.0
    e = rng.normal(size=n) * np.sqrt(1 - rho**2)
    x = np.empty(n)
    x[0] = rng.normal()
    for t in range(1, n):
        x[t] = rho * x[t - 1] + e[t]
    y = (mu + np.sqrt(mu) * x)[None, :]
    phi, df = block_dispersion(y, np.full((1, n), mu), block, np.array([0]))
    h = np.arange(-block + 1, block)
    expected = np.sum((block - np.abs(h)) * rho ** np.abs(h)) / block
    # overlapping batch means: relative SD about sqrt(4/3 * block / n) (Meketon & Schmeiser 1984)
    assert abs(phi[0] - expected) < 4 * expected * np.sqrt(4 / 3 * block / n)
    assert_allclose(df[0], 1.5 * n / block)


def test_dependence_block_only_widens_the_growth_intervals() -> None:
    y = np.stack([_kinked(28), _kinked(29)])
    plain = detect_changepoints(y, dependence_block=None)
    wide = detect_changepoints(y, dependence_block=42)
    assert_allclose(wide.growth_change, plain.growth_change)
    has = plain.breaks >= 0
    w0 = (plain.growth_change_upper - plain.growth_change_lower)[has]
    w1 = (wide.growth_change_upper - wide.growth_change_lower)[has]
    assert np.all(w1 >= w0 - 1e-15)
    with pytest.raises(ValueError, match="dependence_block"):
        detect_changepoints(y, dependence_block=0)


def _with_small_kink(seed: int) -> np.ndarray:
    # growth 0.03 then 0 from day 60 (R falls by about 20 %), then -0.003 from day 130 (R
    # changes by about 2 %); large counts so that both kinks pass the BIC
    rng = np.random.default_rng(seed)
    n = 200
    t = np.arange(n)
    eta = (np.log(3000) + 0.03 * t - 0.03 * np.maximum(t - 60, 0)
           - 0.003 * np.maximum(t - 130, 0))
    return rng.poisson(np.exp(eta + WEEKDAY[t % 7])).astype(float)


def test_min_change_drops_a_kink_whose_change_of_r_is_small() -> None:
    y = np.stack([_with_small_kink(s) for s in (41, 42, 43)])
    every = detect_changepoints(y, min_change=0.0, si_mean=7.0, si_sd=5.0)
    material = detect_changepoints(y, min_change=0.1, si_mean=7.0, si_sd=5.0)
    assert np.all(np.any(np.abs(every.breaks - 130) <= 10, axis=1))  # the BIC keeps it
    assert np.all(material.n_breaks == 1)
    assert np.all(np.abs(material.breaks[:, 0] - 60) <= 3)
    # every reported break changes R by at least 10 % either way (R from the reported growth)
    has = material.breaks >= 0
    ratio = material.reproduction[:, 1:] / material.reproduction[:, :-1]
    assert np.all(np.abs(np.log(ratio[has])) >= np.log(1.1))
    with pytest.raises(ValueError, match="min_change"):
        detect_changepoints(y, min_change=-0.1)


def test_date_uncertainty_only_widens_the_growth_intervals() -> None:
    y = np.stack([_kinked(28), _kinked(29)])
    fixed = detect_changepoints(y, date_uncertainty=False)
    free = detect_changepoints(y, date_uncertainty=True)
    assert_allclose(free.growth_change, fixed.growth_change)
    has = fixed.breaks >= 0
    assert has.any()
    w0 = (fixed.growth_change_upper - fixed.growth_change_lower)[has]
    w1 = (free.growth_change_upper - free.growth_change_lower)[has]
    assert np.all(w1 >= w0 - 1e-15)
    assert np.any(w1 > w0 * 1.01)


def test_smoothing_refits_the_same_breaks_with_smoothed_hinges() -> None:
    # smoothing (on by default with an infection delay) keeps the dates and their intervals
    # and changes only the fit: its means equal exp of the smoothed design times the
    # coefficients (kink_design with the ramp, computed here again)
    from server.indicators.changepoints import kink_design
    from server.indicators.kinkfit import smooth_ramp

    y = _kinked(24)
    kw = {"infection_delay": 8.5, "si_mean": 7.0, "si_sd": 5.0}
    smooth = detect_changepoints(y, **kw)
    plain = detect_changepoints(y, smoothing=False, **kw)
    assert smooth.n_breaks[0] == plain.n_breaks[0] == 2
    for name in ("breaks", "break_lower", "break_upper", "transmission_day"):
        assert_allclose(getattr(smooth, name), getattr(plain, name))
    assert not np.allclose(smooth.growth_change, plain.growth_change)
    ramp = smooth_ramp(200, 7.0, 5.0, 8.5, 0.4 * 8.5)
    x = kink_design(200, smooth.fit.kinks, ramp=ramp)[0]
    assert_allclose(smooth.fit.mu[0], np.exp(x @ smooth.fit.coef[0]), rtol=1e-10)
    assert_allclose(detect_changepoints(y, smoothing=True, delay_sd=0.4 * 8.5, **kw).fit.coef,
                    smooth.fit.coef)


def test_smoothing_needs_a_delay_and_the_kink_shape() -> None:
    y = _kinked(25)
    with pytest.raises(ValueError, match="smoothing"):
        detect_changepoints(y, smoothing=True)
    with pytest.raises(ValueError, match="smoothing"):
        detect_changepoints(y, smoothing=True, shape="step", infection_delay=8.5)
    with pytest.raises(ValueError, match="delay_sd"):
        detect_changepoints(y, infection_delay=8.5, delay_sd=-1.0)


def test_block_dispersion_shortens_the_block_when_parameters_outnumber_the_batches() -> None:
    # 240 days in 42-day blocks are 5.7 batches: with q = 6 parameters the 42-day estimate
    # has no degrees of freedom left; the block is shortened to 240 // 7 = 34 days, the same
    # number as asking for 34-day blocks directly; below a week there is none (NaN)
    rng = np.random.default_rng(5)
    y = rng.poisson(200.0, size=(2, 240)).astype(float)
    mu = np.full((2, 240), 200.0)
    q = np.array([6, 2])
    phi, df = block_dispersion(y, mu, 42, q)
    phi34, df34 = block_dispersion(y[:1], mu[:1], 34, q[:1])
    phi42, df42 = block_dispersion(y[1:], mu[1:], 42, q[1:])
    assert np.isfinite(phi[0])
    assert_allclose([phi[0], df[0]], [phi34[0], df34[0]])
    assert_allclose([phi[1], df[1]], [phi42[0], df42[0]])
    assert_allclose(df[0], 1.5 * 240 / 34 - 6)
    few, few_df = block_dispersion(y[:1], mu[:1], 42, np.array([40]))
    assert np.isnan(few[0]) and np.isnan(few_df[0])


def test_local_knots_sit_a_window_from_each_kink_inside_long_segments() -> None:
    from server.indicators.local_change import local_knots

    kinks = np.array([[60, 110, -1], [140, 50, -1], [-1, -1, -1], [20, 40, 230]])
    knots = local_knots(kinks, 240, 42, 14)
    # row 0: 18 and 152 (60 + 42 and 110 - 42 lie within 42 days of the other kink)
    assert knots[0][knots[0] >= 0].tolist() == [18, 152]
    # row 1 (kinks in any order): 50 - 42 = 8 is too near the start; 92 (50 + 42) and 98
    # (140 - 42) lie 6 apart: the first kept; 182 (140 + 42)
    assert knots[1][knots[1] >= 0].tolist() == [92, 182]
    assert np.all(knots[2] == -1)
    # row 3: 82 (40 + 42); 188 (230 - 42); the others too near the ends or a kink
    assert knots[3][knots[3] >= 0].tolist() == [82, 188]


def test_local_window_changes_only_the_growth_change_and_widens_it_in_long_segments() -> None:
    # growth drifting within a long last segment: the local change compares the growth
    # near the kink, so it is nearer the change at the kink than the whole-segment one and
    # its interval is wider; the dates, segments and their growth rates stay those of the
    # whole-segment fit
    rng = np.random.default_rng(41)
    n = 240
    t = np.arange(n)
    eta = (np.log(150) + 0.02 * t - 0.05 * np.maximum(t - 60, 0)
           + 0.0002 * np.maximum(t - 60, 0) ** 2 / 2 + WEEKDAY[t % 7])
    y = rng.poisson(np.exp(eta)).astype(float)[None, :]
    whole = detect_changepoints(y, local_window=None)
    local = detect_changepoints(y, local_window=42)
    for name in ("breaks", "break_lower", "break_upper", "growth", "growth_lower",
                 "growth_upper", "n_breaks"):
        assert_allclose(getattr(local, name), getattr(whole, name))
    assert whole.n_breaks[0] == 1  # the drift is too gradual for a second kink
    k = 0
    assert abs(whole.breaks[0, k] - 60) <= 3
    w_whole = whole.growth_change_upper[0, k] - whole.growth_change_lower[0, k]
    w_local = local.growth_change_upper[0, k] - local.growth_change_lower[0, k]
    assert w_local > w_whole
    # the change at day 60 itself is -0.05
    assert abs(local.growth_change[0, k] + 0.05) < abs(whole.growth_change[0, k] + 0.05)
    assert local.growth_change_lower[0, k] < -0.05 < local.growth_change_upper[0, k]
    with pytest.raises(ValueError, match="local_window"):
        detect_changepoints(y, local_window=0)


def test_a_local_refit_that_fails_keeps_the_whole_segment_change() -> None:
    # a reporting gap with a level shift inside it: the knot 42 days after the kink has no
    # observed day between it and the kink, so the knot's hinge differs from the kink's by a
    # step on the observed days, collinear with the level shift; the refit cannot converge and
    # the region keeps the whole-segment change (found by review; it was NaN)
    rng = np.random.default_rng(0)
    n = 260
    t = np.arange(n)
    y = rng.poisson(np.exp(np.log(100) + 0.02 * t - 0.04 * np.maximum(t - 100, 0)
                           + 0.3 * (t >= 80) + WEEKDAY[t % 7])).astype(float)
    y[40:131] = np.nan
    local = detect_changepoints(y[None], level_shifts=[[80]])
    whole = detect_changepoints(y[None], level_shifts=[[80]], local_window=None)
    assert local.n_breaks[0] >= 1
    k = int(local.n_breaks[0])
    assert np.all(np.isfinite(local.growth_change[0, :k]))
    assert np.all(np.isfinite(local.growth_change_lower[0, :k]))
    assert_allclose(local.growth_change[0, :k], whole.growth_change[0, :k])
    assert_allclose(local.growth_change_upper[0, :k], whole.growth_change_upper[0, :k])


def test_local_knots_keep_min_gap_from_the_kinks_when_the_window_is_shorter() -> None:
    from server.indicators.local_change import local_knots

    # window 5 < min_gap 14: 95 and 105 lie only 5 days from the kink; neither is a knot
    assert np.all(local_knots(np.array([[100]]), 240, 5, 14) == -1)
    assert local_knots(np.array([[100]]), 240, 20, 14)[0, :2].tolist() == [80, 120]
