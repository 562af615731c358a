"""The indicator kinds tierwise ships: their builders and their :class:`Kind` entries.

:data:`BUILTIN_KINDS` lists every kind in the order ``tierwise rules kinds`` shows them; the
registry (:mod:`server.services.indicator_kinds`) holds them from its import on.
:data:`BUILTIN_DEFAULTS` are the names tierwise knew before kinds existed (``incidence_7d``,
``positivity_7d``, ``tests_7d``, ``admissions_7d``, ``icu_share``, ``rt``, ``ww_trend``,
``gp_aberration``) and the kinds made of name-based builders (``seasonal_intensity``, ...): a
policy that declares one of them without ``kind`` gets that kind, measure and parameters.

Adding a kind: its method in ``server/indicators``, a builder and one :class:`Kind` entry in
:data:`BUILTIN_KINDS` here, tests (``tests/server/services/test_builtin_kinds.py``).
"""

from __future__ import annotations

from collections.abc import Mapping
from types import MappingProxyType

import numpy as np

from rules import FieldError, IndicatorSeries
from rules.model import ParamValue
from server.indicators._arrays import trailing_sum
from server.indicators.aberration import ears
from server.indicators.growth import rolling_growth_rate
from server.indicators.hospital import occupancy_share
from server.indicators.poisson import incidence_rate
from server.indicators.renewal import reproduction_number
from server.indicators.serial_interval import gamma_serial_interval
from server.indicators.wastewater import level, normalise, smooth, to_districts, trend
from server.indicators.wilson import positivity
from server.indicators.wilson import testing_rate as tests_per_population
from server.services.capacity_indicators import days_to_share_series, projected_share_series
from server.services.district_data import DistrictData
from server.services.district_indicators import data_age, on_nowcast
from server.services.kind_model import Default, Indicator, Kind, Param, from_named_builder
from server.services.phase_indicators import wave_phase_series
from server.services.seasonal_indicators import seasonal_series
from server.services.testing_indicators import testing_change_series

__all__ = ["BUILTIN_DEFAULTS", "BUILTIN_KINDS"]


# ------------------------------------------------------------------------------ builders


def _window(ind: Indicator, name: str = "window") -> int:
    return int(ind.params[name])  # type: ignore[arg-type]


