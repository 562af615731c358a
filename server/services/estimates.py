"""Use case: compute one indicator for a daily CSV file and lay it out as a daily CSV table.

The input has a ``date`` column (ISO 8601 ``YYYY-MM-DD``; rows in any order, each date once) and
value columns. Dates between the first and the last that no row names are *missing* (NaN), never
zero; so are empty cells. Every KIND returns an :class:`EstimateTable` with one row per date of that
range, empty cells where the method gives no estimate. Broken input raises
:class:`~server.services.errors.InputFileError` naming the file, the line and the column.
"""

from __future__ import annotations

import csv
import datetime as dt
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Literal, TypeVar

import numpy as np
from numpy.typing import NDArray

from rules import FieldError, IndicatorSpec
from rules.model import ParamValue
from server.indicators import aberration, curves, growth, hospital, renewal, wastewater
from server.indicators.nowcast import cumulative_triangle
from server.indicators.nowcast import nowcast as chain_ladder_nowcast
from server.indicators.phase import LOWER_BOUND_WARNING
from server.indicators.poisson import incidence_rate
from server.indicators.seasonal import NOT_ENOUGH_SEASONS, seasonal_intensity
from server.indicators.serial_interval import (
    SerialInterval,
    discrete_serial_interval,
    gamma_serial_interval,
)
from server.indicators.wilson import positivity as wilson_positivity
from server.indicators.windows import weekly_sum
from server.services.district_data import DistrictData
from server.services.errors import EstimateOptionError, InputFileError
from server.services.indicator_kinds import KINDS as REGISTRY
from server.services.indicator_kinds import resolve
from server.services.stored_values import usable

FloatArray = NDArray[np.float64]
T = TypeVar("T")

__all__ = [
    "KINDS",
    "DailyTable",
    "EstimateOptionError",
    "EstimateOptions",
    "EstimateTable",
    "aberration_table",
    "curve_fit_table",
    "delay_columns",
    "estimates_csv",
    "growth_table",
    "icu_projection_table",
    "incidence_table",
    "nowcast_table",
    "positivity_table",
    "read_daily_csv",
    "read_serial_interval_csv",
    "read_triangle_csv",
    "registry_kinds",
    "registry_table",
    "run_estimate",
    "rt_table",
    "seasonal_table",
    "serial_interval_from_gamma",
    "wastewater_table",
    "write_estimates",
]

KINDS = (
    "rt", "incidence", "positivity", "aberration", "growth", "wastewater", "icu-projection",
    "curve-fit", "nowcast", "seasonal-intensity",
)
_MISSING_TOKENS = frozenset({"", "na", "nan", "null"})


@dataclass(frozen=True)
class DailyTable:
    """A parsed daily input file.

    ``dates`` runs over every day from the first to the last date in the file; ``values`` maps each
    column to a float array over those days (NaN for missing days and empty cells); ``lines`` holds
    the file line of each day (0 for days the file does not name).
    """

    path: str
    dates: tuple[dt.date, ...]
    values: Mapping[str, FloatArray]
    lines: NDArray[np.int64]


@dataclass(frozen=True)
class EstimateTable:
    """Estimates laid out by day: ``columns[i]`` holds ``data[i]`` (one value per date).

    Columns named in ``flags`` are booleans stored as 1.0/0.0 and written ``true``/``false``;
    NaN is an empty cell everywhere.
    """

    kind: str
    dates: tuple[dt.date, ...]
    columns: tuple[str, ...]
    data: tuple[FloatArray, ...]
    flags: frozenset[str] = field(default_factory=frozenset)
    #: Sentences the caller must show beside the table (the CLI prints them on stderr).
    warnings: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if len(self.columns) != len(self.data):
            raise ValueError(f"columns: {len(self.columns)} names for {len(self.data)} arrays")
        for name, values in zip(self.columns, self.data, strict=True):
            if values.shape != (len(self.dates),):
                raise ValueError(f"{name}: shape {values.shape} for {len(self.dates)} dates")

    def column(self, name: str) -> FloatArray:
        """The values of one column."""
        return self.data[self.columns.index(name)]


# ---------------------------------------------------------------- reading


