"""Use case: the ``seasonal_intensity`` indicator (moving epidemic method) for every district.

A policy names the measure in the indicator's ``params`` (any daily count measure the districts
report, ``gp_ari`` by default) with, optionally, the season (``start_week``, ``end_week``: ISO
weeks, 40 and 20 by default), ``seasons`` (past seasons pooled, 10), ``min_seasons`` (3),
``interval`` (``mean`` as Vega et al. publish it, or ``point`` as the mem package computes by
default), ``per`` (rate per that many people, 100 000) and the confidence levels
``threshold_level`` (0.95), ``medium_level`` (0.40), ``high_level`` (0.90) and
``very_high_level`` (0.975). Daily counts are summed into ISO weeks (a week with a missing day is
missing), turned into weekly rates per ``per`` of the district population and placed on the MEM
scale by :func:`server.indicators.seasonal.seasonal_intensity`.

The indicator's value on a day is the level of the newest complete ISO week (ended on or before
that day): 0 below the epidemic threshold, 1 low, 2 medium, 3 high, 4 very high. A week without a
value has none (missing, unknown); every week before ``min_seasons`` past seasons exist has none
either and carries ``no_baseline`` (unknown, explained as "no baseline yet (not enough past
seasons)"). ``age_days`` counts the days since that week's
Sunday.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from rules import IndicatorSeries, Ruleset
from server.indicators.seasonal import (
    DELTA,
    INTENSITY_LEVELS,
    MAX_SEASONS,
    NOT_ENOUGH_SEASONS,
    THRESHOLD_LEVEL,
    SeasonalIntensity,
    seasonal_intensity,
)
from server.indicators.windows import weekly_sum
from server.services.errors import ServiceError

if TYPE_CHECKING:
    from server.services.district_data import DistrictData

__all__ = ["NAME", "SeasonalParams", "SeasonalParamError", "seasonal_params",
           "seasonal_series", "weekly_intensity"]

#: The indicator's name in a ruleset.
NAME = "seasonal_intensity"


class SeasonalParamError(ServiceError, ValueError):
    """A ``seasonal_intensity`` parameter the districts' data cannot honour."""

    def __init__(self, key: str, problem: str) -> None:
        super().__init__(f"indicators.{NAME}.params.{key}: {problem}")


@dataclass(frozen=True, kw_only=True)
class SeasonalParams:
    measure: str = "gp_ari"
    start_week: int = 40
    end_week: int = 20
    seasons: int = MAX_SEASONS
    min_seasons: int = 3
    interval: str = "mean"
    per: float = 100_000.0
    threshold_level: float = THRESHOLD_LEVEL
    levels: tuple[float, float, float] = INTENSITY_LEVELS


def _level(params: Mapping[str, object], key: str, default: float) -> float:
    value = params.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 < value < 1:
        raise SeasonalParamError(key, f"expected a confidence level between 0 and 1, got {value!r}")
    return float(value)


def _week(params: Mapping[str, object], key: str, default: int) -> int:
    value = params.get(key, default)
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 52:
        raise SeasonalParamError(key, f"expected an ISO week 1..52, got {value!r}")
    return value


