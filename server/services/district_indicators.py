"""Use case: turn stored measures into the indicator series a ruleset asks for, for every district.

The data come from the store as :class:`~server.services.district_data.DistrictData`
(:func:`~server.services.district_data.load_district_data`); the indicators are kinds of
:mod:`server.services.indicator_kinds` (a policy declares each as a kind applied to a measure),
computed with :mod:`server.indicators` and handed to the rules engine as
:class:`rules.IndicatorSeries`, each with the age of its underlying data so stale inputs are
unknown. :func:`district_indicators` computes those a ruleset uses. The helpers here are shared
by the builders: :func:`data_age`, :func:`carry_forward` (hold the newest value while its age
grows) and :func:`on_nowcast`.

Nowcasts: ``incidence_7d``, ``admissions_7d`` and ``tests_7d`` are computed on the nowcast of the
days still incomplete (:mod:`server.services.district_nowcasts`); those values carry ``nowcast``
so that a criterion with ``use_nowcast: false`` is unknown there (``docs/rules.md``).
Positivity and Rt stay on the reports received so far.

A stored value the indicators cannot take (:mod:`server.services.stored_values`) makes every
indicator value built from it ``invalid`` (the engine treats it as unknown and explains it so).
"""

from __future__ import annotations

from collections.abc import Callable, Collection

import numpy as np
from numpy.typing import NDArray

from rules import IndicatorSeries, Ruleset
from server.indicators.poisson import poisson_interval
from server.services.district_data import (
    AREA_MEASURES,
    DISTRICT_MEASURES,
    PLANT_MEASURES,
    DistrictData,
    MeasureNeeds,
    feed_limits,
    load_district_data,
)
from server.services.district_nowcasts import (
    NOWCAST_DELAYS,
    NOWCAST_MEASURES,
    NOWCAST_PERIOD,
    NOWCAST_WINDOW,
    NowcastInput,
    nowcast_measures,
    pool_basis,
)
from server.services.stored_values import usable

# Besides its own names, re-exported for the modules outside this split that still import them
# from here (server/services/feeds.py, capacity_indicators.py, capacity_pages.py);
# new code imports them from district_data / district_nowcasts / stored_values.
__all__ = [
    "AREA_MEASURES", "BUILDERS", "DISTRICT_MEASURES", "NOWCAST_DELAYS", "NOWCAST_MEASURES",
    "NOWCAST_PERIOD", "NOWCAST_WINDOW", "PLANT_MEASURES", "DistrictData", "MeasureNeeds",
    "NowcastInput", "carry_forward", "data_age", "district_indicators", "feed_limits",
    "load_district_data", "nowcast_measures", "on_nowcast", "pool_basis", "usable",
]


def data_age(*arrays: NDArray[np.float64]) -> NDArray[np.float64]:
    """Days since the newest day on which every one of ``arrays`` had a value (NaN before any)."""
    present = np.logical_and.reduce([np.isfinite(a) for a in arrays])
    days = np.arange(present.shape[1], dtype=np.float64)
    last = np.maximum.accumulate(np.where(present, days, -1.0), axis=1)
    return np.where(last >= 0, days - last, np.nan)


def carry_forward(series: IndicatorSeries) -> IndicatorSeries:
    """Hold each region's newest estimate on the following days that have none yet.

    The last days of a feed often lack a measure that arrives a day later (tests, admissions); a
    window then cannot be computed and the indicator would be missing exactly on the morning it is
    needed. The newest value is held instead, and ``age_days`` grows, so the ruleset's freshness
    limit (``max_age_days``) decides when it becomes stale and unknown.
    """
    est = series.estimate
    days = np.arange(est.shape[1], dtype=np.float64)
    last = np.maximum.accumulate(np.where(np.isfinite(est), days, -1.0), axis=1)
    index = np.maximum(last, 0).astype(np.int64)
    held = (last >= 0) & ~np.isfinite(est)

    def hold(values: NDArray[np.float64] | None) -> NDArray[np.float64] | None:
        if values is None:
            return None
        taken = np.take_along_axis(values, index, axis=1)
        return np.where(held, taken, values)

    base_age = series.age_days if series.age_days is not None else np.zeros_like(est)
    age = np.where(held, np.take_along_axis(base_age, index, axis=1) + (days - last), base_age)
    return IndicatorSeries(
        estimate=hold(est), lower=hold(series.lower), upper=hold(series.upper),  # type: ignore[arg-type]
        count=hold(series.count), age_days=np.where(last >= 0, age, np.nan),
        stale=series.stale, nowcast=series.nowcast, nowcast_days=series.nowcast_days,
        nowcast_basis=series.nowcast_basis, invalid=series.invalid,
    )


def on_nowcast(
    series: IndicatorSeries, d: DistrictData, measure: str, *, per: float = 100_000,
    bounds: bool = True, window: int = 7,
) -> IndicatorSeries:
    """``series`` (a rate per ``per`` of a ``window``-day count) computed on the nowcast where
    flagged (measures without a reporting triangle: ``series`` unchanged).

    There the estimate is the nowcast 7-day count and, with ``bounds``, the interval runs from
    the exact Poisson lower bound of the nowcast's lower predictive bound to the upper bound of
    its upper one (Garwood 1936): the count noise and the unknown late reports together.
    """
    nc = d.nowcast_of(measure, window)
    if nc is None:
        return series
    flag = nc.nowcast & np.isfinite(nc.estimate)
    if not flag.any():
        return series
    scale = per / d.population[:, None]
    estimate = np.where(flag, nc.estimate * scale, series.estimate)
    lower, upper = series.lower, series.upper
    if bounds:
        lo = poisson_interval(np.where(flag, np.round(nc.lower), 0.0)).lower
        hi = poisson_interval(np.where(flag, np.round(nc.upper), 0.0)).upper
        lower = np.where(flag, lo * scale, series.lower)
        upper = np.where(flag, hi * scale, series.upper)
    count = None if series.count is None else np.where(flag, nc.estimate, series.count)
    return IndicatorSeries(
        estimate=estimate, lower=lower, upper=upper, count=count, age_days=series.age_days,
        stale=series.stale, nowcast=flag, nowcast_days=np.where(flag, nc.days, 0.0),
        nowcast_basis=d.nowcasts[measure].basis, invalid=series.invalid,
    )


#: Indicators computed by name (a function of the data and the ruleset), beside the kinds of
#: :mod:`server.services.indicator_kinds`: a policy may declare a name from here without
#: ``kind``. Registering a kind there is the better way (its parameters and measures are
#: checked; ``kind_model.from_named_builder`` turns one of these into a kind); this table
#: keeps name-based builders working.
BUILDERS: dict[str, Callable[[DistrictData, Ruleset], IndicatorSeries]] = {}


def district_indicators(
    data: DistrictData, ruleset: Ruleset, names: Collection[str] | None = None
) -> dict[str, IndicatorSeries]:
    """The indicator series ``ruleset`` uses (of ``names`` only, when given), computed for
    every district at once (:func:`server.services.indicator_kinds.compute`)."""
    from server.services.indicator_kinds import compute  # it imports this module

    return compute(data, ruleset, names=names)