def _open_rows(path: Path) -> tuple[list[str], list[tuple[int, list[str]]]]:
    try:
        handle = path.open(newline="", encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputFileError(str(path), "", "file not found") from None
    except OSError as exc:
        raise InputFileError(str(path), "", f"cannot be read ({exc.strerror})") from None
    with handle:
        reader = csv.reader(handle)
        try:
            header = [h.strip() for h in next(reader)]
        except StopIteration:
            raise InputFileError(str(path), "line 1", "the file is empty") from None
        except (csv.Error, UnicodeDecodeError) as exc:
            raise InputFileError(str(path), "line 1", f"not a CSV file ({exc})") from None
        rows = []
        try:
            for row in reader:
                if any(cell.strip() for cell in row):
                    rows.append((reader.line_num, row))
        except (csv.Error, UnicodeDecodeError) as exc:
            raise InputFileError(str(path), f"line {reader.line_num + 1}", str(exc)) from None
    return header, rows


def _number(path: str, line: int, column: str, text: str, *, count: bool) -> float:
    text = text.strip()
    if text.lower() in _MISSING_TOKENS:
        return math.nan
    try:
        value = float(text)
    except ValueError:
        raise InputFileError(path, f"line {line}", f"{column}: {text!r} is not a number") from None
    if not math.isfinite(value):
        raise InputFileError(path, f"line {line}", f"{column}: {text!r} is not a finite number")
    if count and value < 0:
        raise InputFileError(path, f"line {line}", f"{column}: {text} is negative (a count)")
    if count and value != round(value):
        raise InputFileError(path, f"line {line}", f"{column}: {text} is not a whole number")
    return value


def _date(path: str, line: int, text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        raise InputFileError(
            path, f"line {line}", f"date: {text.strip()!r} is not an ISO 8601 date (YYYY-MM-DD)"
        ) from None


def read_daily_csv(
    path: Path,
    *,
    required: Sequence[str],
    optional: Sequence[str] = (),
    counts: Sequence[str] = (),
    nonnegative: Sequence[str] = (),
) -> DailyTable:
    """Read a daily CSV: a ``date`` column and the value columns ``required`` (+ ``optional``).

    Columns in ``counts`` must hold non-negative whole numbers, those in ``nonnegative``
    non-negative numbers. Other columns of the file are ignored.
    """
    name = str(path)
    header, rows = _open_rows(Path(path))
    wanted = ["date", *required]
    missing = [c for c in wanted if c not in header]
    if missing:
        found = ", ".join(h for h in header if h) or "nothing"
        raise InputFileError(name, "line 1", f"missing column {missing[0]!r} (found: {found})")
    use = [*required, *(c for c in optional if c in header)]
    index = {c: header.index(c) for c in ["date", *use]}
    if not rows:
        raise InputFileError(name, "line 2", "no data rows after the header")
    seen: dict[dt.date, int] = {}
    parsed: list[tuple[dt.date, list[float]]] = []
    for line, row in rows:
        cells = row + [""] * (len(header) - len(row))
        day = _date(name, line, cells[index["date"]])
        if day in seen:
            raise InputFileError(
                name, f"lines {seen[day]} and {line}", f"date: {day.isoformat()} appears twice"
            )
        seen[day] = line
        values = [
            _number(name, line, c, cells[index[c]], count=c in counts) for c in use
        ]
        for c, v in zip(use, values, strict=True):
            if c in nonnegative and v < 0:
                raise InputFileError(name, f"line {line}", f"{c}: {v!r} is negative")
        parsed.append((day, values))
    first, last = min(seen), max(seen)
    days = (last - first).days + 1
    out = np.full((len(use), days), np.nan)
    lines = np.zeros(days, dtype=np.int64)
    for day, values in parsed:
        i = (day - first).days
        out[:, i] = values
        lines[i] = seen[day]
    dates = tuple(first + dt.timedelta(days=i) for i in range(days))
    columns = MappingProxyType({c: out[j] for j, c in enumerate(use)})
    return DailyTable(path=name, dates=dates, values=columns, lines=lines)


def read_serial_interval_csv(path: Path) -> SerialInterval:
    """Read a discrete serial interval, a CSV with columns ``k`` (days, 0, 1, ...) and ``p``.

    Lags the file leaves out have probability 0; ``p`` at ``k = 0`` must be 0 and the
    probabilities must sum to 1 (within 1e-6).
    """
    name = str(path)
    header, rows = _open_rows(Path(path))
    for column in ("k", "p"):
        if column not in header:
            raise InputFileError(name, "line 1", f"missing column {column!r}")
    if not rows:
        raise InputFileError(name, "line 2", "no data rows after the header")
    ik, ip = header.index("k"), header.index("p")
    probs: dict[int, tuple[float, int]] = {}
    for line, row in rows:
        cells = row + [""] * (len(header) - len(row))
        k = _number(name, line, "k", cells[ik], count=True)
        p = _number(name, line, "p", cells[ip], count=False)
        if math.isnan(k) or math.isnan(p):
            raise InputFileError(name, f"line {line}", "k and p must both be given")
        if p < 0:
            raise InputFileError(name, f"line {line}", f"p: {p!r} is negative")
        if int(k) in probs:
            raise InputFileError(
                name, f"lines {probs[int(k)][1]} and {line}", f"k: {int(k)} appears twice"
            )
        if k == 0 and p != 0:
            raise InputFileError(name, f"line {line}", f"p: must be 0 at k = 0, got {p!r}")
        probs[int(k)] = (p, line)
    pmf = np.zeros(max(max(probs) + 1, 2))
    for k, (p, _) in probs.items():
        pmf[k] = p
    if abs(pmf.sum() - 1.0) > 1e-6:
        raise InputFileError(name, "", f"p: probabilities sum to {pmf.sum():.6g}, not 1")
    return discrete_serial_interval(pmf)


def serial_interval_from_gamma(mean: float, sd: float) -> SerialInterval:
    """Discretised gamma serial interval (Cori et al. 2013, Web Appendix 11)."""
    return _checked(lambda: gamma_serial_interval(mean, sd))


def _checked(compute: Callable[[], T]) -> T:
    """Run an indicator; its argument errors (``window: ...``) become option errors."""
    try:
        return compute()
    except ValueError as exc:
        raise EstimateOptionError(str(exc).splitlines()[0]) from None


def _table(
    kind: str, source: DailyTable, columns: Mapping[str, FloatArray], flags: Sequence[str] = (),
    warnings: tuple[str, ...] = (),
) -> EstimateTable:
    data = tuple(np.asarray(v, dtype=np.float64).reshape(-1) for v in columns.values())
    return EstimateTable(kind, source.dates, tuple(columns), data, frozenset(flags), warnings)


# ---------------------------------------------------------------- one function per KIND


def rt_table(
    source: DailyTable,
    serial: SerialInterval,
    *,
    window: int = 7,
    prior_mean: float = 5.0,
    prior_sd: float = 5.0,
    level: float = 0.95,
    overdispersion: Literal["none", "quasi-poisson"] = "none",
) -> EstimateTable:
    """Rt by Cori et al. (2013) on ``cases``; each row is the last day of its window."""
    res = _checked(lambda: renewal.reproduction_number(
        source.values["cases"], serial, window, prior_mean=prior_mean, prior_sd=prior_sd,
        level=level, overdispersion=overdispersion,
    ))
    return _table("rt", source, {
        "r_mean": res.estimate[0], "r_lower": res.lower[0], "r_upper": res.upper[0],
        "r_cv": res.cv[0],
    })


def incidence_table(
    source: DailyTable, *, population: float, window: int = 7, level: float = 0.95,
    max_missing: int = 0,
) -> EstimateTable:
    """Incidence per 100 000 over a trailing window with exact Poisson (Garwood) bounds."""
    res = _checked(lambda: incidence_rate(
        source.values["cases"], [population], window, level=level, max_missing=max_missing
    ))
    return _table("incidence", source, {
        "rate": res.estimate[0], "rate_lower": res.lower[0], "rate_upper": res.upper[0],
    })


def positivity_table(
    source: DailyTable, *, window: int = 7, level: float = 0.95, max_missing: int = 0
) -> EstimateTable:
    """Share of positive tests over a trailing window with Wilson score bounds (fractions)."""
    pos, tests = source.values["positives"], source.values["tests"]
    over = np.flatnonzero(np.nan_to_num(pos) > np.nan_to_num(tests, nan=np.inf))
    if over.size:
        i = int(over[0])
        raise InputFileError(
            source.path, f"line {source.lines[i]}",
            f"positives: {pos[i]:g} exceeds tests {tests[i]:g}",
        )
    res = _checked(lambda: wilson_positivity(
        pos, tests, window, level=level, max_missing=max_missing
    ))
    return _table("positivity", source, {
        "positivity": res.estimate[0], "positivity_lower": res.lower[0],
        "positivity_upper": res.upper[0],
    })


def aberration_table(
    source: DailyTable,
    *,
    method: Literal["c1", "c2", "c3", "farrington"] = "c1",
    week_system: Literal["iso", "cdc"] = "iso",
    years_back: int = 5,
) -> EstimateTable:
    """EARS C1/C2/C3 on daily ``cases``, or improved Farrington on complete epi weeks.

    Farrington: days are summed into ISO (Monday-Sunday) or CDC (Sunday-Saturday) weeks; a week
    with a missing day, or cut by either end of the file, is a missing week. Each week's
    ``expected``/``upper``/``alarm`` is written on the week's last day; other rows stay empty.
    """
    cases = source.values["cases"]
    if method in ("c1", "c2", "c3"):
        res = _checked(lambda: aberration.ears(cases, method=method.upper()))
        expected, upper, alarm = res.expected[0], res.upper[0], res.alarm[0]
    elif method == "farrington":
        weekly = _checked(lambda: weekly_sum(cases, source.dates[0], system=week_system))
        fit = _checked(lambda: aberration.farrington_flexible(
            weekly.values, years_back=years_back, min_years=min(2, years_back)
        ))
        days = len(source.dates)
        expected, upper, alarm = np.full(days, np.nan), np.full(days, np.nan), np.zeros(days)
        ends = np.array([(s - source.dates[0]).days + 6 for s in weekly.start_dates])
        inside = (ends >= 0) & (ends < days)
        expected[ends[inside]] = fit.expected[0, inside]
        upper[ends[inside]] = fit.upper[0, inside]
        alarm[ends[inside]] = fit.alarm[0, inside]
    else:
        raise EstimateOptionError(f"--method: expected c1, c2, c3 or farrington, got {method!r}")
    flag = np.where(np.isnan(expected), np.nan, np.asarray(alarm, dtype=np.float64))
    return _table("aberration", source, {"expected": expected, "upper": upper, "alarm": flag},
                  flags=("alarm",))


def growth_table(
    source: DailyTable, *, window: int = 14, day_of_week: bool = True, level: float = 0.95,
    max_missing: int = 0,
) -> EstimateTable:
    """Daily growth rate r (log-linear quasi-Poisson, trailing window) and doubling time."""
    res = _checked(lambda: growth.rolling_growth_rate(
        source.values["cases"], window, day_of_week=day_of_week, level=level,
        max_missing=max_missing,
    ))
    return _table("growth", source, {
        "growth_rate": res.estimate[0], "growth_rate_lower": res.lower[0],
        "growth_rate_upper": res.upper[0], "doubling_time": res.doubling_time[0],
        "doubling_time_lower": res.doubling_lower[0], "doubling_time_upper": res.doubling_upper[0],
    })


def wastewater_table(
    source: DailyTable,
    *,
    normalise: Literal["none", "flow", "marker"] = "none",
    population_served: float | None = None,
    window: int = 15,
    neighbours: int = 5,
    baseline_days: int = 365,
    quantile: float = 0.10,
    min_samples: int = 10,
    level: float = 0.95,
) -> EstimateTable:
    """Normalised log concentration, its smooth, the log-linear trend and the baseline level."""
    values = source.values
    for needed in {"flow": ("flow",), "marker": ("marker",)}.get(normalise, ()):
        if needed not in values:
            raise InputFileError(source.path, "line 1", f"missing column {needed!r}")
    if normalise == "flow" and population_served is None:
        raise EstimateOptionError("--population-served: needed with --normalise flow")
    norm = _checked(lambda: wastewater.normalise(
        values["concentration"], normalise, flow=values.get("flow"),
        population_served=None if population_served is None else [population_served],
        marker=values.get("marker"),
    ))
    smoothed = _checked(lambda: wastewater.smooth(norm.log_value, neighbours=neighbours))
    trend = _checked(lambda: wastewater.trend(norm.log_value, window=window, level=level))
    lvl = _checked(lambda: wastewater.level(
        norm.log_value, current=smoothed.estimate, baseline_days=baseline_days,
        quantile=quantile, min_samples=min_samples,
    ))
    return _table("wastewater", source, {
        "log_value": norm.log_value[0], "smoothed": smoothed.estimate[0],
        "trend": trend.estimate[0], "trend_lower": trend.lower[0], "trend_upper": trend.upper[0],
        "level": lvl.estimate[0],
    })


def icu_projection_table(
    source: DailyTable,
    *,
    horizon: int = 14,
    growth_window: int = 14,
    day_of_week: bool = False,
    threshold: float = 0.8,
    los_median: float = 8.0,
    los_quartiles: tuple[float, float] = (5.0, 13.0),
) -> EstimateTable:
    """ICU occupancy projected ``horizon`` days after each row's date, from that date's data.

    For every origin day: admissions level = 7-day mean of ``admissions``, growth r of admissions
    over ``growth_window`` days, today's ``occupied`` and ``staffed``; the occupancy projection of
    :func:`server.indicators.hospital.project_icu` at ``horizon``, its share of staffed beds, and
    the days until the share reaches ``threshold``.
    """
    v = source.values
    los = _checked(lambda: hospital.length_of_stay(median=los_median, quartiles=los_quartiles))
    adm = v["admissions"]
    mean7 = _checked(lambda: hospital.admission_rate(adm, [1.0], window=7, per=1)).estimate[0] / 7
    rate = _checked(lambda: growth.rolling_growth_rate(
        adm, growth_window, day_of_week=day_of_week
    ))
    origins = np.flatnonzero(
        np.isfinite(mean7) & np.isfinite(rate.estimate[0]) & np.isfinite(v["occupied"])
        & np.isfinite(v["staffed"])
    )
    days = len(source.dates)
    cols = {name: np.full(days, np.nan) for name in (
        "admissions_level", "occupied_projected", "occupied_lower", "occupied_upper",
        "share_projected", "share_lower", "share_upper", "days_to_threshold",
        "days_to_threshold_lower", "days_to_threshold_upper",
    )}
    if origins.size:
        proj = _checked(lambda: hospital.project_icu(
            mean7[origins], v["occupied"][origins], v["staffed"][origins],
            rate.estimate[0, origins], rate.lower[0, origins], rate.upper[0, origins],
            los=los, horizon=horizon,
        ))
        cross = _checked(lambda: hospital.capacity_crossing(proj, threshold=threshold))
        for name, values in (
            ("admissions_level", mean7[origins]), ("occupied_projected", proj.estimate[:, -1]),
            ("occupied_lower", proj.lower[:, -1]), ("occupied_upper", proj.upper[:, -1]),
            ("share_projected", proj.share_estimate[:, -1]),
            ("share_lower", proj.share_lower[:, -1]), ("share_upper", proj.share_upper[:, -1]),
            ("days_to_threshold", cross.estimate), ("days_to_threshold_lower", cross.lower),
            ("days_to_threshold_upper", cross.upper),
        ):
            cols[name][origins] = values
    return _table("icu-projection", source, cols)


def curve_fit_table(
    source: DailyTable,
    *,
    model: Literal["logistic", "richards"] = "logistic",
    horizon: int = 7,
    n_boot: int = 200,
    seed: int = 0,
) -> EstimateTable:
    """Logistic or Richards curve fitted to all of ``cases``.

    Every row: the observed cumulative count and the fitted cumulative and daily counts. The last
    row only: the final size and the cumulative count projected ``horizon`` days after the last
    date, each with its bootstrap interval; the share of the fitted final size reached and the
    share at the turning point, ``(1 + v)^(-1/v)`` (Richards 1959). Before the fitted turning
    point (or when the fit is still exponential) the final size is a lower bound: its upper bound
    is left empty, ``final_size_is_lower_bound`` is true and the table carries
    :data:`~server.indicators.phase.LOWER_BOUND_WARNING`.
    """
    cases = source.values["cases"]
    fit = _checked(lambda: curves.fit_growth_curve(
        cases, model=model, horizons=(horizon,), n_boot=n_boot, seed=seed
    ))
    days = len(source.dates)
    t = np.arange(days, dtype=np.float64)
    k, a = fit.final_size.estimate[0], fit.rate.estimate[0]
    t0, v = fit.turning_day.estimate[0], fit.shape.estimate[0]
    fitted = curves.richards_cumulative(t, k, a, t0, v)
    daily = fitted - curves.richards_cumulative(t - 1.0, k, a, t0, v)
    last = np.full(days, np.nan)
    turned = bool(fit.converged[0]) and bool(t0 < days - 1)
    warnings = () if turned or not np.isfinite(k) else (
        f"final size at least {k:,.0f} (a lower bound): {LOWER_BOUND_WARNING}",)

    def at_end(value: float) -> FloatArray:
        out = last.copy()
        out[-1] = value
        return out

    return _table("curve-fit", source, {
        "cumulative": np.cumsum(np.nan_to_num(cases)),
        "fitted_cumulative": fitted, "fitted_daily": daily,
        "final_size": at_end(k), "final_size_lower": at_end(fit.final_size.lower[0]),
        "final_size_upper": at_end(fit.final_size.upper[0] if turned else np.nan),
        "final_size_is_lower_bound": at_end(0.0 if turned else 1.0),
        "share_reached": at_end(fit.share_reached.estimate[0]),
        "share_at_turning_point": at_end(curves.richards_inflection(1.0, v)),
        "projected_cumulative": at_end(fit.projection.estimate[0, 0]),
        "projected_lower": at_end(fit.projection.lower[0, 0]),
        "projected_upper": at_end(fit.projection.upper[0, 0]),
    }, flags=("final_size_is_lower_bound",), warnings=warnings)


def delay_columns(header: Sequence[str]) -> list[str]:
    """The reporting-triangle columns ``d0, d1, ...`` of a nowcast file, in delay order."""
    found = sorted(
        (int(h[1:]), h) for h in header if len(h) > 1 and h[0] == "d" and h[1:].isdigit()
    )
    return [h for _, h in found]


def read_triangle_csv(path: Path) -> DailyTable:
    """Read a nowcast input: ``date`` and ``d0 .. dD`` (counts known at each delay)."""
    header, _ = _open_rows(Path(path))
    cols = delay_columns(header)
    if [int(c[1:]) for c in cols] != list(range(len(cols))) or len(cols) < 2:
        raise InputFileError(
            str(path), "line 1", f"expected delay columns d0, d1, ... (at least 2), found {cols}"
        )
    return read_daily_csv(path, required=cols, counts=cols)


def nowcast_table(
    source: DailyTable, *, increments: bool = False, delay_window: int | None = None,
    level: float = 0.95,
) -> EstimateTable:
    """Chain-ladder nowcast of each date's final count from the ``d0 .. dD`` triangle columns."""
    cols = delay_columns(list(source.values))
    tri = np.stack([source.values[c] for c in cols], axis=1)  # (ref_days, delays)
    if increments:
        tri = cumulative_triangle(tri)[0]
    res = _checked(lambda: chain_ladder_nowcast(tri, level=level, window=delay_window))
    return _table("nowcast", source, {
        "nowcast": res.estimate[0], "nowcast_lower": res.lower[0], "nowcast_upper": res.upper[0],
        "known": res.known[0], "reported_share": res.reported[0],
    })


def seasonal_table(
    source: DailyTable, *, weekly: bool = False, population: float | None = None,
    start_week: int = 40, end_week: int = 20, seasons: int = 10, min_seasons: int = 3,
    interval: str = "mean",
) -> EstimateTable:
    """MEM seasonal intensity of ``cases`` (:mod:`server.indicators.seasonal`).

    Daily rows are summed into ISO weeks (a week with a missing day, or cut by an end of the
    file, is missing) and each week's result is written on its Sunday; with ``weekly`` each row
    is one ISO week's count (any day of the week names it) and results are written on that row.
    With ``population`` the weekly values are rates per 100 000. ``level`` is 0 below the
    epidemic threshold, 1 low, 2 medium, 3 high, 4 very high; empty with
    ``not_enough_seasons`` true when fewer than ``min_seasons`` past seasons exist.
    """
    cases = source.values["cases"]
    first = source.dates[0]
    days = len(source.dates)
    if weekly:
        present = np.flatnonzero(source.lines > 0)
        monday = np.array([(source.dates[i] - dt.timedelta(days=source.dates[i].weekday()))
                           for i in present], dtype="datetime64[D]")
        for a, b in zip(present[:-1], present[1:], strict=True):
            if source.dates[a].isocalendar()[:2] == source.dates[b].isocalendar()[:2]:
                raise InputFileError(source.path, f"lines {source.lines[a]} and "
                                     f"{source.lines[b]}", "date: both rows name ISO week "
                                     f"{source.dates[b].isocalendar()[0]}-W"
                                     f"{source.dates[b].isocalendar()[1]:02d}")
        starts = np.arange(monday[0], monday[-1] + np.timedelta64(7, "D"), 7)
        values = np.full((1, starts.size), np.nan)
        values[0, ((monday - starts[0]).astype(np.int64) // 7)] = cases[present]
        at = present
        week_of_row = (monday - starts[0]).astype(np.int64) // 7
    else:
        weeks = _checked(lambda: weekly_sum(cases, first, system="iso"))
        starts = np.array(weeks.start_dates, dtype="datetime64[D]")
        values = weeks.values
        ends = np.array([(s - first).days + 6 for s in weeks.start_dates])
        inside = (ends >= 0) & (ends < days)
        at, week_of_row = ends[inside], np.flatnonzero(inside)
    if population is not None:
        if not population > 0:
            raise EstimateOptionError(f"--population: expected a positive number, got {population}")
        values = values / population * 100_000
    res = _checked(lambda: seasonal_intensity(
        values, starts, start_week=start_week, end_week=end_week, max_seasons=seasons,
        min_seasons=min_seasons, interval=interval,  # type: ignore[arg-type]
    ))
    out = {name: np.full(days, np.nan) for name in (
        "weekly_value", "epidemic_threshold", "medium_threshold", "high_threshold",
        "very_high_threshold", "level", "seasons", "not_enough_seasons")}
    for name, col in (("weekly_value", values), ("epidemic_threshold", res.epidemic),
                      ("medium_threshold", res.medium), ("high_threshold", res.high),
                      ("very_high_threshold", res.very_high), ("level", res.level)):
        out[name][at] = col[0, week_of_row]
    out["seasons"][at] = res.seasons[0, week_of_row]
    out["not_enough_seasons"][at] = res.state[0, week_of_row] == NOT_ENOUGH_SEASONS
    return _table("seasonal-intensity", source, out, flags=("not_enough_seasons",))


# ---------------------------------------------------------------- dispatch


@dataclass(frozen=True, kw_only=True)
class EstimateOptions:
    """Options of :func:`run_estimate`; ``None`` means the KIND's default."""

    window: int | None = None
    level: float = 0.95
    max_missing: int = 0
    si_mean: float | None = None
    si_sd: float | None = None
    si_file: Path | None = None
    prior_mean: float = 5.0
    prior_sd: float = 5.0
    population: float | None = None
    method: str = "c1"
    week_system: str = "iso"
    years_back: int = 5
    day_of_week: bool | None = None
    normalise: str = "none"
    population_served: float | None = None
    neighbours: int = 5
    baseline_days: int = 365
    quantile: float = 0.10
    min_samples: int = 10
    horizon: int | None = None
    growth_window: int = 14
    threshold: float = 0.8
    los_median: float = 8.0
    los_quartiles: tuple[float, float] = (5.0, 13.0)
    model: str = "logistic"
    n_boot: int = 200
    seed: int = 0
    increments: bool = False
    delay_window: int | None = None
    overdispersion: str = "none"
    weekly: bool = False
    start_week: int = 40
    end_week: int = 20
    seasons: int = 10
    min_seasons: int = 3
    interval: str = "mean"
    measure: str | None = None
    params: tuple[str, ...] = ()


_COUNTS = ("cases", "positives", "tests", "admissions", "occupied", "staffed")


def _serial_interval(o: EstimateOptions) -> SerialInterval:
    if o.si_file is not None:
        if o.si_mean is not None or o.si_sd is not None:
            raise EstimateOptionError("--si-file: give either --si-file or --si-mean/--si-sd")
        return read_serial_interval_csv(o.si_file)
    if o.si_mean is None or o.si_sd is None:
        raise EstimateOptionError("--si-mean/--si-sd: rt needs both, or --si-file")
    return serial_interval_from_gamma(o.si_mean, o.si_sd)


def run_estimate(kind: str, path: Path, options: EstimateOptions) -> EstimateTable:
    """Read ``path`` with the columns ``kind`` needs and compute its :class:`EstimateTable`."""
    o = options

    def read(*required: str, optional: Sequence[str] = ()) -> DailyTable:
        return read_daily_csv(
            path, required=required, optional=optional,
            counts=[c for c in (*required, *optional) if c in _COUNTS],
            nonnegative=[c for c in (*required, *optional) if c not in _COUNTS],
        )

    if kind == "rt":
        serial = _serial_interval(o)
        if o.overdispersion not in ("none", "quasi-poisson"):
            raise EstimateOptionError(
                f"--overdispersion: expected none or quasi-poisson, got {o.overdispersion!r}"
            )
        return rt_table(read("cases"), serial, window=o.window or 7, prior_mean=o.prior_mean,
                        prior_sd=o.prior_sd, level=o.level,
                        overdispersion=o.overdispersion)  # type: ignore[arg-type]
    if kind == "incidence":
        if o.population is None:
            raise EstimateOptionError("--population: incidence needs the population")
        return incidence_table(read("cases"), population=o.population, window=o.window or 7,
                               level=o.level, max_missing=o.max_missing)
    if kind == "positivity":
        return positivity_table(read("positives", "tests"), window=o.window or 7,
                                level=o.level, max_missing=o.max_missing)
    if kind == "aberration":
        if o.method not in ("c1", "c2", "c3", "farrington"):
            raise EstimateOptionError(
                f"--method: expected c1, c2, c3 or farrington, got {o.method!r}"
            )
        if o.week_system not in ("iso", "cdc"):
            raise EstimateOptionError(f"--week-system: expected iso or cdc, got {o.week_system!r}")
        return aberration_table(read("cases"), method=o.method,  # type: ignore[arg-type]
                                week_system=o.week_system,  # type: ignore[arg-type]
                                years_back=o.years_back)
    if kind == "growth":
        return growth_table(read("cases"), window=o.window or 14,
                            day_of_week=True if o.day_of_week is None else o.day_of_week,
                            level=o.level, max_missing=o.max_missing)
    if kind == "wastewater":
        if o.normalise not in ("none", "flow", "marker"):
            raise EstimateOptionError(
                f"--normalise: expected none, flow or marker, got {o.normalise!r}"
            )
        return wastewater_table(
            read("concentration", optional=("flow", "marker")),
            normalise=o.normalise,  # type: ignore[arg-type]
            population_served=o.population_served, window=o.window or 15,
            neighbours=o.neighbours, baseline_days=o.baseline_days, quantile=o.quantile,
            min_samples=o.min_samples, level=o.level,
        )
    if kind == "icu-projection":
        return icu_projection_table(
            read("admissions", "occupied", "staffed"), horizon=o.horizon or 14,
            growth_window=o.growth_window,
            day_of_week=False if o.day_of_week is None else o.day_of_week,
            threshold=o.threshold, los_median=o.los_median, los_quartiles=o.los_quartiles,
        )
    if kind == "curve-fit":
        if o.model not in ("logistic", "richards"):
            raise EstimateOptionError(f"--model: expected logistic or richards, got {o.model!r}")
        return curve_fit_table(read("cases"), model=o.model,  # type: ignore[arg-type]
                               horizon=o.horizon or 7, n_boot=o.n_boot, seed=o.seed)
    if kind == "nowcast":
        return nowcast_table(read_triangle_csv(path), increments=o.increments,
                             delay_window=o.delay_window, level=o.level)
    if kind == "seasonal-intensity":
        if o.interval not in ("mean", "point"):
            raise EstimateOptionError(f"--interval: expected mean or point, got {o.interval!r}")
        return seasonal_table(read("cases"), weekly=o.weekly, population=o.population,
                              start_week=o.start_week, end_week=o.end_week, seasons=o.seasons,
                              min_seasons=o.min_seasons, interval=o.interval)
    if kind in registry_kinds():
        people = o.population_served if o.population_served is not None else o.population
        return registry_table(kind, path, measure=o.measure, params=o.params,
                              population=people, window=o.window)
    raise EstimateOptionError(
        f"KIND: expected one of {', '.join((*KINDS, *registry_kinds()))}, got {kind!r}")


# ---------------------------------------------------------------- writing


def _cell(value: float, flag: bool) -> str:
    if math.isnan(value):
        return ""
    if flag:
        return "true" if value else "false"
    return repr(float(value))


def estimates_csv(table: EstimateTable) -> str:
    """The table as CSV text: ``date`` then the columns; floats as ``repr`` (exact round trip)."""
    lines = [",".join(("date", *table.columns))]
    flags = [c in table.flags for c in table.columns]
    for i, day in enumerate(table.dates):
        cells = (_cell(float(col[i]), f) for col, f in zip(table.data, flags, strict=True))
        lines.append(",".join((day.isoformat(), *cells)))
    return "\n".join(lines) + "\n"


def write_estimates(table: EstimateTable, path: Path) -> None:
    """Write :func:`estimates_csv` to ``path``."""
    try:
        Path(path).write_text(estimates_csv(table), encoding="utf-8")
    except OSError as exc:
        raise InputFileError(str(path), "", f"cannot be written ({exc.strerror})") from None


# ---------------------------------------------------------------- any registered indicator kind


def registry_kinds() -> tuple[str, ...]:
    """Indicator kinds of the policy registry that :data:`KINDS` does not name already
    (``testing_rate``, ``growth_rate``, ``occupancy_share``, ``wastewater_trend``, ...); each
    runs through :func:`registry_table`."""
    return tuple(k for k, v in REGISTRY.items() if k not in KINDS and v.in_estimate)


def _param_value(text: str) -> ParamValue:
    """A ``--param`` value as a policy's YAML would read it: true/false, integer, number, text."""
    low = text.strip().lower()
    if low in ("true", "false"):
        return low == "true"
    for kind in (int, float):
        try:
            return kind(text)  # type: ignore[no-any-return]
        except ValueError:
            pass
    return text.strip()


def registry_table(
    kind: str, path: Path, *, measure: str | None = None, params: Sequence[str] = (),
    population: float | None = None, window: int | None = None,
) -> EstimateTable:
    """One registered indicator kind on a daily CSV, computed by the same builder a policy's
    indicator uses (:mod:`server.services.indicator_kinds`).

    The file has one column per measure the kind reads, named as the measure (``--measure``,
    default the kind's; measure parameters such as ``denominator`` name further columns);
    ``params`` are ``NAME=VALUE`` texts checked as a policy's ``params``. ``population`` is the
    district's (for rates), or the people a plant serves (wastewater kinds). Output columns:
    ``value``, ``lower``, ``upper`` and ``count``, as the kind gives them.
    """
    k = REGISTRY[kind]
    given: dict[str, ParamValue] = {}
    for item in params:
        name, sep, value = item.partition("=")
        if not sep or not name.strip():
            raise EstimateOptionError(f"--param: expected NAME=VALUE, got {item!r}")
        given[name.strip()] = _param_value(value)
    if window is not None:
        given["window"] = window
    try:
        ind = resolve(IndicatorSpec(name="estimate", label=kind, kind=kind,
                                    measure=measure or k.default_measure, params=given))
    except FieldError as exc:
        where = exc.field[-1] if exc.field[:1] == ("params",) else "measure"
        raise EstimateOptionError(f"--{'param ' if where != 'measure' else ''}{where}: "
                                  f"{exc.message}") from None
    assert ind is not None
    columns = ind.measures()
    counts = [c for c in columns if k.level != "plant"]
    table = read_daily_csv(path, required=columns, counts=counts,
                           nonnegative=[c for c in columns if c not in counts])
    if population is None:
        raise EstimateOptionError(f"--population: {kind} needs the population"
                                  f"{' served by the plant' if k.level == 'plant' else ''}")
    if not (math.isfinite(population) and population > 0):
        raise EstimateOptionError(f"--population: expected a positive number, got {population}")
    values = {c: usable(table.values[c][None, :], count=c in counts)[0] for c in columns}
    days = np.array(table.dates, dtype="datetime64[D]")
    one = np.array([population], dtype=np.float64)
    data = DistrictData(
        regions=("file",), levels=("district",), population=one, dates=days,
        district=values if k.level == "district" else {},
        area_of_district=values if k.level == "area" else {},
        plant=values if k.level == "plant" else {}, plant_population=one,
        served=one[:, None] if k.level == "plant" else np.zeros((1, 0)), as_of=None,
    )
    series = _checked(lambda: k.builder(data, ind))
    out = {"value": series.estimate[0]}
    for name, arr in (("lower", series.lower), ("upper", series.upper), ("count", series.count)):
        if arr is not None:
            out[name] = arr[0]
    return _table(kind, table, out)
