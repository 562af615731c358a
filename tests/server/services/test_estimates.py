"""server.services.estimates: reading daily CSV files, serial-interval files and writing tables."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from server.services.errors import InputFileError
from server.services.estimate_csv import (
    EstimateTable,
    estimates_csv,
    read_daily_csv,
    read_serial_interval_csv,
)


def test_read_daily_csv_fills_missing_dates_with_nan(tmp_path: Path) -> None:
    path = tmp_path / "in.csv"
    path.write_text("date,cases\n2023-03-05,7\n2023-03-01,3\n2023-03-03,\n")
    table = read_daily_csv(path, required=["cases"], counts=["cases"])
    assert table.dates == tuple(dt.date(2023, 3, d) for d in range(1, 6))
    assert_allclose(table.values["cases"], [3, np.nan, np.nan, np.nan, 7])
    assert list(table.lines) == [3, 0, 4, 0, 2]


def test_read_daily_csv_ignores_unused_columns(tmp_path: Path) -> None:
    path = tmp_path / "in.csv"
    path.write_text("note,date,cases\nabc,2023-03-01,3\n")
    table = read_daily_csv(path, required=["cases"])
    assert list(table.values) == ["cases"]


def test_read_serial_interval_csv_fills_left_out_lags_with_zero(tmp_path: Path) -> None:
    path = tmp_path / "si.csv"
    path.write_text("k,p\n3,0.5\n1,0.5\n")
    si = read_serial_interval_csv(path)
    assert_allclose(si.pmf, [0.0, 0.5, 0.0, 0.5])
    # Mean of a two-point distribution on 1 and 3 with equal mass: 2 (by hand).
    assert_allclose(si.mean, 2.0)


def test_read_serial_interval_csv_refuses_mass_not_summing_to_one(tmp_path: Path) -> None:
    path = tmp_path / "si.csv"
    path.write_text("k,p\n1,0.5\n2,0.4\n")
    with pytest.raises(InputFileError, match="si.csv: p: probabilities sum to 0.9, not 1"):
        read_serial_interval_csv(path)


def test_read_serial_interval_csv_refuses_mass_at_lag_zero(tmp_path: Path) -> None:
    path = tmp_path / "si.csv"
    path.write_text("k,p\n0,0.1\n1,0.9\n")
    with pytest.raises(InputFileError, match="line 2: p: must be 0 at k = 0"):
        read_serial_interval_csv(path)


def test_estimates_csv_round_trips_floats_and_writes_flags(tmp_path: Path) -> None:
    value = float(stats.chi2.ppf(0.975, 9))  # any float with a long expansion
    table = EstimateTable(
        kind="x", dates=(dt.date(2023, 1, 1), dt.date(2023, 1, 2)), columns=("v", "alarm"),
        data=(np.array([value, np.nan]), np.array([1.0, np.nan])), flags=frozenset({"alarm"}),
    )
    lines = estimates_csv(table).splitlines()
    assert lines[0] == "date,v,alarm"
    assert lines[1].split(",")[2] == "true" and float(lines[1].split(",")[1]) == value
    assert lines[2] == "2023-01-02,,"


def test_estimate_table_refuses_column_of_wrong_length() -> None:
    with pytest.raises(ValueError, match="v: shape"):
        EstimateTable(kind="x", dates=(dt.date(2023, 1, 1),), columns=("v",),
                      data=(np.zeros(2),))