def _incidence(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    counts, w = d.district[ind.measure], _window(ind)
    per = int(ind.params["per"])  # type: ignore[arg-type]
    est = incidence_rate(counts, d.population, w, per=per)
    return on_nowcast(IndicatorSeries(
        estimate=est.estimate, lower=est.lower, upper=est.upper, count=est.count,
        age_days=data_age(counts), stale=d.stale_of(ind.measure),
        invalid=d.invalid_of(ind.measure, reach=w),
    ), d, ind.measure, per=per, window=w)


def _positivity(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    denominator = str(ind.params["denominator"])
    pos, tests, w = d.district[ind.measure], d.district[denominator], _window(ind)
    with np.errstate(invalid="ignore"):
        over = pos > tests  # a pair no check let through together (older data): unusable
    if over.any():
        pos, tests = np.where(over, np.nan, pos), np.where(over, np.nan, tests)
    est = positivity(pos, tests, w)
    invalid = d.invalid_of(ind.measure, denominator, reach=w)
    if over.any():
        over_week = trailing_sum(over.astype(np.float64), w) > 0.5
        invalid = over_week if invalid is None else invalid | over_week
    return IndicatorSeries(
        estimate=100 * est.estimate, lower=100 * est.lower, upper=100 * est.upper,
        count=est.positives, age_days=data_age(pos, tests),
        stale=d.stale_of(ind.measure, denominator), invalid=invalid,
    )


def _testing_rate(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    tests, w = d.district[ind.measure], _window(ind)
    per = int(ind.params["per"])  # type: ignore[arg-type]
    est = tests_per_population(tests, d.population, w, per=per)
    return on_nowcast(IndicatorSeries(estimate=est.estimate, age_days=data_age(tests),
                                      stale=d.stale_of(ind.measure),
                                      invalid=d.invalid_of(ind.measure, reach=w)),
                      d, ind.measure, per=per, bounds=False, window=w)


def _occupancy_share(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    denominator = str(ind.params["denominator"])
    occ, staffed = d.area_of_district[ind.measure], d.area_of_district[denominator]
    share = occupancy_share(occ, staffed)
    return IndicatorSeries(estimate=100 * share.estimate, age_days=data_age(occ, staffed),
                           stale=d.stale_of(ind.measure, denominator),
                           invalid=d.invalid_of(ind.measure, denominator))


def _rt(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    si = gamma_serial_interval(float(ind.params["serial_interval_mean"]),  # type: ignore[arg-type]
                               float(ind.params["serial_interval_sd"]))  # type: ignore[arg-type]
    cases, w = d.district[ind.measure], _window(ind)
    est = reproduction_number(cases, si, w)
    return IndicatorSeries(  # a day reaches the window and the serial interval's lags after it
        estimate=est.estimate, lower=est.lower, upper=est.upper, age_days=data_age(cases),
        stale=d.stale_of(ind.measure), invalid=d.invalid_of(ind.measure, reach=w + si.pmf.size - 1),
    )


def _growth_rate(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    counts, w = d.district[ind.measure], _window(ind)
    est = rolling_growth_rate(counts, w, day_of_week=bool(ind.params["day_of_week"]))
    return IndicatorSeries(  # per cent per day, as the wastewater trend
        estimate=100 * est.estimate, lower=100 * est.lower, upper=100 * est.upper,
        age_days=data_age(counts), stale=d.stale_of(ind.measure),
        invalid=d.invalid_of(ind.measure, reach=w),
    )


def _plant_log(d: DistrictData, ind: Indicator) -> tuple[np.ndarray, np.ndarray]:
    """Per plant, the log of the flow-normalised concentration (NaN off sample days and where
    the product passes the float range) and where it overflowed."""
    conc, flow = d.plant[ind.measure], d.plant[str(ind.params["flow"])]
    with np.errstate(over="ignore"):  # a product past the float range: that day is unusable
        norm = normalise(
            conc, ["flow"] * conc.shape[0], flow=flow, population_served=d.plant_population
        )
    log_value = norm.log_value
    overflow = np.isinf(log_value)
    if overflow.any():
        log_value = np.where(overflow, np.nan, log_value)
    return log_value, overflow


def _on_districts(
    d: DistrictData, ind: Indicator,
    per_plant: tuple[np.ndarray, np.ndarray | None, np.ndarray | None],
    log_value: np.ndarray, overflow: np.ndarray, reach: int,
) -> IndicatorSeries:
    """Plant values on sample days as the population-weighted mean over each district's
    plants; a bad plant value makes the next ``reach`` days of its districts invalid."""
    sampled = np.isfinite(log_value)
    estimate, lower, upper = (
        None if a is None else to_districts(np.where(sampled, a, np.nan), d.served)
        for a in per_plant)
    assert estimate is not None
    age = data_age(to_districts(np.where(sampled, 1.0, np.nan), d.served))
    measures = ind.measures()
    bad = d.plants_invalid(*measures) | (
        (d.served > 0).astype(np.float64) @ overflow.astype(np.float64) > 0)
    invalid = trailing_sum(bad.astype(np.float64), reach) > 0.5 if bad.any() else None
    return IndicatorSeries(estimate=estimate, lower=lower, upper=upper, age_days=age,
                           stale=d.plants_stale(*measures), invalid=invalid)


def _wastewater_trend(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    log_value, overflow = _plant_log(d, ind)
    w = _window(ind)
    per_plant = trend(log_value, window=w)
    return _on_districts(d, ind, (per_plant.estimate, per_plant.lower, per_plant.upper),
                         log_value, overflow, w)


def _wastewater_level(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    log_value, overflow = _plant_log(d, ind)
    baseline = _window(ind, "baseline_days")
    smoothed = smooth(log_value, neighbours=_window(ind, "neighbours"))
    lvl = level(log_value, current=smoothed.estimate, baseline_days=baseline,
                quantile=float(ind.params["quantile"]),  # type: ignore[arg-type]
                min_samples=_window(ind, "min_samples"))
    return _on_districts(d, ind, (lvl.estimate, None, None), log_value, overflow, baseline)


#: Days a bad input day reaches forward in EARS: the baseline and the day itself
#: (C1: t-7..t; C2: t-9..t; C3 sums C2 over t-2..t).
_EARS_REACH = {"C1": 8, "C2": 10, "C3": 12}


def _aberration(d: DistrictData, ind: Indicator) -> IndicatorSeries:
    counts, method = d.district[ind.measure], str(ind.params["method"])
    result = ears(counts, method=method)  # type: ignore[arg-type]
    alarm = np.where(np.isfinite(result.statistic), result.alarm.astype(np.float64), np.nan)
    return IndicatorSeries(estimate=alarm, age_days=data_age(counts),
                           stale=d.stale_of(ind.measure),
                           invalid=d.invalid_of(ind.measure, reach=_EARS_REACH[method]))


def _growth_check(params: Mapping[str, ParamValue]) -> None:
    """The fit has 2 coefficients, 8 with weekday effects; a window needs one day more."""
    least = 9 if params["day_of_week"] else 3
    if int(params["window"]) < least:  # type: ignore[call-overload]
        raise FieldError(("params", "window"), f"{params['window']} days are too few for the fit "
                                               f"(at least {least} with day_of_week "
                                               f"{str(params['day_of_week']).lower()})")


def _testing_check(params: Mapping[str, ParamValue]) -> None:
    if int(params["min_days"]) > int(params["compare"]):
        raise FieldError(("params", "min_days"), f"{params['min_days']} is more than compare "
                         f"{params['compare']}")


# ------------------------------------------------------------------------------ the kinds


def _window_param(default: int, help: str = "days in the trailing window") -> Param:
    return Param(name="window", type=int, default=default, minimum=1, maximum=366, help=help)


_PER = Param(name="per", type=int, default=100_000, minimum=1, help="rate per this many people")
_FLOW = Param(name="flow", type="measure", default="ww_flow", measure_kinds=("level",),
              help="the influent flow measure the concentration is normalised by")
_COUNTS = ("count",)

_METHODS: tuple[Kind, ...] = (
    Kind(name="incidence", builder=_incidence, default_measure="cases", measure_kinds=_COUNTS,
         params=(_window_param(7), _PER),
         help="events per `per` people over a trailing window, exact Poisson (Garwood) interval; "
              "the days still incomplete are nowcast for cases, tests and admissions"),
    Kind(name="positivity", builder=_positivity, default_measure="positives",
         measure_kinds=_COUNTS,
         params=(_window_param(7),
                 Param(name="denominator", type="measure", default="tests",
                       measure_kinds=_COUNTS, help="the count the measure is a share of")),
         help="per cent of tests positive over a trailing window, Wilson interval"),
    Kind(name="testing_rate", builder=_testing_rate, default_measure="tests",
         measure_kinds=_COUNTS, params=(_window_param(7), _PER),
         help="tests per `per` people over a trailing window"),
    Kind(name="growth_rate", builder=_growth_rate, default_measure="cases",
         measure_kinds=_COUNTS,
         params=(_window_param(14),
                 Param(name="day_of_week", type=bool, default=True,
                       help="fit weekday effects")),
         check=_growth_check,
         help="daily growth rate in per cent per day, quasi-Poisson log-linear fit"),
    Kind(name="rt", builder=_rt, default_measure="cases", measure_kinds=_COUNTS,
         params=(_window_param(7),
                 Param(name="serial_interval_mean", type=float, default=4.7, above=1,
                       maximum=60, help="mean of the gamma serial interval, days"),
                 Param(name="serial_interval_sd", type=float, default=2.9, above=0,
                       maximum=60, help="SD of the gamma serial interval, days")),
         help="reproduction number (Cori et al. 2013) with its 95 % credible interval"),
    Kind(name="occupancy_share", builder=_occupancy_share, default_measure="icu_occupied",
         measure_kinds=("level", "count"), level="area",
         params=(Param(name="denominator", type="measure", default="icu_staffed",
                       measure_kinds=("level", "count"),
                       help="the capacity the measure is a share of"),),
         help="per cent of capacity in use (e.g. ICU beds), read for the district's area"),
    Kind(name="wastewater_trend", builder=_wastewater_trend, default_measure="ww_concentration",
         measure_kinds=("concentration",), level="plant", on_samples=True,
         params=(_window_param(15), _FLOW,
                 Param(name="samples", type=int, default=None, minimum=1,
                       help="the samples a signal on it is meant to count; not read by the "
                            "computation (prepare signals set their own `for`)")),
         help="per cent change per day of the flow-normalised load, log-linear fit; "
              "population-weighted over the plants serving each district"),
    Kind(name="wastewater_level", builder=_wastewater_level,
         default_measure="ww_concentration", measure_kinds=("concentration",), level="plant",
         on_samples=True, history=True,  # its baseline reaches past the replay's windows
         params=(_FLOW,
                 Param(name="baseline_days", type=int, default=365, minimum=28, maximum=3660,
                       help="days of the trailing baseline period"),
                 Param(name="quantile", type=float, default=0.10, above=0, maximum=0.5,
                       help="quantile of the baseline period taken as the baseline"),
                 Param(name="min_samples", type=int, default=10, minimum=3,
                       help="samples the baseline needs"),
                 Param(name="neighbours", type=int, default=5, minimum=3, maximum=60,
                       help="samples in each local linear smooth")),
         help="standard deviations of the smoothed log load above the plant's baseline"),
    Kind(name="aberration", builder=_aberration, default_measure="gp_ari",
         measure_kinds=_COUNTS,
         params=(Param(name="method", type=str, default="C2", choices=("C1", "C2", "C3"),
                       help="EARS method"),),
         help="1 on days the EARS statistic is over its threshold, else 0"),
)


# ------------------------------------------------------------------ kinds from name-based builders
# Builders written for district_indicators.BUILDERS (parameters read from the ruleset), each a
# kind in one line; each is a default declaration under its own name (BUILTIN_DEFAULTS), so a
# declaration named as the kind works without `kind:`.

_NAMED: tuple[Kind, ...] = (
    from_named_builder(
        seasonal_series, name="seasonal_intensity", default_measure="gp_ari",
        measure_kinds=_COUNTS, carry=False, measure_param="measure", history=True,
        help="level of the newest complete ISO week by the moving epidemic method (0 below the "
             "epidemic threshold .. 4 very high); its own params (docs/rules.md)"),
    from_named_builder(
        projected_share_series, name="icu_share_projected", default_measure="icu_occupied",
        measure_kinds=("level", "count"), level="area",
        help="ICU share of staffed beds expected `horizon` days ahead under a policy scenario"),
    from_named_builder(
        days_to_share_series, name="icu_days_to_share", default_measure="icu_occupied",
        measure_kinds=("level", "count"), level="area",
        help="days until the expected ICU share reaches `share` per cent"),
    from_named_builder(
        wave_phase_series, name="wave_phase", default_measure="cases", measure_kinds=_COUNTS,
        help="phase of the current wave from logistic/Richards fits (0 declining, 1 past its "
             "turning point, 2 slowing, 3 growing)"),
)

# A kind with its builder in server/services/testing_indicators.py, listed after the others.
_TESTING_CHANGE = Kind(
    name="testing_change", builder=testing_change_series, default_measure="positives",
    measure_kinds=_COUNTS, carry=False, check=_testing_check, history=True,
    params=(Param(name="denominator", type="measure", default="tests", measure_kinds=_COUNTS,
                  help="the tests the measure is positive among"),
            Param(name="compare", type=int, default=7, minimum=1, maximum=7,
                  help="most days after a change its size is estimated from"),
            Param(name="min_days", type=int, default=3, minimum=1, maximum=7,
                  help="days after a change before it is flagged"),
            Param(name="min_ratio", type=float, default=1.2, above=1, maximum=10,
                  help="smallest factor of tests (after / before, either way) flagged"),
            Param(name="separation", type=int, default=28, minimum=7, maximum=366,
                  help="days after a known change within which a flag is the same change")),
    help="days since the first day of the latest testing change known that day (tests moved "
         "against the same weekdays 1 and 2 weeks before, positivity the other way)")

#: Every kind tierwise ships, in the order the registry lists them.
BUILTIN_KINDS: tuple[Kind, ...] = (*_METHODS, *_NAMED, _TESTING_CHANGE)

#: The indicator names of earlier releases, each a declaration by default, and the kinds of
#: name-based builders under their own names.
BUILTIN_DEFAULTS: Mapping[str, Default] = MappingProxyType({
    "incidence_7d": Default(kind="incidence", measure="cases"),
    "positivity_7d": Default(kind="positivity", measure="positives"),
    "tests_7d": Default(kind="testing_rate", measure="tests"),
    "admissions_7d": Default(kind="incidence", measure="hosp_admissions"),
    "icu_share": Default(kind="occupancy_share", measure="icu_occupied"),
    "rt": Default(kind="rt", measure="cases"),
    "ww_trend": Default(kind="wastewater_trend", measure="ww_concentration"),
    "gp_aberration": Default(kind="aberration", measure="gp_ari"),
    **{k.name: Default(kind=k.name, measure=k.default_measure) for k in _NAMED},
})
