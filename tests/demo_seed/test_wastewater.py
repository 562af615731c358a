"""Tests for the wastewater observation model (demo_seed.wastewater)."""

from __future__ import annotations

import numpy as np
import pytest

from demo_seed.observation import weekday
from demo_seed.wastewater import DETECTION_LIMIT, SAMPLE_WEEKDAYS, Wastewater, wastewater

DAYS = 364
DATES = np.datetime64("2031-01-06", "D") + np.arange(DAYS)   # invented; a Monday


@pytest.fixture(scope="module")
def ww() -> Wastewater:
    rng = np.random.default_rng(8)
    level = 300.0 * (1.0 + np.sin(np.arange(DAYS) / 30.0)) + 20.0
    infections = rng.poisson(np.vstack([level, 0.5 * level, 0.2 * level])).astype(float)
    catchment = np.array([[0.9, 0.2, 0.0], [0.0, 0.7, 0.8]])
    served = np.array([0.9 * 2e5 + 0.2 * 1e5, 0.7 * 1e5 + 0.8 * 4e4])
    return wastewater(infections, catchment, served, DATES, np.random.default_rng(9))


def test_wastewater_samples_only_on_plant_weekdays(ww: Wastewater) -> None:
    wd = weekday(DATES)
    for p in range(2):
        assert set(wd[ww.sampled[p]]) <= set(SAMPLE_WEEKDAYS[p])


def test_wastewater_two_or_three_samples_a_week(ww: Wastewater) -> None:
    weekly = ww.sampled.reshape(2, -1, 7).sum(axis=2)
    assert weekly.max() <= 3 and np.mean(weekly >= 2) > 0.8


def test_wastewater_nan_exactly_off_sample_days(ww: Wastewater) -> None:
    for series in (ww.concentration, ww.flow, ww.marker):
        assert np.array_equal(np.isnan(series), ~ww.sampled)


def test_wastewater_concentration_not_below_half_detection_limit(ww: Wastewater) -> None:
    assert np.nanmin(ww.concentration) >= DETECTION_LIMIT / 2.0


def test_wastewater_concentration_diluted_by_flow(ww: Wastewater) -> None:
    s = ww.sampled[0]
    log_flow = np.log(ww.flow[0, s])
    raw = np.corrcoef(np.log(ww.concentration[0, s] / ww.load[0, s]), log_flow)[0, 1]
    assert raw < -0.3


def test_wastewater_marker_ratio_free_of_dilution(ww: Wastewater) -> None:
    s = ww.sampled[0]
    log_flow = np.log(ww.flow[0, s])
    ratio = np.log(ww.concentration[0, s] / ww.marker[0, s] / ww.load[0, s])
    # dividing by a faecal marker removes dilution (common practice, see REFERENCES.md)
    assert abs(np.corrcoef(ratio, log_flow)[0, 1]) < 0.2
