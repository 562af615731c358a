"""``tierwise effects breaks|testing``: columns, values against direct calls, errors."""

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
from server.indicators.changepoints import detect_changepoints
from server.indicators.level_breaks import detect_level_breaks
from server.indicators.testing import detect_testing_changes
from server.services.effects import BREAK_COLUMNS, LEVEL_COLUMNS, TESTING_COLUMNS

START = dt.date(2031, 1, 6)  # a Monday
DAYS = 140
MISSING = 33


def _frame(seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = np.arange(DAYS)
    eta = np.where(t < 70, np.log(120) + 0.03 * t, np.log(120) + 2.1 - 0.2 - 0.04 * (t - 70))
    cases = rng.poisson(np.exp(eta)).astype(float)
    neg = rng.poisson(np.where(t < 90, 2000.0, 5000.0)).astype(float)
    return {"cases": cases, "tests": cases + neg, "positives": cases}


def _write(tmp_path: Path, data: dict[str, np.ndarray]) -> Path:
    path = tmp_path / "daily.csv"
    lines = ["date," + ",".join(data)]
    for i in range(DAYS):
        if i == MISSING:
            continue
        day = START + dt.timedelta(days=i)
        lines.append(day.isoformat() + "," + ",".join(str(int(v[i])) for v in data.values()))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def _rows(text: str) -> list[dict[str, str]]:
    return list(csv.DictReader(io.StringIO(text)))


def test_effects_breaks_matches_the_indicator(tmp_path: Path) -> None:
    data = _frame(1)
    out = tmp_path / "out.csv"
    result = CliRunner().invoke(app, ["effects", "breaks", str(_write(tmp_path, data)),
                                      "-o", str(out)])
    assert result.exit_code == 0, result.output
    rows = _rows(out.read_text())
    assert tuple(rows[0]) == BREAK_COLUMNS
    cases = data["cases"].copy()
    cases[MISSING] = np.nan  # the file leaves that date out: missing, not zero
    ref = detect_changepoints(cases)
    assert len(rows) == ref.n_breaks[0] + 1
    assert_allclose([float(r["growth_rate"]) for r in rows],
                    ref.growth[0, : len(rows)], rtol=1e-12)
    assert rows[0]["break_date"] == ""
    first = START + dt.timedelta(days=int(ref.breaks[0, 0]))
    assert rows[1]["break_date"] == rows[1]["start"] == first.isoformat()


def test_effects_testing_flags_the_change(tmp_path: Path) -> None:
    data = _frame(2)
    result = CliRunner().invoke(app, ["effects", "testing", str(_write(tmp_path, data)),
                                      "--population", "500000"])
    assert result.exit_code == 0, result.output
    rows = _rows(result.output)
    assert tuple(rows[0]) == TESTING_COLUMNS
    flagged = [r["date"] for r in rows if r["testing_change"] == "true"]
    assert flagged == [(START + dt.timedelta(days=90)).isoformat()]
    tests, pos = data["tests"].copy(), data["positives"].copy()
    tests[MISSING] = pos[MISSING] = np.nan
    ref = detect_testing_changes(tests, pos, population=5e5)
    assert_allclose([float(r["tests_ratio"]) for r in rows],
                    ref.tests_ratio[0, : len(rows)], rtol=1e-12)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["effects", "testing", "{file}"], "Missing option '--population'"),
        (["effects", "breaks", "{file}", "--dispersion", "nb"], "--dispersion: expected"),
        (["effects", "breaks", "{missing}"], "file not found"),
    ],
    ids=["no-population", "bad-dispersion", "no-file"],
)
def test_effects_errors_name_the_problem(tmp_path: Path, args: list[str], message: str) -> None:
    path = _write(tmp_path, _frame(3))
    argv = [a.format(file=path, missing=tmp_path / "nope.csv") for a in args]
    result = CliRunner().invoke(app, argv)
    assert result.exit_code != 0
    assert message in result.output


def test_effects_breaks_names_a_missing_column(tmp_path: Path) -> None:
    path = tmp_path / "x.csv"
    path.write_text("date,cases_total\n2031-01-01,3\n", encoding="utf-8")
    result = CliRunner().invoke(app, ["effects", "breaks", str(path)])
    assert result.exit_code == 1
    assert "missing column 'cases'" in result.output


