"""Change points: recovery of known breaks, missing days, argument errors."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from server.indicators.changepoints import detect_changepoints, fit_piecewise, screen_breaks

WEEKDAY = np.array([0.0, 0.1, 0.05, 0.0, -0.1, -0.4, -0.6])


def _two_regimes(seed: int, n: int = 160, brk: int = 80, base: float = 100.0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(n)
    eta = np.where(t < brk, np.log(base) + 0.03 * t,
                   np.log(base) + 0.03 * brk - 0.25 - 0.04 * (t - brk))
    return rng.poisson(np.exp(eta + WEEKDAY[t % 7])).astype(float)


def test_detect_changepoints_finds_a_clear_break() -> None:
    res = detect_changepoints(_two_regimes(1))
    assert res.n_breaks[0] == 1
    assert abs(res.breaks[0, 0] - 80) <= 2
    assert res.break_lower[0, 0] <= res.breaks[0, 0] <= res.break_upper[0, 0]
    assert res.growth_lower[0, 0] < 0.03 < res.growth_upper[0, 0]
    assert res.growth_lower[0, 1] < -0.04 < res.growth_upper[0, 1]
    assert res.growth_change_lower[0, 0] < -0.07 < res.growth_change_upper[0, 0]
    assert res.level_change_lower[0, 0] < -0.25 < res.level_change_upper[0, 0]


def test_detect_changepoints_pads_after_the_last_break() -> None:
    res = detect_changepoints(_two_regimes(2))
    k = int(res.n_breaks[0])
    assert np.all(res.breaks[0, k:] == -1)
    assert np.all(np.isnan(res.growth[0, k + 1 :]))
    assert res.segment_start[0, 0] == 0 and res.segment_end[0, k] == 160


def test_detect_changepoints_rarely_breaks_a_single_exponential() -> None:
    rng = np.random.default_rng(3)
    t = np.arange(150)
    y = rng.poisson(np.exp(np.log(60) + 0.01 * t + WEEKDAY[t % 7])[None, :].repeat(30, 0))
    res = detect_changepoints(y.astype(float))
    assert np.mean(res.n_breaks > 0) <= 0.15  # measured 0.10 on similar series (BIC)


def test_detect_changepoints_missing_days_stay_missing() -> None:
    y = _two_regimes(4)
    gappy = y.copy()
    gappy[[5, 40, 41, 100]] = np.nan
    res = detect_changepoints(gappy)
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
