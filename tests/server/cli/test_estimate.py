"""``tierwise estimate KIND``: columns, values against direct calls and outside references."""

from __future__ import annotations

import csv
import datetime as dt
import io
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.stats.proportion import proportion_confint
from typer.testing import CliRunner

from server.cli import app
from server.indicators.aberration import ears, farrington_flexible
from server.indicators.growth import rolling_growth_rate
from server.indicators.poisson import incidence_rate
from server.indicators.renewal import reproduction_number
from server.indicators.serial_interval import gamma_serial_interval
from server.indicators.windows import weekly_sum

START = dt.date(2023, 1, 2)  # a Monday
DAYS = 70
MISSING_DAY = 40  # left out of every file: that date must stay missing, never zero


def run(*args: str):  # type: ignore[no-untyped-def]
    return CliRunner().invoke(app, ["estimate", *args])


def daily_frame(seed: int, days: int = DAYS) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    t = np.arange(days)
    cases = rng.poisson(40 * np.exp(0.015 * t)).astype(float)
    tests = cases * 6 + rng.poisson(200, days)
    admissions = rng.poisson(3 + 0.05 * t).astype(float)
    occupied = np.round(25 + 0.2 * t)
    staffed = np.full(days, 60.0)
    concentration = np.where(t % 3 == 0, np.exp(10 + 0.02 * t + rng.normal(0, 0.1, days)), np.nan)
    return {
        "cases": cases, "positives": cases, "tests": tests, "admissions": admissions,
        "occupied": occupied, "staffed": staffed, "concentration": concentration,
    }


def write_csv(path: Path, frame: dict[str, np.ndarray], *, skip: tuple[int, ...] = (MISSING_DAY,),
              seed: int = 0) -> Path:
    names = list(frame)
    days = len(next(iter(frame.values())))
    order = np.random.default_rng(seed).permutation(days)  # rows out of order on purpose
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["date", *names])
        for i in order:
            if i in skip:
                continue
            cells = ["" if np.isnan(frame[n][i]) else repr(float(frame[n][i])) for n in names]
            writer.writerow([(START + dt.timedelta(days=int(i))).isoformat(), *cells])
    return path


def with_gap(values: np.ndarray, skip: tuple[int, ...] = (MISSING_DAY,)) -> np.ndarray:
    out = values.astype(float).copy()
    out[list(skip)] = np.nan
    return out


def read_output(text: str) -> tuple[list[str], dict[str, list[str]]]:
    rows = list(csv.reader(io.StringIO(text)))
    header = rows[0]
    return header, {name: [r[j] for r in rows[1:]] for j, name in enumerate(header)}


def numbers(cells: list[str]) -> np.ndarray:
    return np.array([float(c) if c else np.nan for c in cells])


@pytest.fixture
def daily(tmp_path: Path) -> Path:
    return write_csv(tmp_path / "daily.csv", daily_frame(1))


KIND_ARGS = {
    "rt": ["--si-mean", "4.7", "--si-sd", "2.9"],
    "incidence": ["--population", "80000"],
    "positivity": [],
    "aberration": ["--method", "c1"],
    "growth": [],
    "wastewater": ["--min-samples", "5"],
    "icu-projection": [],
    "curve-fit": ["--n-boot", "10"],
}
KIND_COLUMNS = {
    "rt": ["r_mean", "r_lower", "r_upper", "r_cv"],
    "incidence": ["rate", "rate_lower", "rate_upper"],
    "positivity": ["positivity", "positivity_lower", "positivity_upper"],
    "aberration": ["expected", "upper", "alarm"],
    "growth": ["growth_rate", "growth_rate_lower", "growth_rate_upper", "doubling_time",
               "doubling_time_lower", "doubling_time_upper"],
    "wastewater": ["log_value", "smoothed", "trend", "trend_lower", "trend_upper", "level"],
    "icu-projection": ["admissions_level", "occupied_projected", "occupied_lower",
                       "occupied_upper", "share_projected", "share_lower", "share_upper",
                       "days_to_threshold", "days_to_threshold_lower",
                       "days_to_threshold_upper"],
    "curve-fit": ["cumulative", "fitted_cumulative", "fitted_daily", "final_size",
                  "final_size_lower", "final_size_upper", "final_size_is_lower_bound",
                  "share_reached", "share_at_turning_point", "projected_cumulative",
                  "projected_lower", "projected_upper"],
}


