"""Tests for vintaged observation rows (demo_seed.vintages)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from demo_seed.errors import ScenarioArgumentError
from demo_seed.vintages import delayed_report_rows, first_report_rows, rows_to_frame

DATES = np.datetime64("2031-03-01", "D") + np.arange(5)


def test_first_report_rows_skip_nan_and_late_rows() -> None:
    values = np.array([[1.0, np.nan, 3.0, 4.0, 5.0]])
    block = first_report_rows(values, ("X1",), "m", lag=2)
    assert block.ref_day.tolist() == [0, 2]
    assert block.known_day.tolist() == [2, 4]


def test_delayed_report_rows_values_are_cumulative() -> None:
    by_delay = np.zeros((1, 5, 3))
    by_delay[0, 0] = [2.0, 0.0, 3.0]
    block = delayed_report_rows(by_delay, ("X1",), "cases")
    first = block.ref_day == 0
    assert block.known_day[first].tolist() == [0, 2]
    assert_allclose(block.value[first], [2.0, 5.0])


def test_delayed_report_rows_first_report_even_if_zero() -> None:
    by_delay = np.zeros((1, 5, 3))
    block = delayed_report_rows(by_delay, ("X1",), "cases")
    assert block.ref_day.tolist() == [0, 1, 2, 3, 4]
    assert_allclose(block.value, 0.0)


def test_rows_to_frame_columns_and_dtypes() -> None:
    block = first_report_rows(np.ones((1, 5)), ("X1",), "m", lag=1)
    frame = rows_to_frame([block], DATES)
    assert list(frame.columns) == ["region", "measure", "ref_date", "value", "known_on"]
    assert frame["value"].dtype == np.float64
    assert (frame["known_on"] - frame["ref_date"]).dt.days.tolist() == [1, 1, 1, 1]


def test_first_report_rows_negative_lag_raises() -> None:
    with pytest.raises(ScenarioArgumentError, match="lag=-1"):
        first_report_rows(np.ones((1, 5)), ("X1",), "m", lag=-1)