def test_effects_breaks_uses_testing_changes_and_gives_transmission_dates(tmp_path: Path) -> None:
    data = _frame(4)
    data["cases"] = data["positives"] = np.where(np.arange(DAYS) >= 90, data["cases"] * 1.6,
                                                 data["cases"]).round()
    data["tests"] = data["cases"] + np.where(np.arange(DAYS) >= 90, 5000.0, 2000.0)
    path = _write(tmp_path, data)
    argv = ["effects", "breaks", str(path), "--population", "500000", "--infection-delay",
            "8.5", "--si-mean", "7", "--si-sd", "5"]
    result = CliRunner().invoke(app, argv)
    assert result.exit_code == 0, result.output
    rows = _rows(result.output)
    cases = data["cases"].copy()
    cases[MISSING] = np.nan
    ref = detect_changepoints(cases, level_shifts=[90], infection_delay=8.5, si_mean=7.0,
                              si_sd=5.0)
    assert len(rows) == ref.n_breaks[0] + 1
    lag = 8.5 - (5.0**2 + 7.0**2) / (2 * 7.0)
    first = START + dt.timedelta(days=int(round(ref.breaks[0, 0] - lag)))
    assert rows[1]["transmission_date"] == first.isoformat()


def _two_kinks(seed: int) -> np.ndarray:
    """Growth 0.03 -> -0.04 per day at day 50 (R about 1.15 -> 0.83 for the default gamma
    4.7/2.9) and -0.04 -> -0.028 at day 95 (R up about 6 %)."""
    rng = np.random.default_rng(seed)
    t = np.arange(DAYS)
    eta = np.log(200) + 0.03 * t - 0.07 * np.maximum(t - 50, 0) + 0.012 * np.maximum(t - 95, 0)
    return rng.poisson(np.exp(eta)).astype(float)


@pytest.mark.parametrize(("value", "expected"), [("0", 2), (None, 1), ("0.5", 0)],
                         ids=["zero", "default", "half"])
def test_effects_breaks_min_change_matches_the_kernel(tmp_path: Path, value: str | None,
                                                      expected: int) -> None:
    # the small kink (R about +6 %) is reported only below the default 10 %; the large one
    # (R about -28 %) only below 50 %; rows equal the kernel called with the same min_change
    path = _write(tmp_path, {"cases": _two_kinks(5)})
    argv = ["effects", "breaks", str(path)] + ([] if value is None else ["--min-change", value])
    result = CliRunner().invoke(app, argv)
    assert result.exit_code == 0, result.output
    rows = _rows(result.output)
    cases = _two_kinks(5)
    cases[MISSING] = np.nan
    ref = detect_changepoints(cases, min_change=0.1 if value is None else float(value))
    assert ref.n_breaks[0] == expected
    assert len(rows) == expected + 1
    assert [r["break_date"] for r in rows[1:]] == [
        (START + dt.timedelta(days=int(b))).isoformat() for b in ref.breaks[0, :expected]]
    assert_allclose([float(r["growth_rate"]) for r in rows], ref.growth[0, : len(rows)],
                    rtol=1e-12)


def test_effects_breaks_refuses_a_negative_min_change(tmp_path: Path) -> None:
    path = _write(tmp_path, {"cases": _two_kinks(5)})
    result = CliRunner().invoke(app, ["effects", "breaks", str(path), "--min-change", "-0.1"])
    assert result.exit_code == 2
    assert "--min-change" in result.output


def test_effects_breaks_reads_another_column_of_counts(tmp_path: Path) -> None:
    # admissions in a column of their own: the same search as on cases
    data = {"admissions": _two_kinks(6)}
    result = CliRunner().invoke(app, ["effects", "breaks", str(_write(tmp_path, data)),
                                      "--column", "admissions"])
    assert result.exit_code == 0, result.output
    counts = data["admissions"].copy()
    counts[MISSING] = np.nan
    ref = detect_changepoints(counts)
    assert len(_rows(result.output)) == ref.n_breaks[0] + 1


