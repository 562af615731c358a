"""Unit tests for server.indicators.nowcast."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from server.indicators.nowcast import (
    cumulative_triangle,
    estimate_delay,
    nowcast,
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
