"""Unit tests for server.indicators.forecast_scores (the record of quantile forecasts)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from server.indicators.forecast_scores import (
    forecast_record,
    last_week_mean,
    poisson_persistence,
    score_forecasts,
)

LEVELS = np.array([0.05, 0.25, 0.5, 0.75, 0.95])


def _one(q: list[float], y: float, base: float = 5.0):  # type: ignore[no-untyped-def]
    return score_forecasts(np.array([[q]]), LEVELS, np.array([[y]]), np.array([base]))


def test_score_forecasts_counts_bounds_as_inside() -> None:
    s = _one([2, 4, 5, 6, 9], 9.0)
    assert s.inside_90[0, 0] and not s.inside_50[0, 0]
    # by hand (Bracher et al. 2021, eq. 2): (0.5*4 + 0.25*(2 + 4*3) + 0.05*7) / 2.5 = 2.34
    assert_allclose(s.wis, [[2.34]])
    assert_allclose(s.naive_error, [[4.0]])


def test_score_forecasts_unknown_outcome_or_baseline_is_unscored() -> None:
    s = score_forecasts(np.tile([2.0, 4, 5, 6, 9], (2, 2, 1)), LEVELS,
                        np.array([[5.0, np.nan], [5.0, 5.0]]), np.array([5.0, np.nan]))
    assert_array_equal(s.scored, [[True, False], [False, False]])
    assert np.isnan(s.wis[0, 1]) and not s.inside_90[1, 0]


def test_forecast_record_keeps_the_newest_scored_per_cell() -> None:
    # group 0: origins 1..5, the newest (5) unscored; last=2 keeps origins 4 and 3
    wis_by_origin = {1: 10.0, 2: 20.0, 3: 30.0, 4: 40.0, 5: 50.0}
    q = np.array([[[w - 1, w - 1, w, w + 1, w + 1]] for w in wis_by_origin.values()])
    y = np.array([[w] for w in wis_by_origin.values()])
    y[4, 0] = np.nan
    s = score_forecasts(q, LEVELS, y, y[:, 0] + 2.0)
    order = np.array([1, 2, 3, 4, 5])
    rec = forecast_record(s, groups=np.zeros(5, int), n_groups=2, order=order, horizons=[7],
                          last=2)
    assert_array_equal(rec.forecasts, [[2], [0]])
    assert_allclose(rec.mean_wis[0], s.wis[[2, 3], 0].mean())
    assert_allclose(rec.naive_error[0], 2.0)
    assert_allclose(rec.relative_wis[0], s.wis[[2, 3], 0].mean() / 2.0)
    assert np.isnan(rec.coverage_90[1, 0])
    full = forecast_record(s, groups=np.zeros(5, int), n_groups=2, order=order, horizons=[7])
    assert_array_equal(full.forecasts, [[4], [0]])


def test_last_week_mean_needs_four_known_days() -> None:
    h = np.array([[1.0, 2, 3, 4, 5, 6, 7, 8], [np.nan] * 4 + [1.0, 2, 3, np.nan]])
    assert_allclose(last_week_mean(h), [5.0, np.nan])


def test_poisson_persistence_quantiles_are_smallest_k_with_cdf_at_least_level() -> None:
    # definition of the quantile function F^-1(p) = min{k : F(k) >= p} (from memory); for
    # Poisson(3): F(0)=0.0498, F(1)=0.199, F(2)=0.423, F(3)=0.647, F(5)=0.916, F(6)=0.966
    q = poisson_persistence(np.full((1, 7), 3.0), horizons=[1, 2], levels=LEVELS)
    assert_array_equal(q[0, 0], [1, 2, 3, 4, 6])
    assert q.shape == (1, 2, 5)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        ((np.zeros((2, 3, 4)), LEVELS, np.zeros((2, 3)), np.zeros(2)), "values"),
        ((np.zeros((2, 3, 5)), LEVELS, np.zeros((2, 2)), np.zeros(2)), "observed"),
        ((np.zeros((2, 3, 5)), LEVELS, np.zeros((2, 3)), np.zeros(3)), "baseline"),
        ((np.zeros((2, 3, 5)), LEVELS + 0.01, np.zeros((2, 3)), np.zeros(2)), "levels"),
    ],
    ids=["levels-axis", "observed", "baseline", "asymmetric"],
)
def test_score_forecasts_rejects_bad_shapes(args: tuple, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        score_forecasts(*args)
