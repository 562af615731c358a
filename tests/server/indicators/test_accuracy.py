"""Unit tests for server.indicators.accuracy (retrospective scoring of curve projections)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from server.indicators.accuracy import projection_accuracy
from server.indicators.curves import richards_cumulative


def _expected_counts(k: float, a: float, t0: float, days: int) -> np.ndarray:
    t = np.arange(days, dtype=float)
    return richards_cumulative(t, k, a, t0) - richards_cumulative(t - 1, k, a, t0)


def test_projection_accuracy_noise_free_after_turning_point_is_exact() -> None:
    y = _expected_counts(3000.0, 0.2, 20.0, 60)
    report = projection_accuracy(y, first_origin=30, step=5)
    # data on the model's own mean curve: after the turning point the fit is the truth
    assert_allclose(report.relative_error, 0.0, atol=1e-3)
    assert_allclose(report.share_within, 1.0)
    assert_allclose(report.mean_error_after_turning, 0.0, atol=1e-3)


def test_projection_accuracy_scores_against_later_cumulative() -> None:
    rng = np.random.default_rng(6)
    y = rng.poisson(_expected_counts(3000.0, 0.2, 25.0, 60)).astype(float)
    report = projection_accuracy(y, first_origin=20, step=4, horizon=7)
    cumulative = np.cumsum(y)
    assert_allclose(report.observed[0], cumulative[report.origins + 7])
    error = np.abs(report.relative_error[0])
    assert_allclose(report.share_within[0], [np.mean(error <= 0.05), np.mean(error <= 0.10)])


def test_projection_accuracy_splits_final_size_error_at_turning_point() -> None:
    rng = np.random.default_rng(7)
    y = rng.poisson(_expected_counts(5000.0, 0.2, 30.0, 70)).astype(float)
    report = projection_accuracy(
        y, first_origin=18, step=3, final_size=[5000.0], turning_day=[30.0]
    )
    assert_allclose(report.before_turning[0], report.origins < 30)
    after = report.final_size_error[0, ~report.before_turning[0] & report.converged[0]]
    assert_allclose(report.mean_error_after_turning[0], after.mean())
    assert abs(report.mean_error_after_turning[0]) < 0.05


def test_projection_accuracy_rejects_origin_without_future() -> None:
    with pytest.raises(ValueError, match="first_origin: 25"):
        projection_accuracy(np.ones(30), first_origin=25, horizon=7)


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"model": "cubic"}, "model"),
        ({"tolerances": (0.0,)}, "tolerances"),
        ({"final_size": [1.0, 2.0]}, "final_size"),
        ({"step": 0}, "step"),
    ],
    ids=["model", "tolerance", "final-size", "step"],
)
def test_projection_accuracy_rejects_bad_arguments(kwargs: dict, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        projection_accuracy(np.ones(40), **kwargs)