def seasonal_params(params: Mapping[str, object], measures: Mapping[str, object]
                    ) -> SeasonalParams:
    """Checked parameters; ``measures`` are the district measures available."""
    measure = params.get("measure", "gp_ari")
    if not isinstance(measure, str) or measure not in measures:
        raise SeasonalParamError(
            "measure", f"{measure!r} is not a district count measure; known: "
            f"{', '.join(sorted(measures))}")
    seasons, min_seasons = params.get("seasons", MAX_SEASONS), params.get("min_seasons", 3)
    for key, value in (("seasons", seasons), ("min_seasons", min_seasons)):
        if isinstance(value, bool) or not isinstance(value, int) or value < 1:
            raise SeasonalParamError(key, f"expected a positive integer, got {value!r}")
    if min_seasons < 3:  # type: ignore[operator]
        raise SeasonalParamError("min_seasons", f"the baseline needs 3 seasons at least, got "
                                 f"{min_seasons}")
    if seasons < min_seasons:  # type: ignore[operator]
        raise SeasonalParamError("seasons", f"{seasons} is fewer than min_seasons {min_seasons}")
    interval = params.get("interval", "mean")
    if interval not in ("mean", "point"):
        raise SeasonalParamError("interval", f"expected 'mean' or 'point', got {interval!r}")
    per = params.get("per", 100_000.0)
    if isinstance(per, bool) or not isinstance(per, int | float) or not per > 0:
        raise SeasonalParamError("per", f"expected a positive number, got {per!r}")
    levels = (_level(params, "medium_level", INTENSITY_LEVELS[0]),
              _level(params, "high_level", INTENSITY_LEVELS[1]),
              _level(params, "very_high_level", INTENSITY_LEVELS[2]))
    if not levels[0] < levels[1] < levels[2]:
        raise SeasonalParamError("medium_level", f"levels must increase, got {levels}")
    return SeasonalParams(
        measure=measure, start_week=_week(params, "start_week", 40),
        end_week=_week(params, "end_week", 20), seasons=int(seasons),  # type: ignore[call-overload]
        min_seasons=int(min_seasons), interval=str(interval),  # type: ignore[call-overload]
        per=float(per), threshold_level=_level(params, "threshold_level", THRESHOLD_LEVEL),
        levels=levels,
    )


@dataclass(frozen=True, kw_only=True)
class WeeklyIntensity:
    """The weekly result with its weeks (Mondays) and weekly rates."""

    week_starts: NDArray[np.datetime64]
    rates: NDArray[np.float64]
    result: SeasonalIntensity


def weekly_intensity(daily: NDArray[np.float64], first_day: np.datetime64,
                     population: NDArray[np.float64] | None, p: SeasonalParams
                     ) -> WeeklyIntensity:
    """Daily counts (regions, days) from ``first_day`` -> weekly rates and their MEM levels."""
    start = np.asarray(first_day, dtype="datetime64[D]").item()
    weekly = weekly_sum(daily, start, system="iso", max_missing=0)
    rates = weekly.values
    if population is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            rates = rates / population[:, None] * p.per
    starts = np.array(weekly.start_dates, dtype="datetime64[D]")
    result = seasonal_intensity(
        rates, starts, start_week=p.start_week, end_week=p.end_week, max_seasons=p.seasons,
        min_seasons=p.min_seasons, delta=DELTA, threshold_level=p.threshold_level,
        intensity_levels=p.levels, interval=p.interval,  # type: ignore[arg-type]
    )
    return WeeklyIntensity(week_starts=starts, rates=rates, result=result)


def _on_days(weekly: NDArray[np.float64], week_starts: NDArray[np.datetime64],
             dates: NDArray[np.datetime64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Each day's value of its newest complete week (ended on or before it) and its age."""
    days = np.asarray(dates, dtype="datetime64[D]")
    sundays = week_starts + np.timedelta64(6, "D")
    idx = np.searchsorted(sundays, days, side="right") - 1
    known = idx >= 0
    values = np.where(known[None, :], weekly[:, np.maximum(idx, 0)], np.nan)
    age = np.where(known, (days - sundays[np.maximum(idx, 0)]).astype(np.float64), np.nan)
    return values, np.broadcast_to(age, values.shape).copy()


def seasonal_series(d: DistrictData, ruleset: Ruleset) -> IndicatorSeries:
    """The ``seasonal_intensity`` series of every district (see the module docstring)."""
    params = ruleset.indicator(NAME).params if NAME in ruleset.used_indicators() else {}
    p = seasonal_params(params, d.district)
    daily = d.district[p.measure]
    if daily.shape[1] == 0:
        return IndicatorSeries(estimate=daily.copy())
    w = weekly_intensity(daily, d.dates[0], d.population, p)
    level, age = _on_days(w.result.level, w.week_starts, d.dates)
    short, _ = _on_days((w.result.state == NOT_ENOUGH_SEASONS).astype(np.float64),
                        w.week_starts, d.dates)
    stale = d.stale_of(p.measure)
    invalid = d.invalid_of(p.measure, reach=7)
    return IndicatorSeries(estimate=level, age_days=age, stale=stale, invalid=invalid,
                           no_baseline=short > 0.5)