@pytest.mark.parametrize("kind", list(KIND_ARGS), ids=list(KIND_ARGS))
def test_estimate_kind_writes_one_row_per_date_with_its_columns(kind: str, daily: Path) -> None:
    result = run(kind, "--input", str(daily), *KIND_ARGS[kind])
    assert result.exit_code == 0, result.output
    header, cols = read_output(result.stdout)
    assert header == ["date", *KIND_COLUMNS[kind]]
    expected_dates = [(START + dt.timedelta(days=i)).isoformat() for i in range(DAYS)]
    assert cols["date"] == expected_dates
    assert any(c for c in cols[KIND_COLUMNS[kind][0]])  # at least one estimate


def test_estimate_nowcast_writes_triangle_columns(tmp_path: Path) -> None:
    cum = np.array([[10, 14, 15], [8, 12, 13], [9, 12, np.nan], [7, np.nan, np.nan]], float)
    frame = {f"d{d}": cum[:, d] for d in range(3)}
    path = write_csv(tmp_path / "tri.csv", frame, skip=())
    result = run("nowcast", "--input", str(path))
    assert result.exit_code == 0, result.output
    header, cols = read_output(result.stdout)
    assert header == ["date", "nowcast", "nowcast_lower", "nowcast_upper", "known",
                      "reported_share"]
    # Chain ladder by hand (Mack 1993): f0 = (14 + 12 + 12) / (10 + 8 + 9), f1 = 28 / 26.
    f0, f1 = 38 / 27, 28 / 26
    assert_allclose(numbers(cols["nowcast"]), [15, 13, 12 * f1, 7 * f0 * f1], rtol=1e-12)


def test_estimate_rt_equals_direct_call_and_gamma_posterior(daily: Path) -> None:
    result = run("rt", "--input", str(daily), "--si-mean", "4.7", "--si-sd", "2.9")
    _, cols = read_output(result.stdout)
    cases = with_gap(daily_frame(1)["cases"])
    direct = reproduction_number(cases, gamma_serial_interval(4.7, 2.9), 7)
    assert_allclose(numbers(cols["r_mean"]), direct.estimate[0], rtol=1e-15)
    assert_allclose(numbers(cols["r_upper"]), direct.upper[0], rtol=1e-15)
    ok = np.isfinite(direct.estimate[0])
    # Cori et al. (2013) eq. 2: gamma posterior; quantile from scipy.stats.gamma.
    q = stats.gamma.ppf(0.025, direct.shape[0, ok], scale=1 / direct.rate[0, ok])
    assert_allclose(numbers(cols["r_lower"])[ok], q, rtol=1e-9)


def test_estimate_rt_quasi_poisson_equals_direct_call(daily: Path) -> None:
    result = run("rt", "--input", str(daily), "--si-mean", "4.7", "--si-sd", "2.9",
                 "--overdispersion", "quasi-poisson")
    assert result.exit_code == 0, result.output
    _, cols = read_output(result.stdout)
    cases = with_gap(daily_frame(1)["cases"])
    direct = reproduction_number(cases, gamma_serial_interval(4.7, 2.9), 7,
                                 overdispersion="quasi-poisson")
    assert_allclose(numbers(cols["r_upper"]), direct.upper[0], rtol=1e-15)


def test_estimate_rt_unknown_overdispersion_is_refused(daily: Path) -> None:
    result = run("rt", "--input", str(daily), "--si-mean", "4.7", "--si-sd", "2.9",
                 "--overdispersion", "negbin")
    assert result.exit_code == 1
    assert "--overdispersion: expected none or quasi-poisson" in result.output


def test_estimate_rt_rows_without_estimate_stay_empty(daily: Path) -> None:
    result = run("rt", "--input", str(daily), "--si-mean", "4.7", "--si-sd", "2.9")
    _, cols = read_output(result.stdout)
    # The first days lack history, and no window may contain the missing day.
    assert cols["r_mean"][0] == "" and cols["r_cv"][0] == ""
    assert all(c == "" for c in cols["r_mean"][MISSING_DAY : MISSING_DAY + 7])
    assert "0.0" not in cols["r_mean"]


def test_estimate_rt_reads_a_discrete_serial_interval_file(daily: Path, tmp_path: Path) -> None:
    si = tmp_path / "si.csv"
    si.write_text("k,p\n1,0.25\n2,0.5\n3,0.25\n")
    result = run("rt", "--input", str(daily), "--si-file", str(si))
    assert result.exit_code == 0, result.output
    _, cols = read_output(result.stdout)
    cases = with_gap(daily_frame(1)["cases"])
    # Cori et al. (2013) eq. 2 by hand for the last window: shape 1 + sum I, rate 1/5 + sum Lambda.
    lam = 0.25 * cases[-8:-1] + 0.5 * cases[-9:-2] + 0.25 * cases[-10:-3]
    assert_allclose(float(cols["r_mean"][-1]), (1 + cases[-7:].sum()) / (0.2 + lam.sum()),
                    rtol=1e-12)


