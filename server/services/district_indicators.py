"""Use case: turn stored measures into the indicator series a ruleset asks for, for every district.

Reads dense (regions x days) arrays from the store (current or as of a cutoff), computes the
indicators with :mod:`server.indicators`, and hands them to the rules engine as
:class:`rules.IndicatorSeries`, each with the age of its underlying data so stale inputs are
unknown.

Indicator names known here (a ruleset may use any subset): ``incidence_7d``, ``positivity_7d``,
``tests_7d``, ``admissions_7d``, ``icu_share``, ``rt``, ``ww_trend``, ``gp_aberration``. Percentages
(positivity, ICU share) are expressed in percent, as policies write them.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import date, datetime

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from rules import IndicatorSeries, Ruleset
from server.indicators.aberration import ears
from server.indicators.hospital import admission_rate, occupancy_share
from server.indicators.poisson import incidence_rate
from server.indicators.renewal import reproduction_number
from server.indicators.serial_interval import gamma_serial_interval
from server.indicators.wastewater import normalise, to_districts, trend
from server.indicators.wilson import positivity
from server.indicators.wilson import testing_rate as tests_per_population
from server.services.errors import ServiceError
from server.store import read_dense
from server.store.models import Catchment, Region

DISTRICT_MEASURES = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")
AREA_MEASURES = ("icu_occupied", "icu_staffed")
PLANT_MEASURES = ("ww_concentration", "ww_flow")
# Districts below this population are matched by overrides as level "small_district".
SMALL_DISTRICT_POPULATION = 30_000


@dataclass(frozen=True, kw_only=True)
class DistrictData:
    """Everything the indicators need, read from the store for one date range and cutoff."""

    regions: tuple[str, ...]
    levels: tuple[str, ...]
    population: NDArray[np.float64]
    dates: NDArray[np.datetime64]
    district: Mapping[str, NDArray[np.float64]]
    area_of_district: Mapping[str, NDArray[np.float64]]
    plant: Mapping[str, NDArray[np.float64]]
    plant_population: NDArray[np.float64]
    served: NDArray[np.float64]  # (districts, plants): people of each district served by a plant
    as_of: datetime | None


def load_district_data(
    *, session: Session, start: date, end: date, as_of: datetime | None = None
) -> DistrictData:
    """Dense district, area and plant arrays over ``start..end`` as known at ``as_of``."""
    parent = aliased(Region)
    rows = session.execute(
        select(Region.code, Region.population, parent.code)
        .outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.level == "district")
        .order_by(Region.code)
    ).all()
    codes = tuple(r[0] for r in rows)
    population = np.array([r[1] for r in rows], dtype=np.float64)
    parents = [r[2] for r in rows]
    district = read_dense(
        session=session, measures=DISTRICT_MEASURES, start=start, end=end, regions=codes,
        as_of=as_of,
    )
    areas = sorted({p for p in parents if p is not None})
    area = read_dense(
        session=session, measures=AREA_MEASURES, start=start, end=end, regions=areas, as_of=as_of
    )
    pick = np.array([areas.index(p) if p in areas else -1 for p in parents])
    area_of_district = {
        m: np.where(pick[:, None] >= 0, area[m][np.maximum(pick, 0)], np.nan)
        for m in AREA_MEASURES
    }
    plant_rows = session.execute(
        select(Region.code, Region.population).where(Region.level == "plant").order_by(Region.code)
    ).all()
    plant_codes = [r[0] for r in plant_rows]
    plant = read_dense(
        session=session, measures=PLANT_MEASURES, start=start, end=end, regions=plant_codes,
        as_of=as_of,
    )
    served = np.zeros((len(codes), len(plant_codes)))
    plant_alias, district_alias = aliased(Region), aliased(Region)
    links = session.execute(
        select(plant_alias.code, district_alias.code, Catchment.share)
        .join(plant_alias, plant_alias.id == Catchment.plant_id)
        .join(district_alias, district_alias.id == Catchment.district_id)
    ).all()
    for plant_code, district_code, share in links:
        i, j = codes.index(district_code), plant_codes.index(plant_code)
        served[i, j] = share * population[i]
    levels = tuple(
        "small_district" if p < SMALL_DISTRICT_POPULATION else "district" for p in population
    )
    return DistrictData(
        regions=codes, levels=levels, population=population, dates=district.dates,
        district=district.values, area_of_district=area_of_district, plant=plant.values,
        plant_population=np.array([r[1] for r in plant_rows], dtype=np.float64),
        served=served, as_of=as_of,
    )


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
        stale=series.stale, nowcast=series.nowcast,
    )


def _incidence(d: DistrictData) -> IndicatorSeries:
    cases = d.district["cases"]
    est = incidence_rate(cases, d.population, 7)
    return IndicatorSeries(
        estimate=est.estimate, lower=est.lower, upper=est.upper, count=est.count,
        age_days=data_age(cases),
    )


def _positivity(d: DistrictData) -> IndicatorSeries:
    pos, tests = d.district["positives"], d.district["tests"]
    est = positivity(pos, tests, 7)
    return IndicatorSeries(
        estimate=100 * est.estimate, lower=100 * est.lower, upper=100 * est.upper,
        count=est.positives, age_days=data_age(pos, tests),
    )


def _tests(d: DistrictData) -> IndicatorSeries:
    tests = d.district["tests"]
    est = tests_per_population(tests, d.population, 7)
    return IndicatorSeries(estimate=est.estimate, age_days=data_age(tests))


def _admissions(d: DistrictData) -> IndicatorSeries:
    adm = d.district["hosp_admissions"]
    est = admission_rate(adm, d.population, window=7)
    return IndicatorSeries(
        estimate=est.estimate, lower=est.lower, upper=est.upper, count=est.count,
        age_days=data_age(adm),
    )


def _icu(d: DistrictData) -> IndicatorSeries:
    occ, staffed = d.area_of_district["icu_occupied"], d.area_of_district["icu_staffed"]
    share = occupancy_share(occ, staffed)
    return IndicatorSeries(estimate=100 * share.estimate, age_days=data_age(occ, staffed))


def _rt(d: DistrictData, ruleset: Ruleset) -> IndicatorSeries:
    params = ruleset.indicator("rt").params if "rt" in ruleset.used_indicators() else {}
    si = gamma_serial_interval(
        float(params.get("serial_interval_mean", 4.7)), float(params.get("serial_interval_sd", 2.9))
    )
    cases = d.district["cases"]
    est = reproduction_number(cases, si, int(params.get("window", 7)))
    return IndicatorSeries(
        estimate=est.estimate, lower=est.lower, upper=est.upper, age_days=data_age(cases)
    )


def _ww_trend(d: DistrictData) -> IndicatorSeries:
    conc, flow = d.plant["ww_concentration"], d.plant["ww_flow"]
    norm = normalise(
        conc, ["flow"] * conc.shape[0], flow=flow, population_served=d.plant_population
    )
    per_plant = trend(norm.log_value, window=15)
    sampled = np.isfinite(norm.log_value)
    # A district's trend is the population-weighted mean of its plants' trends on sample days.
    on_samples = np.where(sampled, per_plant.estimate, np.nan)
    estimate = to_districts(on_samples, d.served)
    lower = to_districts(np.where(sampled, per_plant.lower, np.nan), d.served)
    upper = to_districts(np.where(sampled, per_plant.upper, np.nan), d.served)
    age = data_age(to_districts(np.where(sampled, 1.0, np.nan), d.served))
    return IndicatorSeries(estimate=estimate, lower=lower, upper=upper, age_days=age)


def _gp(d: DistrictData) -> IndicatorSeries:
    gp = d.district["gp_ari"]
    result = ears(gp, method="C2")
    alarm = np.where(np.isfinite(result.statistic), result.alarm.astype(np.float64), np.nan)
    return IndicatorSeries(estimate=alarm, age_days=data_age(gp))


BUILDERS: dict[str, Callable[[DistrictData, Ruleset], IndicatorSeries]] = {
    "incidence_7d": lambda d, _r: carry_forward(_incidence(d)),
    "positivity_7d": lambda d, _r: carry_forward(_positivity(d)),
    "tests_7d": lambda d, _r: carry_forward(_tests(d)),
    "admissions_7d": lambda d, _r: carry_forward(_admissions(d)),
    "icu_share": lambda d, _r: carry_forward(_icu(d)),
    "rt": lambda d, r: carry_forward(_rt(d, r)),
    # Wastewater trends exist on sample days only: prepare signals count samples, not days.
    "ww_trend": lambda d, _r: _ww_trend(d),
    "gp_aberration": lambda d, _r: carry_forward(_gp(d)),
}


class UnknownIndicatorError(ServiceError, ValueError):
    def __init__(self, names: list[str]) -> None:
        super().__init__(
            f"the ruleset uses indicator(s) {', '.join(names)} that tierwise does not compute; "
            f"known: {', '.join(sorted(BUILDERS))}"
        )


def district_indicators(data: DistrictData, ruleset: Ruleset) -> dict[str, IndicatorSeries]:
    """The indicator series ``ruleset`` uses, computed for every district at once."""
    wanted = sorted(ruleset.used_indicators())
    unknown = [name for name in wanted if name not in BUILDERS]
    if unknown:
        raise UnknownIndicatorError(unknown)
    return {name: BUILDERS[name](data, ruleset) for name in wanted}
