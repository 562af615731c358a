"""Unit tests for server.indicators.wastewater."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose

from server.indicators.wastewater import (
    catchment_matrix,
    level,
    normalise,
    smooth,
    to_districts,
    trend,
)


def _irregular(days: int, samples: int, seed: int) -> np.ndarray:
    rng = np.random.default_rng(seed)
    idx = np.sort(rng.choice(days, samples, replace=False))
    out = np.full(days, np.nan)
    out[idx] = 0.0
    return out


def test_normalise_flow_gives_load_per_person() -> None:
    # definition c * Q / N (Commission Recommendation (EU) 2021/472: normalise by flow and
    # population)
    conc = np.array([[2.0e5, np.nan, 3.0e5]])
    flow = np.array([[1.0e7, 1.0e7, 2.0e7]])
    res = normalise(conc, ["flow"], flow=flow, population_served=[5.0e4])
    assert_allclose(res.value, [[4.0e7, np.nan, 1.2e8]])
    assert_allclose(res.log_value, np.log([[4.0e7, np.nan, 1.2e8]]))


def test_normalise_marker_divides_by_marker_per_plant() -> None:
    conc = np.array([[10.0, 20.0], [10.0, 20.0]])
    marker = np.array([[2.0, 4.0], [5.0, 0.0]])
    res = normalise(conc, ["none", "marker"], marker=marker)
    assert_allclose(res.value, [[10.0, 20.0], [2.0, np.nan]])
    assert res.method == ("none", "marker")


def test_normalise_zero_concentration_has_nan_log() -> None:
    res = normalise([[0.0, 5.0]], ["none"])
    assert np.isnan(res.log_value[0, 0])
    assert_allclose(res.log_value[0, 1], np.log(5.0))


def test_normalise_unknown_method_is_refused() -> None:
    with pytest.raises(ValueError, match="methods: unknown normalisation 'volume'"):
        normalise([[1.0]], ["volume"])


def test_normalise_flow_without_population_is_refused() -> None:
    with pytest.raises(ValueError, match="flow: 'flow' plants need"):
        normalise([[1.0]], ["flow"], flow=[[1.0]])


def test_smooth_reproduces_a_straight_line_on_irregular_days() -> None:
    # local linear regression reproduces linear functions exactly (Cleveland 1979, JASA 74:829)
    mask = _irregular(80, 30, seed=11)
    line = 0.03 * np.arange(80) + 2.0
    y = np.where(np.isfinite(mask), line, np.nan)
    res = smooth(y, neighbours=7)
    first, last = np.flatnonzero(np.isfinite(y))[[0, -1]]
    assert_allclose(res.estimate[0, first : last + 1], line[first : last + 1], rtol=1e-10)


def test_smooth_is_nan_outside_the_sampled_span() -> None:
    y = np.full(20, np.nan)
    y[[5, 8, 12, 15]] = [1.0, 2.0, 1.5, 1.0]
    res = smooth(y, neighbours=3)
    assert np.isnan(res.estimate[0, :5]).all()
    assert np.isnan(res.estimate[0, 16:]).all()
    assert np.isfinite(res.estimate[0, 5:16]).all()


def test_smooth_extrapolate_fills_the_edges() -> None:
    y = np.full(20, np.nan)
    y[[5, 8, 12, 15]] = [1.0, 2.0, 3.0, 4.0]
    res = smooth(y, neighbours=4, extrapolate=True)
    assert np.isfinite(res.estimate).all()


def test_smooth_needs_exactly_one_span_argument() -> None:
    with pytest.raises(ValueError, match="neighbours/frac: give exactly one"):
        smooth([[1.0, 2.0]], neighbours=2, frac=0.5)


def test_trend_of_exact_exponential_growth_is_exact() -> None:
    # percent = 100 * (exp(slope) - 1) on an exact log-linear series (definition, REFERENCES.md)
    mask = _irregular(40, 20, seed=5)
    y = np.where(np.isfinite(mask), 0.05 * np.arange(40), np.nan)
    res = trend(y, window=15)
    ok = res.samples[0] >= 3
    assert_allclose(res.slope[0, ok], 0.05, rtol=1e-9)
    assert_allclose(res.estimate[0, ok], 100 * np.expm1(0.05), rtol=1e-9)
    assert_allclose(res.window_change[0, ok], 100 * np.expm1(0.75), rtol=1e-9)
    assert_allclose(res.upper[0, ok] - res.lower[0, ok], 0.0, atol=1e-7)


def test_trend_with_too_few_samples_is_nan() -> None:
    y = np.full((1, 15), np.nan)
    y[0, [3, 10]] = [1.0, 2.0]
    res = trend(y, window=15)
    assert np.isnan(res.estimate).all()
    assert_allclose(res.samples[0, -1], 2.0)


def test_trend_interval_contains_estimate() -> None:
    rng = np.random.default_rng(2)
    y = rng.normal(0, 0.3, (4, 60)) + 0.02 * np.arange(60)
    y[rng.random((4, 60)) < 0.6] = np.nan
    res = trend(y)
    ok = np.isfinite(res.estimate)
    assert ok.sum() > 100
    assert np.all(res.lower[ok] <= res.estimate[ok])
    assert np.all(res.estimate[ok] <= res.upper[ok])


def test_level_is_distance_from_quantile_in_sds() -> None:
    # baseline = q-quantile, level = (x - baseline) / sd (REFERENCES.md, Wastewater level method)
    y = np.tile([0.0, 1.0], 10).astype(float)
    cur = np.full(20, 3.0)
    res = level(y[np.newaxis], current=cur[np.newaxis], baseline_days=20, quantile=0.1,
                min_samples=20)
    sd = np.std(y, ddof=1)
    assert_allclose(res.estimate[0, -1], 3.0 / sd)
    assert np.isnan(res.estimate[0, :-1]).all()


def test_level_refuses_quantile_out_of_range() -> None:
    with pytest.raises(ValueError, match="quantile: must be in"):
        level([[1.0, 2.0]], quantile=1.5)


def test_to_districts_is_population_weighted() -> None:
    plant = np.array([[10.0, 10.0, np.nan], [20.0, np.nan, np.nan]])
    served = np.array([[1000.0, 3000.0], [0.0, 500.0], [0.0, 0.0]])
    out = to_districts(plant, served)
    assert_allclose(out[0], [17.5, 10.0, np.nan])
    assert_allclose(out[1], [20.0, np.nan, np.nan])
    assert np.isnan(out[2]).all()


def test_to_districts_refuses_wrong_catchment_shape() -> None:
    with pytest.raises(ValueError, match=r"served: expected shape \(districts, 2\)"):
        to_districts(np.ones((2, 3)), np.ones((4, 3)))


def test_catchment_matrix_from_shares_and_populations() -> None:
    table = pd.DataFrame(
        {
            "plant": ["riverside", "hillcrest", "riverside"],
            "district": ["alder", "alder", "birch"],
            "share": [0.25, 0.5, 1.0],
            "population": [40_000.0, 40_000.0, 8_000.0],
        }
    )
    out = catchment_matrix(
        table, plants=["riverside", "hillcrest"], districts=["alder", "birch", "cedar"]
    )
    assert_allclose(out, [[10_000.0, 20_000.0], [8_000.0, 0.0], [0.0, 0.0]])


def test_catchment_matrix_refuses_unknown_plant() -> None:
    table = pd.DataFrame({"plant": ["lakeside"], "district": ["alder"], "served": [10.0]})
    with pytest.raises(ValueError, match="table: unknown plant 'lakeside'"):
        catchment_matrix(table, plants=["riverside"], districts=["alder"])


def test_level_flat_windows_match_pandas_rolling_max_equal_min() -> None:
    # Reference: pandas rolling max == rolling min over the same trailing windows
    import pandas as pd

    from server.indicators.wastewater import _all_equal

    rng = np.random.default_rng(31)
    y = rng.choice([1.0, 2.0, np.nan], size=(6, 80), p=[0.55, 0.1, 0.35])
    y[1] = np.nan
    y[2, 40:] = 3.0
    for window in (1, 3, 10, 80):
        roll = pd.DataFrame(y.T).rolling(window, min_periods=1)
        expected = (roll.max().to_numpy() == roll.min().to_numpy()).T
        np.testing.assert_array_equal(_all_equal(y, window), expected)