def test_estimate_incidence_matches_garwood_chi_square_bounds(daily: Path) -> None:
    result = run("incidence", "--input", str(daily), "--population", "80000")
    _, cols = read_output(result.stdout)
    cases = with_gap(daily_frame(1)["cases"])
    x = np.convolve(cases, np.ones(7))[6:DAYS]  # 7-day sums ending on days 6..
    # Garwood (1936): lower = chi2(0.025; 2x)/2, upper = chi2(0.975; 2x + 2)/2, scipy.stats.chi2.
    scale = 1e5 / 80000
    assert_allclose(numbers(cols["rate"])[6:], x * scale, rtol=1e-12)
    assert_allclose(numbers(cols["rate_lower"])[6:], stats.chi2.ppf(0.025, 2 * x) / 2 * scale,
                    rtol=1e-9)
    assert_allclose(numbers(cols["rate_upper"])[6:],
                    stats.chi2.ppf(0.975, 2 * x + 2) / 2 * scale, rtol=1e-9)
    assert all(c == "" for c in cols["rate"][:6])


def test_estimate_positivity_matches_statsmodels_wilson(daily: Path) -> None:
    result = run("positivity", "--input", str(daily))
    _, cols = read_output(result.stdout)
    frame = daily_frame(1)
    pos = np.convolve(with_gap(frame["positives"]), np.ones(7))[6:DAYS]
    tst = np.convolve(with_gap(frame["tests"]), np.ones(7))[6:DAYS]
    ok = np.isfinite(pos)
    # Reference: statsmodels proportion_confint(method="wilson") (Wilson 1927).
    low, upp = proportion_confint(pos[ok], tst[ok], alpha=0.05, method="wilson")
    assert_allclose(numbers(cols["positivity_lower"])[6:][ok], low, rtol=1e-9)
    assert_allclose(numbers(cols["positivity_upper"])[6:][ok], upp, rtol=1e-9)
    assert all(c == "" for c in cols["positivity"][MISSING_DAY : MISSING_DAY + 7])


def test_estimate_growth_equals_direct_call(daily: Path) -> None:
    result = run("growth", "--input", str(daily))
    _, cols = read_output(result.stdout)
    direct = rolling_growth_rate(with_gap(daily_frame(1)["cases"]))
    assert_allclose(numbers(cols["growth_rate"]), direct.estimate[0], rtol=1e-15)
    assert_allclose(numbers(cols["doubling_time_upper"]), direct.doubling_upper[0], rtol=1e-15)


@pytest.mark.parametrize("method", ["c1", "c2", "c3"], ids=["C1", "C2", "C3"])
def test_estimate_aberration_ears_equals_direct_call(method: str, daily: Path) -> None:
    result = run("aberration", "--input", str(daily), "--method", method)
    _, cols = read_output(result.stdout)
    direct = ears(with_gap(daily_frame(1)["cases"]), method=method.upper())
    assert_allclose(numbers(cols["expected"]), direct.expected[0], rtol=1e-15)
    has = np.isfinite(direct.expected[0])
    assert [c == "true" for c in np.array(cols["alarm"])[has]] == list(direct.alarm[0][has])
    assert set(np.array(cols["alarm"])[~has]) <= {""}


def test_estimate_aberration_farrington_dates_weeks_on_their_sunday(tmp_path: Path) -> None:
    days = 3 * 364 + 10
    rng = np.random.default_rng(9)
    cases = rng.poisson(20, days).astype(float)
    cases[-5] = 90.0  # an outbreak day in the last full week
    path = write_csv(tmp_path / "long.csv", {"cases": cases}, skip=())
    result = run("aberration", "--input", str(path), "--method", "farrington")
    assert result.exit_code == 0, result.output
    _, cols = read_output(result.stdout)
    weekly = weekly_sum(cases, START)
    direct = farrington_flexible(weekly.values)
    expected = numbers(cols["expected"])
    filled = np.flatnonzero(np.isfinite(expected))
    dates = [START + dt.timedelta(days=int(i)) for i in filled]
    assert {d.isoweekday() for d in dates} == {7}  # ISO weeks end on Sunday
    ends = np.array([(s - START).days + 6 for s in weekly.start_dates])
    assert_allclose(expected[filled], direct.expected[0, np.isin(ends, filled)], rtol=1e-15)
    assert cols["alarm"][int(filled[-1])] == "true"


