"""``tierwise estimate seasonal-intensity``: daily and weekly files against direct calls."""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from typer.testing import CliRunner

from server.cli import app
from server.indicators.seasonal import season_layout, seasonal_intensity
from server.indicators.windows import weekly_sum

START = dt.date(2016, 9, 26)  # Monday of ISO week 39, 2016
WEEKS = 52 * 5 + 10
COLUMNS = ["weekly_value", "epidemic_threshold", "medium_threshold", "high_threshold",
           "very_high_threshold", "level", "seasons", "not_enough_seasons"]


def run(*args: str):  # type: ignore[no-untyped-def]
    return CliRunner().invoke(app, ["estimate", "seasonal-intensity", *args])


def read_output(text: str) -> dict[str, list[str]]:
    rows = list(csv.reader(io.StringIO(text)))
    return {name: [r[i] for r in rows[1:]] for i, name in enumerate(rows[0])}


def _weekly_counts(seed: int = 2) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    mondays = np.datetime64(START) + 7 * np.arange(WEEKS).astype("timedelta64[D]")
    lay = season_layout(mondays)
    wave = np.where(lay.position >= 0, np.exp(-0.5 * ((lay.position - 15) / 3.0) ** 2), 0)
    return mondays, rng.poisson(30 + 400 * wave).astype(float)


@pytest.fixture
def daily_file(tmp_path: Path) -> tuple[Path, np.ndarray]:
    mondays, weekly = _weekly_counts()
    rng = np.random.default_rng(5)
    daily = np.concatenate([rng.multinomial(int(n), [1 / 7] * 7) for n in weekly]).astype(float)
    path = tmp_path / "daily.csv"
    lines = ["date,cases"] + [f"{START + dt.timedelta(days=i)},{int(v)}"
                              for i, v in enumerate(daily) if i != 500]  # one day left out
    path.write_text("\n".join(lines) + "\n")
    daily[500] = np.nan
    return path, daily


def test_daily_file_equals_direct_call(daily_file: tuple[Path, np.ndarray]) -> None:
    path, daily = daily_file
    result = run("--input", str(path), "--population", "250000")
    assert result.exit_code == 0, result.output
    cols = read_output(result.stdout)
    assert list(cols) == ["date", *COLUMNS]
    weeks = weekly_sum(daily, START)
    rates = weeks.values / 250_000 * 100_000
    direct = seasonal_intensity(rates, np.array(weeks.start_dates, dtype="datetime64[D]"))
    sundays = [(s - START).days + 6 for s in weeks.start_dates]
    got = np.array([float(cols["level"][i]) if cols["level"][i] else np.nan for i in sundays])
    assert_allclose(got, direct.level[0])
    thr = np.array([float(cols["epidemic_threshold"][i]) if cols["epidemic_threshold"][i]
                    else np.nan for i in sundays])
    assert_allclose(thr, direct.epidemic[0])
    # the week holding the missing day has no value and no level
    missing_week = 500 // 7
    assert cols["weekly_value"][sundays[missing_week]] == ""
    # rows that are not Sundays are empty
    assert cols["level"][0] == "" and cols["not_enough_seasons"][3] == ""
    # the first weeks are "not enough seasons", later ones are not
    flags = [cols["not_enough_seasons"][i] for i in sundays]
    assert flags[0] == "true" and flags[-1] == "false"


def test_weekly_file_equals_direct_call(tmp_path: Path) -> None:
    mondays, weekly = _weekly_counts()
    path = tmp_path / "weekly.csv"
    # weeks named by their Thursday: any day of the ISO week names it
    rows = [f"{np.datetime64(m) + np.timedelta64(3, 'D')},{int(v)}"
            for m, v in zip(mondays, weekly, strict=True)]
    path.write_text("date,cases\n" + "\n".join(rows) + "\n")
    result = run("--input", str(path), "--weekly", "--interval", "point")
    assert result.exit_code == 0, result.output
    cols = read_output(result.stdout)
    direct = seasonal_intensity(weekly[None, :], mondays, interval="point")
    got = [cols["level"][7 * k] for k in range(WEEKS)]
    assert_allclose([float(g) if g else np.nan for g in got], direct.level[0])
    assert_allclose([float(cols["very_high_threshold"][7 * k] or "nan") for k in range(WEEKS)],
                    direct.very_high[0])


def test_weekly_file_with_two_rows_in_one_week_names_both_lines(tmp_path: Path) -> None:
    path = tmp_path / "weekly.csv"
    path.write_text("date,cases\n2020-01-06,5\n2020-01-08,6\n2020-01-13,7\n")
    result = run("--input", str(path), "--weekly")
    assert result.exit_code != 0
    assert "lines 2 and 3" in result.output and "2020-W02" in result.output


@pytest.mark.parametrize(("args", "match"), [
    (["--min-seasons", "2"], "min_seasons"),
    (["--start-week", "60"], "start_week"),
    (["--interval", "median"], "--interval"),
], ids=["min", "week", "interval"])
def test_bad_options_are_named(daily_file: tuple[Path, np.ndarray], args: list[str],
                               match: str) -> None:
    result = run("--input", str(daily_file[0]), *args)
    assert result.exit_code != 0
    assert match in result.output
