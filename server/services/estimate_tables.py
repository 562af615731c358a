"""One function per kind of ``tierwise estimate``: a :class:`DailyTable` in, an
:class:`EstimateTable` out, one row per date of the input's range with empty cells where the
method gives no estimate. Each runs the method of :mod:`server.indicators`; its argument errors
become :class:`~server.services.errors.EstimateOptionError` (:func:`checked`).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping, Sequence
from typing import Literal, TypeVar

import numpy as np

from server.indicators import aberration, curves, growth, hospital, renewal, wastewater
from server.indicators.nowcast import cumulative_triangle
from server.indicators.nowcast import nowcast as chain_ladder_nowcast
from server.indicators.phase import LOWER_BOUND_WARNING
from server.indicators.poisson import incidence_rate
from server.indicators.seasonal import NOT_ENOUGH_SEASONS, seasonal_intensity
from server.indicators.serial_interval import (
    SerialInterval,
    gamma_serial_interval,
)
from server.indicators.wilson import positivity as wilson_positivity
from server.indicators.windows import weekly_sum
from server.services.errors import EstimateOptionError, InputFileError
from server.services.estimate_csv import DailyTable, EstimateTable, FloatArray, delay_columns

T = TypeVar("T")


def serial_interval_from_gamma(mean: float, sd: float) -> SerialInterval:
    """Discretised gamma serial interval (Cori et al. 2013, Web Appendix 11)."""
    return checked(lambda: gamma_serial_interval(mean, sd))


def checked(compute: Callable[[], T]) -> T:
    """Run an indicator; its argument errors (``window: ...``) become option errors."""
    try:
        return compute()
    except ValueError as exc:
        raise EstimateOptionError(str(exc).splitlines()[0]) from None


def as_table(
    kind: str, source: DailyTable, columns: Mapping[str, FloatArray], flags: Sequence[str] = (),
    warnings: tuple[str, ...] = (),
) -> EstimateTable:
    data = tuple(np.asarray(v, dtype=np.float64).reshape(-1) for v in columns.values())
    return EstimateTable(kind, source.dates, tuple(columns), data, frozenset(flags), warnings)


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
    res = checked(lambda: renewal.reproduction_number(
        source.values["cases"], serial, window, prior_mean=prior_mean, prior_sd=prior_sd,
        level=level, overdispersion=overdispersion,
    ))
    return as_table("rt", source, {
        "r_mean": res.estimate[0], "r_lower": res.lower[0], "r_upper": res.upper[0],
        "r_cv": res.cv[0],
    })


def incidence_table(
    source: DailyTable, *, population: float, window: int = 7, level: float = 0.95,
    max_missing: int = 0,
) -> EstimateTable:
    """Incidence per 100 000 over a trailing window with exact Poisson (Garwood) bounds."""
    res = checked(lambda: incidence_rate(
        source.values["cases"], [population], window, level=level, max_missing=max_missing
    ))
    return as_table("incidence", source, {
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
    res = checked(lambda: wilson_positivity(
        pos, tests, window, level=level, max_missing=max_missing
    ))
    return as_table("positivity", source, {
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
        res = checked(lambda: aberration.ears(cases, method=method.upper()))
        expected, upper, alarm = res.expected[0], res.upper[0], res.alarm[0]
    elif method == "farrington":
        weekly = checked(lambda: weekly_sum(cases, source.dates[0], system=week_system))
        fit = checked(lambda: aberration.farrington_flexible(
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
    return as_table("aberration", source, {"expected": expected, "upper": upper, "alarm": flag},
                  flags=("alarm",))


def growth_table(
    source: DailyTable, *, window: int = 14, day_of_week: bool = True, level: float = 0.95,
    max_missing: int = 0,
) -> EstimateTable:
    """Daily growth rate r (log-linear quasi-Poisson, trailing window) and doubling time."""
    res = checked(lambda: growth.rolling_growth_rate(
        source.values["cases"], window, day_of_week=day_of_week, level=level,
        max_missing=max_missing,
    ))
    return as_table("growth", source, {
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
    norm = checked(lambda: wastewater.normalise(
        values["concentration"], normalise, flow=values.get("flow"),
        population_served=None if population_served is None else [population_served],
        marker=values.get("marker"),
    ))
    smoothed = checked(lambda: wastewater.smooth(norm.log_value, neighbours=neighbours))
    trend = checked(lambda: wastewater.trend(norm.log_value, window=window, level=level))
    lvl = checked(lambda: wastewater.level(
        norm.log_value, current=smoothed.estimate, baseline_days=baseline_days,
        quantile=quantile, min_samples=min_samples,
    ))
    return as_table("wastewater", source, {
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
    los = checked(lambda: hospital.length_of_stay(median=los_median, quartiles=los_quartiles))
    adm = v["admissions"]
    mean7 = checked(lambda: hospital.admission_rate(adm, [1.0], window=7, per=1)).estimate[0] / 7
    rate = checked(lambda: growth.rolling_growth_rate(
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
        proj = checked(lambda: hospital.project_icu(
            mean7[origins], v["occupied"][origins], v["staffed"][origins],
            rate.estimate[0, origins], rate.lower[0, origins], rate.upper[0, origins],
            los=los, horizon=horizon,
        ))
        cross = checked(lambda: hospital.capacity_crossing(proj, threshold=threshold))
        for name, values in (
            ("admissions_level", mean7[origins]), ("occupied_projected", proj.estimate[:, -1]),
            ("occupied_lower", proj.lower[:, -1]), ("occupied_upper", proj.upper[:, -1]),
            ("share_projected", proj.share_estimate[:, -1]),
            ("share_lower", proj.share_lower[:, -1]), ("share_upper", proj.share_upper[:, -1]),
            ("days_to_threshold", cross.estimate), ("days_to_threshold_lower", cross.lower),
            ("days_to_threshold_upper", cross.upper),
        ):
            cols[name][origins] = values
    return as_table("icu-projection", source, cols)


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
    fit = checked(lambda: curves.fit_growth_curve(
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

    return as_table("curve-fit", source, {
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


def nowcast_table(
    source: DailyTable, *, increments: bool = False, delay_window: int | None = None,
    level: float = 0.95,
) -> EstimateTable:
    """Chain-ladder nowcast of each date's final count from the ``d0 .. dD`` triangle columns."""
    cols = delay_columns(list(source.values))
    tri = np.stack([source.values[c] for c in cols], axis=1)  # (ref_days, delays)
    if increments:
        tri = cumulative_triangle(tri)[0]
    res = checked(lambda: chain_ladder_nowcast(tri, level=level, window=delay_window))
    return as_table("nowcast", source, {
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
        weeks = checked(lambda: weekly_sum(cases, first, system="iso"))
        starts = np.array(weeks.start_dates, dtype="datetime64[D]")
        values = weeks.values
        ends = np.array([(s - first).days + 6 for s in weeks.start_dates])
        inside = (ends >= 0) & (ends < days)
        at, week_of_row = ends[inside], np.flatnonzero(inside)
    if population is not None:
        if not population > 0:
            raise EstimateOptionError(f"--population: expected a positive number, got {population}")
        values = values / population * 100_000
    res = checked(lambda: seasonal_intensity(
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
    return as_table("seasonal-intensity", source, out, flags=("not_enough_seasons",))
