"""Internal check on INVENTED data: the Rt estimator against the demo simulator's ground truth.

This is not a published reference: the demo scenario (demo_seed) is invented and keeps its true
infections and true instantaneous Rt. Estimating Rt by the renewal method of Cori et al. (2013, Am J
Epidemiol 178:1505) from the true infections, with the simulator's own generation interval, must
track the true Rt averaged over each 7-day window. Exact 95 % coverage is not expected: the
simulator's Rt is local (beta * S/N * D) while neighbour coupling and importations add infections
the renewal equation attributes to local transmission, and large counts give narrow intervals.
The thresholds below were measured on seed 7 (coverage 0.90, median relative error 0.05 over
windows with at least 50 infections) and are set a little lower as a regression guard.
"""

from __future__ import annotations

from datetime import date

import numpy as np
import pytest
from numpy.lib.stride_tricks import sliding_window_view

from demo_seed.scenario import build_scenario
from server.indicators.renewal import reproduction_number
from server.indicators.serial_interval import discrete_serial_interval

WINDOW = 7


@pytest.fixture(scope="module")
def estimate_and_truth() -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    truth = build_scenario(seed=7, end=date(2026, 11, 30)).truth
    est = reproduction_number(
        truth.infections, discrete_serial_interval(truth.generation_interval), WINDOW
    )
    window_mean = np.full_like(truth.rt, np.nan)
    window_mean[:, WINDOW - 1 :] = sliding_window_view(truth.rt, WINDOW, axis=1).mean(-1)
    infections = np.full_like(truth.rt, np.nan)
    infections[:, WINDOW - 1 :] = sliding_window_view(truth.infections, WINDOW, axis=1).sum(-1)
    usable = np.isfinite(est.estimate) & (infections >= 50)
    return est.estimate[usable], est.lower[usable], est.upper[usable], window_mean[usable]


def test_rt_intervals_cover_demo_truth_most_of_the_time(estimate_and_truth) -> None:  # type: ignore[no-untyped-def]
    _, lower, upper, truth = estimate_and_truth
    assert truth.size > 1000
    coverage = np.mean((lower <= truth) & (truth <= upper))
    assert coverage >= 0.85


def test_rt_estimate_close_to_demo_truth(estimate_and_truth) -> None:  # type: ignore[no-untyped-def]
    estimate, _, _, truth = estimate_and_truth
    assert np.median(np.abs(estimate - truth) / truth) < 0.08
