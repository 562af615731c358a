"""Unit tests for server.indicators.nowcast."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from server.indicators.nowcast import (
    POOL_ALL,
    POOL_GROUP,
    POOL_OWN,
    DelayModel,
    cumulative_triangle,
    delay_model,
    estimate_delay,
    first_reported,
    nowcast,
    nowcast_accuracy,
    nowcast_window,
    triangle_from_rows,
    triangle_from_vintages,
)

NAN = np.nan


def test_cumulative_triangle_keeps_unobservable_cells_nan() -> None:
    inc = np.array([[3.0, 2.0, 1.0], [4.0, 1.0, NAN], [5.0, NAN, NAN]])
    out = cumulative_triangle(inc)
    assert_allclose(out[0], [[3, 5, 6], [4, 5, NAN], [5, NAN, NAN]])


def test_estimate_delay_pmf_sums_to_one() -> None:
    tri = np.array([[[10.0, 15, 20], [8, 12, NAN], [9, NAN, NAN]]])
    est = estimate_delay(tri)
    assert_allclose(est.pmf.sum(axis=1), [1.0])
    assert_allclose(est.reported[0, -1], 1.0)


def test_estimate_delay_all_zero_counts_give_factor_one() -> None:
    tri = np.zeros((1, 4, 3))
    tri[0, 3, 1:] = NAN
    tri[0, 2, 2] = NAN
    est = estimate_delay(tri)
    assert_allclose(est.factors, [[1.0, 1.0]])


def test_estimate_delay_window_uses_recent_days_only() -> None:
    tri = np.array([[[10.0, 30], [10, 20], [10, 20], [10, NAN]]])
    assert_allclose(estimate_delay(tri, window=3).factors, [[2.0]])
    assert_allclose(estimate_delay(tri).factors, [[70.0 / 30.0]])


def test_nowcast_complete_days_are_unchanged() -> None:
    tri = np.array([[[10.0, 15, 20], [8, 12, 14], [9, 13, NAN], [7, NAN, NAN]]])
    res = nowcast(tri)
    assert_allclose(res.estimate[0, :2], [20.0, 14.0])
    assert_allclose(res.lower[0, :2], [20.0, 14.0])
    assert_allclose(res.upper[0, :2], [20.0, 14.0])


def test_nowcast_interval_widens_for_later_days() -> None:
    tri = np.array([[[10.0, 15, 20], [8, 12, 14], [9, 13, NAN], [7, NAN, NAN]]])
    res = nowcast(tri)
    width = res.upper[0] - res.lower[0]
    assert width[3] > width[2] > width[1]


def test_nowcast_never_below_what_is_known() -> None:
    rng = np.random.default_rng(8)
    inc = rng.poisson(5.0, (3, 30, 5)).astype(float)
    tri = cumulative_triangle(inc)
    for i in range(30):
        tri[:, i, max(0, 30 - i) :] = NAN
    res = nowcast(tri)
    assert np.all(res.lower >= res.known - 1e-12)
    assert np.all(res.estimate >= res.known - 1e-12)


def test_nowcast_refuses_bad_level() -> None:
    with pytest.raises(ValueError, match="level: confidence level"):
        nowcast(np.ones((1, 2, 2)), level=95)


def test_nowcast_refuses_negative_counts() -> None:
    with pytest.raises(ValueError, match="triangle: negative count"):
        nowcast(-np.ones((1, 2, 2)))


def test_triangle_from_vintages_carries_values_forward() -> None:
    table = pd.DataFrame(
        {
            "ref_date": ["2030-03-01", "2030-03-01", "2030-03-01", "2030-03-02", "2030-03-03"],
            "known_on": ["2030-03-01", "2030-03-03", "2030-03-04", "2030-03-03", "2030-03-04"],
            "value": [4.0, 7.0, 9.0, 5.0, 2.0],
        }
    )
    tri = triangle_from_vintages(table, delays=3)
    expected = [[4, 4, 7], [NAN, 5, 5], [NAN, 2, NAN]]
    assert_allclose(tri[0], expected)


def test_triangle_from_vintages_orders_regions() -> None:
    table = pd.DataFrame(
        {
            "region": ["north", "south", "north"],
            "ref_date": ["2030-01-01"] * 3,
            "known_on": ["2030-01-01", "2030-01-01", "2030-01-02"],
            "value": [1.0, 2.0, 3.0],
        }
    )
    tri = triangle_from_vintages(table, delays=2, regions=["south", "north"])
    assert_allclose(tri[:, 0, :], [[2, 2], [1, 3]])


def test_triangle_from_vintages_refuses_vintage_before_reference_day() -> None:
    table = pd.DataFrame({"ref_date": ["2030-01-02"], "known_on": ["2030-01-01"], "value": [1]})
    with pytest.raises(ValueError, match="table: known_on .* before ref_date"):
        triangle_from_vintages(table, delays=2)


def test_triangle_from_rows_keeps_the_newest_row_by_each_delay() -> None:
    # one region, 3 days, delays 0..3, data received through day 3; rows in arrival order
    # day 0: 4 on day 0, 6 on day 1, then 7 and a same-day correction to 5 on day 3
    # day 1: first reported on day 2 (delay 1) as 3; day 2: 2 on day 2
    region = [0, 0, 0, 0, 0, 0]
    ref = [0, 0, 1, 2, 0, 0]
    receipt = [0, 1, 2, 2, 3, 3]
    value = [4.0, 6.0, 3.0, 2.0, 7.0, 5.0]
    tri = triangle_from_rows(region, ref, receipt, value, regions=1, days=3, delays=4,
                             last_receipt=3)
    assert_allclose(tri[0], [[4, 6, 6, 5], [NAN, 3, 3, NAN], [2, 2, NAN, NAN]])


def test_triangle_from_rows_ignores_rows_after_the_cutoff() -> None:
    tri = triangle_from_rows([0, 0], [0, 0], [0, 2], [1.0, 9.0], regions=1, days=1, delays=3,
                             last_receipt=1)
    assert_allclose(tri[0], [[1, 1, NAN]])


def test_first_reported_inverts_cumulative_triangle() -> None:
    inc = np.array([[[3.0, 2.0, 1.0], [0.0, 4.0, NAN], [5.0, NAN, NAN]]])
    assert_allclose(first_reported(cumulative_triangle(inc)), inc)
    # a downward correction is a negative increment; a day first reported late starts there
    assert_allclose(first_reported([[[6.0, 4.0], [NAN, 3.0]]])[0], [[6, -2], [NAN, 3]])


def _one(q: list[float], log_var: list[float] | None = None) -> DelayModel:
    r = np.array(q, dtype=float)[None, None, :]
    v = np.zeros_like(r) if log_var is None else np.array(log_var, dtype=float)[None, None, :]
    return DelayModel(r, v, np.zeros((1, 1), dtype=np.int8), np.ones((1, 1)))


def test_nowcast_window_single_day_matches_negative_binomial() -> None:
    # C = 10 known at delay 0 with q = 0.5 and no delay uncertainty: estimate 20; the unreported
    # part is NegBin(C + a, q) (gamma-Poisson thinning), quantiles from scipy
    nc = nowcast_window([[10.0]], [0], _one([0.5, 1.0]), window=1)
    assert_allclose(nc.estimate, [[20.0]])
    assert_allclose(nc.lower, [[10 + stats.nbinom.ppf(0.025, 10.5, 0.5)]])
    assert_allclose(nc.upper, [[10 + stats.nbinom.ppf(0.975, 10.5, 0.5)]])
    assert nc.nowcast[0, 0] and nc.days[0, 0] == 1


def test_nowcast_window_adds_the_delay_variance_of_shared_factors() -> None:
    # two days at delays 1 and 0 share the factor after delay 1: by hand,
    # Var = sum_ij g_i g_j V(max(d_i, d_j)) with g = (C + a) / q, V = [0.02, 0.01, 0]
    q, v = [0.4, 0.8, 1.0], [0.02, 0.01, 0.0]
    values, delay = np.array([[8.0, 4.0]]), np.array([1, 0])
    g = np.array([8.5 / 0.8, 4.5 / 0.4])
    delay_var = g[0] ** 2 * 0.01 + g[1] ** 2 * 0.02 + 2 * g[0] * g[1] * 0.01
    mean = 8.5 * 0.2 / 0.8 + 4.5 * 0.6 / 0.4
    var = 8.5 * 0.2 / 0.64 + 4.5 * 0.6 / 0.16 + delay_var
    size, p = mean**2 / (var - mean), mean / var
    nc = nowcast_window(values, delay, _one(q, v), window=2)
    assert_allclose(nc.estimate[0, 1], 8 / 0.8 + 4 / 0.4)
    assert_allclose(nc.upper[0, 1], 12 + stats.nbinom.ppf(0.975, size, p))
    assert_allclose(nc.lower[0, 1], 12 + stats.nbinom.ppf(0.025, size, p))


def test_nowcast_window_complete_days_are_not_flagged() -> None:
    nc = nowcast_window([[5.0, 6.0, 7.0]], [3, 2, 1], _one([0.5, 0.995, 1.0, 1.0]), window=2)
    assert not nc.nowcast.any()
    assert_allclose(nc.estimate, [[NAN, 11.0, 13.0]])
    assert_allclose(nc.lower, nc.estimate)


def test_nowcast_window_refuses_bad_threshold() -> None:
    with pytest.raises(ValueError, match="threshold"):
        nowcast_window([[1.0]], [0], _one([0.5, 1.0]), threshold=1.5)


def test_delay_model_pools_small_regions_over_their_group_then_all() -> None:
    # three regions: A large (own delays), B small in group 0 with A, C small without a group
    days, width = 30, 3
    inc = np.zeros((3, days, width))
    inc[0] = [60.0, 30.0, 10.0]
    inc[1] = [1.0, 1.0, 0.0]
    inc[2] = [0.0, 1.0, 0.0]
    observable = np.arange(days)[:, None] + np.arange(width) <= days - 1
    inc[:, ~observable] = NAN
    model = delay_model(cumulative_triangle(inc), cutoffs=[days - 1], groups=[0, 0, -1],
                        window=30, min_reports=400)
    assert model.pool[:, 0].tolist() == [POOL_OWN, POOL_GROUP, POOL_ALL]
    assert_allclose(model.reported[0, 0], [0.6, 0.9, 1.0])
    # the group's shares: (60 + 1) / (100 + 2) at delay 0
    assert_allclose(model.reported[1, 0, 0], 61 / 102, rtol=1e-12)


def test_delay_model_by_weekday_uses_each_days_own_stratum() -> None:
    # reference days alternate (period 2) between same-day and next-day reporting
    days, width = 40, 3
    inc = np.zeros((1, days, width))
    inc[0, 0::2] = [10.0, 0.0, 0.0]
    inc[0, 1::2] = [0.0, 10.0, 0.0]
    observable = np.arange(days)[:, None] + np.arange(width) <= days - 1
    inc[:, ~observable] = NAN
    c = cumulative_triangle(inc)
    model = delay_model(c, cutoffs=[days - 1], window=30, min_reports=0, period=2)
    # delay 0 is the newest day 39 (odd: reported next day), delay 1 is day 38 (even: complete)
    assert_allclose(model.reported[0, 0, :2], [0.0, 1.0])
    pooled = delay_model(c, cutoffs=[days - 1], window=30, min_reports=0)
    assert 0.4 < pooled.reported[0, 0, 0] < 0.6


def test_nowcast_accuracy_by_hand() -> None:
    est = [[10.0, 20.0, 30.0]]
    lower, upper = [[8.0, 15.0, 20.0]], [[12.0, 25.0, 29.0]]
    reported = [[5.0, 10.0, 15.0]]
    later = [[11.0, 20.0, 30.0]]
    acc = nowcast_accuracy(est, lower, upper, reported, later, [[True, True, True]])
    assert_allclose(acc.error, [np.median([1 / 11, 0.0, 0.0])])
    assert_allclose(acc.unadjusted_error, [np.median([6 / 11, 0.5, 0.5])])
    assert_allclose(acc.coverage, [2 / 3])
    assert acc.mornings.tolist() == [3]


def test_nowcast_window_on_a_long_series_equals_the_recent_days_alone() -> None:
    # old days are complete (known at the last delay): the long series is plain trailing sums
    # there, and its newest windows equal the nowcast of the last days alone
    rng = np.random.default_rng(3)
    x = rng.poisson(30, (2, 40)).astype(float)
    delay = 40 - np.arange(40)  # the newest day known at delay 1
    model = _one([0.3, 0.6, 0.8, 0.9, 0.97, 1.0], [0.05, 0.03, 0.02, 0.01, 0.005, 0.0])
    model = DelayModel(np.repeat(model.reported, 2, 0), np.repeat(model.log_var, 2, 0),
                       np.zeros((2, 1), dtype=np.int8), np.ones((2, 1)))
    full = nowcast_window(x, delay, model, window=7)
    recent = nowcast_window(x[:, -12:], delay[-12:], model, window=7)
    assert_allclose(full.lower[:, -6:], recent.lower[:, -6:])
    assert_allclose(full.upper[:, -6:], recent.upper[:, -6:])
    assert_allclose(full.estimate[:, -6:], recent.estimate[:, -6:])
    plain = np.convolve(x[0], np.ones(7), mode="valid")[:20]
    assert_allclose(full.estimate[0, 6:26], plain)
    assert_allclose(full.lower[0, 6:26], plain)
    assert full.nowcast[:, -4:].all() and not full.nowcast[:, :30].any()