def test_effects_levels_matches_the_level_kernel(tmp_path: Path) -> None:
    # a concentration sampled three days a week (other days empty cells: no sample)
    rng = np.random.default_rng(8)
    t = np.arange(DAYS)
    conc = np.exp(np.log(4e4) + 0.03 * t - 0.06 * np.maximum(t - 70, 0)
                  + rng.normal(0, 0.4, DAYS))
    conc = np.where(t % 7 < 3, conc, np.nan)
    path = tmp_path / "ww.csv"
    lines = ["date,concentration"] + [
        f"{(START + dt.timedelta(days=i)).isoformat()},{'' if np.isnan(v) else repr(float(v))}"
        for i, v in enumerate(conc)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    result = CliRunner().invoke(app, ["effects", "levels", str(path)])
    assert result.exit_code == 0, result.output
    rows = _rows(result.output)
    assert tuple(rows[0]) == LEVEL_COLUMNS
    ref = detect_level_breaks(conc)
    assert len(rows) == ref.n_breaks[0] + 1 >= 2
    assert_allclose([float(r["growth_rate"]) for r in rows], ref.growth[0, : len(rows)],
                    rtol=1e-12)
    assert rows[1]["break_date"] == (START + dt.timedelta(days=int(ref.breaks[0, 0]))).isoformat()


@pytest.mark.parametrize(("flags", "smoothing", "delay_sd"),
                         [(["--delay-sd", "3.5"], None, 3.5), (["--no-smoothing"], False, None)],
                         ids=["delay-sd", "plain"])
def test_effects_breaks_passes_the_delay_sd_and_smoothing_to_the_kernel(
        tmp_path: Path, flags: list[str], smoothing: bool | None, delay_sd: float | None) -> None:
    # growth rates equal the kernel called with the same smoothing options; smoothed and plain
    # kinks give different growth rates, so the rows show which one ran
    path = _write(tmp_path, {"cases": _two_kinks(7)})
    argv = ["effects", "breaks", str(path), "--infection-delay", "6", *flags]
    result = CliRunner().invoke(app, argv)
    assert result.exit_code == 0, result.output
    rows = _rows(result.output)
    cases = _two_kinks(7)
    cases[MISSING] = np.nan
    ref = detect_changepoints(cases, infection_delay=6.0, smoothing=smoothing, delay_sd=delay_sd)
    other = detect_changepoints(cases, infection_delay=6.0, smoothing=smoothing is False)
    assert_allclose([float(r["growth_rate"]) for r in rows], ref.growth[0, : len(rows)],
                    rtol=1e-12)
    assert not np.allclose(ref.growth[0, : len(rows)], other.growth[0, : len(rows)])


def test_effects_breaks_refuses_a_delay_sd_without_a_delay(tmp_path: Path) -> None:
    path = _write(tmp_path, {"cases": _two_kinks(5)})
    result = CliRunner().invoke(app, ["effects", "breaks", str(path), "--delay-sd", "2"])
    assert result.exit_code != 0
    assert "--delay-sd" in result.output and "--infection-delay" in result.output


@pytest.mark.parametrize("window", [0, 42, 30], ids=["whole", "default", "thirty"])
def test_effects_breaks_passes_the_local_window_to_the_kernel(tmp_path: Path,
                                                               window: int) -> None:
    # the growth changes equal the kernel's with the same local window (0: whole segments)
    path = _write(tmp_path, {"cases": _two_kinks(8)})
    result = CliRunner().invoke(app, ["effects", "breaks", str(path), "--local-window",
                                      str(window)])
    assert result.exit_code == 0, result.output
    rows = _rows(result.output)
    cases = _two_kinks(8)
    cases[MISSING] = np.nan
    ref = detect_changepoints(cases, local_window=window or None)
    shown = [float(r["growth_change"]) for r in rows[1:]]
    assert len(shown) == ref.n_breaks[0] >= 1
    assert_allclose(shown, ref.growth_change[0, : len(shown)], rtol=1e-12)
    # the windows give different changes here (the rows show which one ran)
    other = detect_changepoints(cases, local_window=None if window else 42)
    assert not np.allclose(shown, other.growth_change[0, : len(shown)])


def test_effects_breaks_refuses_a_negative_local_window(tmp_path: Path) -> None:
    path = _write(tmp_path, {"cases": _two_kinks(5)})
    result = CliRunner().invoke(app, ["effects", "breaks", str(path), "--local-window", "-3"])
    assert result.exit_code != 0
    assert "--local-window" in result.output
