"""Use case: ``tierwise estimate``, one indicator for a daily CSV file, laid out as a daily table.

:func:`run_estimate` reads the columns a KIND needs (:mod:`server.services.estimate_csv`) and
computes its table (:mod:`server.services.estimate_tables`); :func:`registry_table` runs any
other indicator kind of the policy registry on a file with the builder a policy's indicator
uses. Every KIND returns an :class:`~server.services.estimate_csv.EstimateTable` with one row per
date of the input's range, empty cells where the method gives no estimate.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from rules import FieldError, IndicatorSpec
from rules.model import ParamValue
from server.indicators.serial_interval import SerialInterval
from server.services.district_data import DistrictData
from server.services.errors import EstimateOptionError
from server.services.estimate_csv import (
    DailyTable,
    EstimateTable,
    read_daily_csv,
    read_serial_interval_csv,
    read_triangle_csv,
)
from server.services.estimate_tables import (
    aberration_table,
    as_table,
    checked,
    curve_fit_table,
    growth_table,
    icu_projection_table,
    incidence_table,
    nowcast_table,
    positivity_table,
    rt_table,
    seasonal_table,
    serial_interval_from_gamma,
    wastewater_table,
)
from server.services.indicator_kinds import KINDS as REGISTRY
from server.services.indicator_kinds import resolve
from server.services.stored_values import usable

KINDS = (
    "rt", "incidence", "positivity", "aberration", "growth", "wastewater", "icu-projection",
    "curve-fit", "nowcast", "seasonal-intensity",
)


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
    series = checked(lambda: k.builder(data, ind))
    out = {"value": series.estimate[0]}
    for name, arr in (("lower", series.lower), ("upper", series.upper), ("count", series.count)):
        if arr is not None:
            out[name] = arr[0]
    return as_table(kind, table, out)