def test_estimate_writes_an_output_file(daily: Path, tmp_path: Path) -> None:
    out = tmp_path / "out.csv"
    result = run("incidence", "--input", str(daily), "--population", "80000", "--output", str(out))
    assert result.exit_code == 0, result.output
    header, cols = read_output(out.read_text())
    direct = incidence_rate(with_gap(daily_frame(1)["cases"]), 80000)
    assert_allclose(numbers(cols["rate"]), direct.estimate[0], rtol=1e-15)


BAD_FILES = {
    "missing-column": ("date,count\n2023-01-02,4\n", "line 1: missing column 'cases'"),
    "bad-date": ("date,cases\n2023-01-02,4\n2023-02-30,5\n", "line 3: date: '2023-02-30' is not"),
    "not-a-number": ("date,cases\n2023-01-02,4\n2023-01-03,5\n2023-01-04,abc\n",
                     "line 4: cases: 'abc' is not a number"),
    "duplicate-date": ("date,cases\n2023-01-02,4\n2023-01-03,5\n2023-01-02,6\n",
                       "lines 2 and 4: date: 2023-01-02 appears twice"),
    "negative-count": ("date,cases\n2023-01-02,4\n2023-01-03,-2\n",
                       "line 3: cases: -2 is negative"),
    "fraction-count": ("date,cases\n2023-01-02,4.5\n", "line 2: cases: 4.5 is not a whole number"),
    "empty-file": ("", "line 1: the file is empty"),
}


@pytest.mark.parametrize("content,message", list(BAD_FILES.values()), ids=list(BAD_FILES))
def test_estimate_bad_input_fails_with_one_line(content: str, message: str,
                                                tmp_path: Path) -> None:
    path = tmp_path / "input.csv"
    path.write_text(content)
    result = run("incidence", "--input", str(path), "--population", "1000")
    assert result.exit_code == 1
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1, result.output
    assert f"{path}: {message}" in lines[0]
    assert "Traceback" not in result.output


@pytest.mark.parametrize(
    "args,message",
    [
        pytest.param(["rt"], "--si-mean/--si-sd", id="rt-without-serial-interval"),
        pytest.param(["incidence"], "--population", id="incidence-without-population"),
        pytest.param(["growth", "--window", "5"], "window: window must be an integer >= 9",
                     id="growth-window-too-short"),
        pytest.param(["aberration", "--method", "c9"], "--method", id="unknown-method"),
    ],
)
def test_estimate_bad_option_fails_with_one_line(args: list[str], message: str,
                                                 daily: Path) -> None:
    result = run(args[0], "--input", str(daily), *args[1:])
    assert result.exit_code == 1
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and message in lines[0], result.output


def test_estimate_missing_input_file_fails_with_one_line(tmp_path: Path) -> None:
    result = run("growth", "--input", str(tmp_path / "absent.csv"))
    assert result.exit_code == 1
    assert "absent.csv: file not found" in result.output


def test_estimate_help_lists_every_kind() -> None:
    result = CliRunner().invoke(app, ["estimate", "--help"], terminal_width=100)
    assert result.exit_code == 0
    for kind in [*KIND_ARGS, "nowcast"]:
        assert f"{kind}:" in result.output


def _logistic_wave(days: int, seed: int) -> dict[str, np.ndarray]:
    # A logistic wave turning at day 40 with final size 5000 (the held-out case of issue 13).
    from server.indicators.curves import richards_cumulative

    t = np.arange(days, dtype=float)
    mu = richards_cumulative(t, 5000, 0.2, 40) - richards_cumulative(t - 1, 5000, 0.2, 40)
    return {"cases": np.random.default_rng(seed).poisson(mu).astype(float)}


def test_curve_fit_before_the_turning_point_warns_and_gives_a_lower_bound(tmp_path: Path) -> None:
    path = write_csv(tmp_path / "early.csv", _logistic_wave(25, 3), skip=())
    result = run("curve-fit", "--input", str(path), "--n-boot", "10")
    assert result.exit_code == 0, result.output
    assert "lower bound" in result.stderr and "underestimate" in result.stderr
    _, cols = read_output(result.stdout)
    assert cols["final_size_is_lower_bound"][-1] == "true"
    assert cols["final_size_upper"][-1] == ""
    # Logistic (Richards 1959, v = 1): the share at the turning point is 1/2.
    assert float(cols["share_at_turning_point"][-1]) == pytest.approx(0.5)
    assert float(cols["share_reached"][-1]) < 0.5


