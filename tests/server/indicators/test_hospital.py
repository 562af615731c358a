"""Unit tests for server.indicators.hospital."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from server.indicators.hospital import (
    LengthOfStay,
    admission_rate,
    capacity_crossing,
    length_of_stay,
    occupancy_share,
    project_icu,
)


def test_admission_rate_sums_seven_days_per_100k() -> None:
    a = np.array([[1.0, 2, 3, 4, 5, 6, 7, 8]])
    res = admission_rate(a, [200_000.0])
    assert np.isnan(res.estimate[0, :6]).all()
    assert_allclose(res.count[0, 6:], [28.0, 35.0])
    assert_allclose(res.estimate[0, 6:], [14.0, 17.5])


def test_admission_rate_missing_day_gives_nan_not_zero() -> None:
    a = np.ones((1, 10))
    a[0, 5] = np.nan
    res = admission_rate(a, [1e5])
    assert np.isnan(res.estimate[0, 6:]).all()
    assert np.isnan(res.lower[0, 6:]).all()


@pytest.mark.parametrize(
    ("count", "lo", "hi"),
    [(0, 0.0, 3.6889), (1, 0.0253, 5.5716), (3, 0.6187, 8.7673), (10, 4.795, 18.390)],
    ids=["x0", "x1", "x3", "x10"],
)
def test_admission_rate_interval_is_garwood(count: int, lo: float, hi: float) -> None:
    # exact Poisson 95 % limits (Garwood 1936; values in REFERENCES.md, [seen])
    a = np.zeros((1, 7))
    a[0, 0] = count
    res = admission_rate(a, [1e5])
    assert_allclose([res.lower[0, -1], res.upper[0, -1]], [lo, hi], atol=6e-4)


def test_occupancy_share_is_nan_without_staffed_beds() -> None:
    res = occupancy_share([[8.0, 3.0, np.nan]], [[10.0, 0.0, 5.0]])
    assert_allclose(res.estimate, [[0.8, np.nan, np.nan]])


def test_occupancy_share_refuses_mismatched_shapes() -> None:
    with pytest.raises(ValueError, match="staffed: shape"):
        occupancy_share([[1.0, 2.0]], [[1.0]])


def test_length_of_stay_survival_starts_at_one() -> None:
    los = length_of_stay()
    assert_allclose(los.survival[0], 1.0)
    assert np.all(np.diff(los.survival) <= 0)


def test_length_of_stay_mean_is_sum_of_survival() -> None:
    # E[L] = sum_k P(L > k) for a non-negative integer variable (standard identity)
    los = length_of_stay(distribution="gamma")
    assert_allclose(los.mean, los.survival.sum(), rtol=1e-12)


def test_length_of_stay_refuses_pmf_not_summing_to_one() -> None:
    with pytest.raises(ValueError, match="pmf: must sum to 1"):
        LengthOfStay(pmf=np.array([0.0, 0.5, 0.3]))


def test_length_of_stay_refuses_bad_quartiles() -> None:
    with pytest.raises(ValueError, match="quartiles: need 0 < q1 < median < q3"):
        length_of_stay(median=8.0, quartiles=(9.0, 13.0))


def test_project_icu_without_patients_or_growth_is_admissions_times_survival_sum() -> None:
    los = LengthOfStay(pmf=np.array([0.0, 0.5, 0.5]))
    res = project_icu([2.0], [0.0], [10.0], [0.0], [0.0], [0.0], los=los, horizon=4)
    # by hand: S = (1, 0.5, 0); O_h = 2 * sum_{s=1..h} S(h-s) -> 0, 2, 3, 3, 3
    assert_allclose(res.estimate[0], [0.0, 2.0, 3.0, 3.0, 3.0])


def test_project_icu_bounds_follow_growth_bounds() -> None:
    los = length_of_stay()
    res = project_icu([3.0, 3.0], [30.0, 30.0], [40.0, 40.0], [0.02, -0.03], [-0.01, -0.06],
                      [0.05, 0.0], los=los, horizon=14)
    assert np.all(res.lower <= res.estimate + 1e-12)
    assert np.all(res.estimate <= res.upper + 1e-12)
    assert_allclose(res.share_estimate, res.estimate / 40.0)


def test_project_icu_survival_option_discharges_current_patients_by_survival() -> None:
    los = LengthOfStay(pmf=np.array([0.0, 0.25, 0.25, 0.5]))
    res = project_icu([0.0], [8.0], [10.0], [0.0], [0.0], [0.0], los=los, horizon=3,
                      current_patients="survival")
    # by hand: S = (1, 0.75, 0.5, 0) -> 8, 6, 4, 0
    assert_allclose(res.estimate[0], [8.0, 6.0, 4.0, 0.0])


def test_project_icu_residual_option_discharges_by_residual_life() -> None:
    los = LengthOfStay(pmf=np.array([0.0, 0.25, 0.25, 0.5]))
    res = project_icu([0.0], [9.0], [10.0], [0.0], [0.0], [0.0], los=los, horizon=3)
    # by hand: S = (1, .75, .5, 0), tail sums (2.25, 1.25, .5, 0) / 2.25 -> 9, 5, 2, 0
    assert_allclose(res.estimate[0], [9.0, 5.0, 2.0, 0.0])


def test_project_icu_refuses_unknown_current_patients_rule() -> None:
    with pytest.raises(ValueError, match="current_patients: expected"):
        project_icu([1.0], [1.0], [1.0], [0.0], [0.0], [0.0], los=length_of_stay(),
                    current_patients="equal")  # type: ignore[arg-type]


def test_capacity_crossing_days_from_each_projection() -> None:
    los = LengthOfStay(pmf=np.array([0.0, 1.0]))  # one census day: occupancy = admissions
    res = project_icu([5.0], [5.0], [10.0], [np.log(1.2)], [np.log(1.1)], [np.log(1.5)],
                      los=los, horizon=10)
    cross = capacity_crossing(res, threshold=0.8)
    # by hand: 5 * g^h >= 8 -> h >= log(1.6)/log(g): g=1.2 -> 2.58 -> 3; 1.5 -> 1.16 -> 2;
    # 1.1 -> 4.93 -> 5
    assert_allclose([cross.estimate[0], cross.lower[0], cross.upper[0]], [3.0, 2.0, 5.0])


def test_capacity_crossing_not_within_horizon_is_inf() -> None:
    los = LengthOfStay(pmf=np.array([0.0, 1.0]))
    res = project_icu([1.0], [1.0], [10.0], [0.0], [0.0], [0.0], los=los, horizon=5)
    cross = capacity_crossing(res, threshold=1.0)
    assert np.isinf(cross.estimate[0])


def test_capacity_crossing_already_over_is_day_zero() -> None:
    los = LengthOfStay(pmf=np.array([0.0, 1.0]))
    res = project_icu([9.0], [9.0], [10.0], [0.0], [0.0], [0.0], los=los, horizon=5)
    assert_allclose(capacity_crossing(res, threshold=0.8).estimate, [0.0])