def test_curve_fit_after_the_turning_point_gives_an_interval_without_warning(
    tmp_path: Path,
) -> None:
    path = write_csv(tmp_path / "late.csv", _logistic_wave(70, 4), skip=())
    result = run("curve-fit", "--input", str(path), "--n-boot", "20")
    assert result.exit_code == 0, result.output
    assert "lower bound" not in result.stderr
    _, cols = read_output(result.stdout)
    assert cols["final_size_is_lower_bound"][-1] == "false"
    final = float(cols["final_size"][-1])
    lower, upper = float(cols["final_size_lower"][-1]), float(cols["final_size_upper"][-1])
    assert lower <= final <= upper
    assert final == pytest.approx(5000, rel=0.05)  # the simulator's final size
# -- the kinds of the policy registry, through the builders a policy's indicators use ---------


def test_registry_wastewater_trend_matches_scipy_linregress(tmp_path: Path) -> None:
    frame = daily_frame(11)
    flow = np.where(np.isfinite(frame["concentration"]), 2.0e7, np.nan)
    path = write_csv(tmp_path / "ww.csv", {"ww_concentration": frame["concentration"],
                                           "ww_flow": flow}, skip=())
    result = run("wastewater_trend", "-i", str(path), "--population", "40000")
    assert result.exit_code == 0, result.output
    header, cols = read_output(result.output)
    assert header == ["date", "value", "lower", "upper"]
    value, lower, upper = (numbers(cols[c]) for c in ("value", "lower", "upper"))
    log_load = np.log(frame["concentration"] * flow / 40000)
    checked = 0
    for t in range(DAYS):
        window = np.arange(max(t - 14, 0), t + 1)
        on = window[np.isfinite(log_load[window])]
        if not np.isfinite(log_load[t]) or on.size < 3:
            assert np.isnan(value[t])  # on sample days only, from 3 samples in 15 days
            continue
        # Ordinary least squares of the log load on the day (scipy.stats.linregress); the
        # trend is 100 (e^b - 1) % per day with a t-interval on b (docs/estimate.md).
        fit = stats.linregress(on, log_load[on])
        half = stats.t.ppf(0.975, on.size - 2) * fit.stderr
        assert_allclose(value[t], 100 * np.expm1(fit.slope), rtol=1e-9)
        assert_allclose([lower[t], upper[t]],
                        100 * np.expm1([fit.slope - half, fit.slope + half]), rtol=1e-9)
        checked += 1
    assert checked > 15


def test_registry_testing_rate_on_another_measure_with_a_window_param(tmp_path: Path) -> None:
    frame = daily_frame(12)
    path = write_csv(tmp_path / "t.csv", {"positives": frame["positives"],
                                          "tests": frame["tests"]})
    result = run("testing_rate", "-i", str(path), "--population", "25000",
                 "--measure", "positives", "--param", "window=3", "--param", "per=1000")
    assert result.exit_code == 0, result.output
    value = numbers(read_output(result.output)[1]["value"])
    pos = with_gap(frame["positives"])
    # tests (here positives) per 1 000 people over 3 days, by definition; a window holding the
    # missing day has no value
    want = np.array([pos[t - 2: t + 1].sum() / 25000 * 1000 if t >= 2 else np.nan
                     for t in range(DAYS)])
    assert_allclose(value, want, rtol=1e-12)


@pytest.mark.parametrize(("args", "message"), [
    (("--param", "window=400"), "--param window: 400 is above the maximum 366"),
    (("--param", "bogus=1"), "--param bogus: unknown parameter 'bogus' of kind 'testing_rate'"),
    (("--param", "window"), "--param: expected NAME=VALUE, got 'window'"),
    (("--measure", "ww_flow"), "--measure: 'ww_flow' is a level measure; this kind takes count"),
], ids=["bound", "unknown", "form", "measure-kind"])
def test_registry_options_are_checked_as_a_policy_is(
    tmp_path: Path, args: tuple[str, ...], message: str,
) -> None:
    path = write_csv(tmp_path / "t.csv", {"tests": daily_frame(13)["tests"]})
    result = run("testing_rate", "-i", str(path), "--population", "25000", *args)
    assert result.exit_code == 1
    assert message in result.output
