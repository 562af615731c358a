"""The registry of indicator kinds: what a policy may declare, and how each kind is computed.

A policy declares each indicator it uses as a *kind* applied to a *measure* with parameters
(``docs/rules.md``, "Indicators")::

    indicators:
      admissions_incidence:
        kind: incidence
        measure: hosp_admissions
        params: {window: 14}
        label: 14-day admissions

Each :class:`Kind` says which parameters it takes (:class:`Param`: type, bounds, default), which
kinds of measure it accepts (``count``, ``level``, ``concentration``), where its measures are
read (districts, their parent areas, treatment plants), and its builder, a function of the
:class:`~server.services.district_indicators.DistrictData` and the resolved
:class:`Indicator`. :data:`KINDS` is the registry; :func:`check_indicator` validates a
declaration against it (the loader reports its errors with line and key), :func:`resolve`
turns a declaration into an :class:`Indicator`, :func:`measure_needs` lists the measures a
ruleset's indicators read, and :func:`compute` builds every indicator a ruleset uses.

The names tierwise knew before kinds existed (``incidence_7d``, ``positivity_7d``, ``tests_7d``,
``admissions_7d``, ``icu_share``, ``rt``, ``ww_trend``, ``gp_aberration``) are default
declarations (:data:`DEFAULTS`): a policy that declares one of them without ``kind`` gets that
kind, measure and parameters, and its own ``params`` override the defaults. A name without
``kind`` that is neither a default nor in
:data:`~server.services.district_indicators.BUILDERS` (name-based builders) cannot be computed.

Adding a kind: its method in ``server/indicators``, a builder and one :class:`Kind` entry in
:data:`KINDS` here (or :func:`register` from another module), tests.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Literal

import numpy as np

from rules import FieldError, IndicatorSeries, IndicatorSpec, Ruleset
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
from server.services.district_data import (
    AREA_MEASURES,
    DISTRICT_MEASURES,
    PLANT_MEASURES,
    DistrictData,
    MeasureNeeds,
    store_measures,
)
from server.services.district_indicators import BUILDERS, carry_forward, data_age, on_nowcast
from server.services.errors import ServiceError
from server.services.phase_indicators import wave_phase_series
from server.services.seasonal_indicators import seasonal_series
from server.services.testing_indicators import testing_change_series

__all__ = [
    "DEFAULTS",
    "KINDS",
    "STANDARD_MEASURES",
    "Indicator",
    "Kind",
    "Param",
    "UnknownIndicatorError",
    "check_indicator",
    "compute",
    "from_named_builder",
    "indicator_check",
    "known_measures",
    "measure_kind",
    "measure_needs",
    "register",
    "resolve",
    "sample_indicators",
    "store_measures",
]

Level = Literal["district", "area", "plant"]
MeasureKind = Literal["count", "level", "concentration"]

#: The measures tierwise knows by name, with their kind (DESIGN.md, "Data model"). Feeds and the
#: store may define more; :func:`indicator_check` takes those as ``measures``.
STANDARD_MEASURES: Mapping[str, str] = MappingProxyType({
    "cases": "count", "tests": "count", "positives": "count", "hosp_admissions": "count",
    "gp_ari": "count", "icu_occupied": "level", "icu_staffed": "level",
    "ww_concentration": "concentration", "ww_flow": "level", "ww_marker": "concentration",
})


@dataclass(frozen=True, kw_only=True)
class Param:
    """One parameter of a kind: its type, bounds and default.

    ``type`` is ``int``, ``float``, ``bool``, ``str`` (one of ``choices``) or ``"measure"``
    (a measure name, of one of ``measure_kinds``, read at the kind's level). ``minimum`` and
    ``maximum`` are inclusive; ``above`` an exclusive lower bound. A parameter with
    ``default=None`` may be left out and is then absent.
    """

    name: str
    type: type | str
    default: ParamValue | None
    help: str
    minimum: float | None = None
    maximum: float | None = None
    above: float | None = None
    choices: tuple[str, ...] = ()
    measure_kinds: tuple[str, ...] = ()

    def check(self, value: ParamValue, measures: Mapping[str, str]) -> ParamValue:
        """``value`` if it fits (ints are taken for floats); else :class:`FieldError`."""
        path = ("params", self.name)
        if self.type == "measure":
            if not isinstance(value, str):
                raise FieldError(path, f"expected a measure name, got {value!r}")
            _measure_of(path, value, self.measure_kinds, measures)
            return value
        if self.type is bool:
            if not isinstance(value, bool):
                raise FieldError(path, f"expected true or false, got {value!r}")
            return value
        if self.type is str:
            if value not in self.choices:
                raise FieldError(path, f"expected one of {', '.join(self.choices)}, "
                                       f"got {value!r}")
            return value
        ok = not isinstance(value, bool) and (
            isinstance(value, int) if self.type is int else isinstance(value, int | float))
        if not ok:
            what = "an integer" if self.type is int else "a number"
            raise FieldError(path, f"expected {what}, got {value!r}")
        number = float(value)  # type: ignore[arg-type]
        if self.minimum is not None and number < self.minimum:
            raise FieldError(path, f"{value!r} is below the minimum {self.minimum:g}")
        if self.maximum is not None and number > self.maximum:
            raise FieldError(path, f"{value!r} is above the maximum {self.maximum:g}")
        if self.above is not None and number <= self.above:
            raise FieldError(path, f"expected a number above {self.above:g}, got {value!r}")
        return value if self.type is int else float(number)


@dataclass(frozen=True, kw_only=True)
class Indicator:
    """A declared indicator resolved against the registry: kind, measure, every parameter."""

    name: str
    kind: Kind
    measure: str
    params: Mapping[str, ParamValue]
    #: The ruleset that declares it (None outside one: ``tierwise estimate``).
    ruleset: Ruleset | None = field(default=None, compare=False, repr=False)

    def measures(self) -> tuple[str, ...]:
        """Every measure it reads: the measure, then the measure parameters."""
        extra = tuple(str(self.params[p.name]) for p in self.kind.params
                      if p.type == "measure" and p.name in self.params)
        return (self.measure, *extra)


Builder = Callable[[DistrictData, Indicator], IndicatorSeries]


@dataclass(frozen=True, kw_only=True)
class Kind:
    """An indicator kind: what it accepts and how it is built.

    ``measure_kinds`` are the kinds of measure the ``measure`` may be; ``level`` where its
    measures are stored (``district``; ``area``: the district's parent area, e.g. ICU beds;
    ``plant``: wastewater treatment plants, weighted by the people of each district they
    serve). ``on_samples``: the values exist on sample days only (not carried forward; prepare
    signals count samples); ``carry``: the newest value is held on days without one (unless
    ``on_samples``). ``builder`` computes it for every district. ``reads``: measures read
    whatever the declaration names (for builders that read fixed measures);
    ``open_params``: parameters the kind does not list pass unchecked (its builder checks them).
    """

    name: str
    help: str
    default_measure: str
    measure_kinds: tuple[str, ...]
    builder: Builder
    params: tuple[Param, ...] = ()
    level: Level = "district"
    on_samples: bool = False
    #: Checks between parameters (given all of them); raises FieldError.
    check: Callable[[Mapping[str, ParamValue]], None] | None = None
    carry: bool = True
    reads: MeasureNeeds | None = None
    open_params: bool = False
    #: ``tierwise estimate`` offers it (a builder that needs its ruleset cannot run there).
    in_estimate: bool = True
    #: A parameter that names the measure (a name-based builder's own ``params: {measure:}``):
    #: given there, it is the measure the declaration reads.
    measure_param: str | None = None

    def param(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(name)

    def build(self, data: DistrictData, ind: Indicator) -> IndicatorSeries:
        """The series for every district (the newest value held while none is new, unless
        ``on_samples``; :func:`~server.services.district_indicators.carry_forward`)."""
        series = self.builder(data, ind)
        return series if self.on_samples or not self.carry else carry_forward(series)


def measure_kind(name: str, measures: Mapping[str, str]) -> str | None:
    """The kind of measure ``name`` (None: unknown). A qualified name (``cases.influenza``: the
    measure ``cases`` of one pathogen or stream) not itself listed has its base's kind."""
    if name in measures:
        return measures[name]
    base = name.split(".", 1)[0]
    return measures.get(base) if base != name else None


def _measure_of(
    path: tuple[str | int, ...], name: str, kinds: tuple[str, ...], measures: Mapping[str, str]
) -> None:
    found = measure_kind(name, measures)
    if found is None:
        raise FieldError(path, f"{name!r} is not a known measure (known: "
                               f"{', '.join(sorted(measures))})")
    if kinds and found not in kinds:
        raise FieldError(path, f"{name!r} is a {found} measure; this kind takes "
                               f"{' or '.join(kinds)} measures")


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


# ------------------------------------------------------------------------------ the registry


def _window_param(default: int, help: str = "days in the trailing window") -> Param:
    return Param(name="window", type=int, default=default, minimum=1, maximum=366, help=help)


_PER = Param(name="per", type=int, default=100_000, minimum=1, help="rate per this many people")
_FLOW = Param(name="flow", type="measure", default="ww_flow", measure_kinds=("level",),
              help="the influent flow measure the concentration is normalised by")
_COUNTS = ("count",)

KINDS: dict[str, Kind] = {k.name: k for k in (
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
         on_samples=True,
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
)}


@dataclass(frozen=True, kw_only=True)
class Default:
    """A name tierwise knew before kinds: the kind, measure and parameters it stands for."""

    kind: str
    measure: str
    params: Mapping[str, ParamValue] = field(default_factory=dict)


#: The indicator names of earlier releases, each a declaration by default (:func:`register`
#: adds the names of kinds registered with ``default=True``).
DEFAULTS: dict[str, Default] = ({
    "incidence_7d": Default(kind="incidence", measure="cases"),
    "positivity_7d": Default(kind="positivity", measure="positives"),
    "tests_7d": Default(kind="testing_rate", measure="tests"),
    "admissions_7d": Default(kind="incidence", measure="hosp_admissions"),
    "icu_share": Default(kind="occupancy_share", measure="icu_occupied"),
    "rt": Default(kind="rt", measure="cases"),
    "ww_trend": Default(kind="wastewater_trend", measure="ww_concentration"),
    "gp_aberration": Default(kind="aberration", measure="gp_ari"),
})


def register(kind: Kind, *, replace: bool = False, default: bool = False) -> Kind:
    """Add ``kind`` to :data:`KINDS` (a second kind of the same name needs ``replace``); with
    ``default`` a declaration named as the kind needs no ``kind:`` (:data:`DEFAULTS`)."""
    if kind.name in KINDS and not replace:
        raise ValueError(f"indicator kind {kind.name!r} is registered already")
    KINDS[kind.name] = kind
    if default:
        DEFAULTS[kind.name] = Default(kind=kind.name, measure=kind.default_measure)
    return kind


class _NamedView:
    """A ruleset as a name-based builder sees it: ``indicator(name)`` is the declaration being
    built (with its resolved parameters), whatever it is called; all else is the ruleset's."""

    def __init__(self, ruleset: Ruleset, name: str, ind: Indicator) -> None:
        self._ruleset, self._name, self._ind = ruleset, name, ind

    def indicator(self, name: str) -> IndicatorSpec:
        if name == self._name:
            return replace(self._ruleset.indicator(self._ind.name), name=self._name,
                           params=dict(self._ind.params))
        return self._ruleset.indicator(name)

    def used_indicators(self) -> tuple[str, ...]:
        return (*self._ruleset.used_indicators(), self._name)

    def __getattr__(self, attr: str) -> object:
        return getattr(self._ruleset, attr)


def from_named_builder(
    builder: Callable[[DistrictData, Ruleset], IndicatorSeries], *, name: str, help: str,
    default_measure: str, measure_kinds: tuple[str, ...], level: Level = "district",
    params: tuple[Param, ...] = (), carry: bool = True, on_samples: bool = False,
    reads: MeasureNeeds | None = None, measure_param: str | None = None,
) -> Kind:
    """A kind from a :data:`~server.services.district_indicators.BUILDERS`-style function,
    which reads its parameters as ``ruleset.indicator(name).params``; it sees the declaration
    being built under ``name`` (so a policy may declare it under any name, with ``kind:``).

    ``params`` are checked; others pass to the builder unchecked. It reads ``reads`` (default:
    the measures of earlier releases) besides the declared measure; ``carry`` holds the newest
    value on days without one, as ``carry_forward`` in a BUILDERS line does. A builder that
    takes its measure from a parameter names it as ``measure_param``: the declared ``measure``
    is given there unless the parameter is set.
    """
    def build(d: DistrictData, ind: Indicator) -> IndicatorSeries:
        if ind.ruleset is None:
            raise ValueError(f"indicator kind {name!r} is computed within a ruleset only")
        if measure_param is not None and measure_param not in ind.params:
            ind = replace(ind, params={**ind.params, measure_param: ind.measure})
        return builder(d, _NamedView(ind.ruleset, name, ind))  # type: ignore[arg-type]

    return Kind(name=name, help=help, default_measure=default_measure,
                measure_kinds=measure_kinds, level=level, params=params, builder=build,
                carry=carry, on_samples=on_samples, reads=reads or MeasureNeeds(),
                open_params=True, in_estimate=False, measure_param=measure_param)


class UnknownIndicatorError(ServiceError, ValueError):
    def __init__(self, names: list[str]) -> None:
        super().__init__(
            f"the ruleset uses indicator(s) {', '.join(names)} that tierwise does not compute; "
            f"declare a kind (known kinds: {', '.join(sorted(KINDS))}) or use a known name "
            f"({', '.join(sorted({*DEFAULTS, *BUILDERS}))})"
        )


class IndicatorDeclarationError(ServiceError, ValueError):
    """A stored ruleset declares an indicator the registry refuses (``rules check`` says where)."""

    def __init__(self, name: str, problem: FieldError) -> None:
        super().__init__(f"indicator {name!r}: {problem}")


def _declared(spec: IndicatorSpec) -> tuple[str, str, dict[str, ParamValue]] | None:
    """(kind, measure, params before defaults) of a declaration; None: not a kind at all."""
    if spec.kind is not None:
        kind = KINDS.get(spec.kind)
        if kind is None:
            raise FieldError(("kind",), f"unknown indicator kind {spec.kind!r} (known: "
                                        f"{', '.join(sorted(KINDS))})")
        return spec.kind, spec.measure or kind.default_measure, dict(spec.params)
    default = DEFAULTS.get(spec.name)
    if default is None:
        return None
    return default.kind, default.measure, {**default.params, **spec.params}


def resolve(
    spec: IndicatorSpec, measures: Mapping[str, str] = STANDARD_MEASURES,
    ruleset: Ruleset | None = None,
) -> Indicator | None:
    """The declaration ``spec`` checked against the registry and ``measures`` (name -> kind of
    measure); None for a name that is no kind (a name-based builder, or unknown).

    Raises :class:`~rules.errors.FieldError` with the path inside the declaration
    (``("kind",)``, ``("measure",)``, ``("params", name)``).
    """
    declared = _declared(spec)
    if declared is None:
        return None
    kind_name, measure, given = declared
    kind = KINDS[kind_name]
    named = given.get(kind.measure_param) if kind.measure_param else None
    if isinstance(named, str) and (spec.kind is None or spec.measure is None):
        measure = named   # params: {measure: gp_ari.rsv} names what it reads
        _measure_of(("params", str(kind.measure_param)), measure, kind.measure_kinds, measures)
    _measure_of(("measure",), measure, kind.measure_kinds, measures)
    known = {p.name for p in kind.params}
    params: dict[str, ParamValue] = {}
    for key, value in given.items():
        if key not in known and (spec.kind is None or kind.open_params):
            if kind.open_params:
                params[key] = value  # the builder checks its own parameters
            continue  # an old name's free parameters were never read, and still are not
        if key not in known:
            raise FieldError(("params", key), f"unknown parameter {key!r} of kind "
                                              f"{kind.name!r} (expected one of: "
                                              f"{', '.join(sorted(known)) or 'none'})")
        params[key] = kind.param(key).check(value, measures)
    for p in kind.params:
        if p.name not in params and p.default is not None:
            params[p.name] = p.default
    if kind.check is not None:
        kind.check(params)
    return Indicator(name=spec.name, kind=kind, measure=measure,
                     params=MappingProxyType(params), ruleset=ruleset)


def check_indicator(
    spec: IndicatorSpec, measures: Mapping[str, str] = STANDARD_MEASURES
) -> None:
    """Raise :class:`~rules.errors.FieldError` if the registry cannot compute ``spec``.

    A name without ``kind`` must be a default declaration (:data:`DEFAULTS`) or have a
    name-based builder (:data:`~server.services.district_indicators.BUILDERS`)... or no check
    at all: policies written for other tools (``rules/policies/eu-2020-1475.yaml``) declare
    names tierwise does not compute, and only evaluating them fails
    (:class:`UnknownIndicatorError`).
    """
    resolve(spec, measures)


def known_measures(measures: Mapping[str, str] | None = None) -> dict[str, str]:
    """The standard measures and ``measures`` (name -> kind, e.g. the store's catalogue); a
    standard name keeps its standard kind."""
    return {**(measures or {}), **STANDARD_MEASURES}


def indicator_check(
    measures: Mapping[str, str] | None = None, *, pathogens: Sequence[str] | None = None,
) -> Callable[[IndicatorSpec], None]:
    """The check :func:`rules.parse_ruleset` takes, over :func:`known_measures`; with
    ``pathogens`` (the feeds file's list) a qualified measure's pathogen must be one of them."""
    known = known_measures(measures)

    def check(spec: IndicatorSpec) -> None:
        ind = resolve(spec, known)
        if ind is None or pathogens is None:
            return
        roles = [("measure",)] + [("params", p.name) for p in ind.kind.params
                                  if p.type == "measure" and p.name in ind.params]
        for role, name in zip(roles, ind.measures(), strict=True):
            base, dot, pathogen = name.partition(".")
            if dot and name not in known and pathogen not in pathogens:
                raise FieldError(role, f"unknown pathogen {pathogen!r} in {name!r} "
                                       f"(configured: {', '.join(pathogens) or 'none'})")

    return check


def _resolved(ruleset: Ruleset, measures: Mapping[str, str]) -> dict[str, Indicator | None]:
    out: dict[str, Indicator | None] = {}
    for name in ruleset.used_indicators():
        spec = ruleset.indicator(name)
        try:
            out[name] = resolve(spec, measures, ruleset)
        except FieldError as exc:
            raise IndicatorDeclarationError(name, exc) from None
    return out


def measure_needs(
    ruleset: Ruleset, measures: Mapping[str, str] | None = None
) -> MeasureNeeds:
    """The measures the indicators ``ruleset`` uses read, by where they are stored.

    A name-based builder (:data:`~server.services.district_indicators.BUILDERS`) reads the
    measures of earlier releases (``DISTRICT_MEASURES``, ...), so those are read with it.
    """
    found: dict[str, set[str]] = {"district": set(), "area": set(), "plant": set()}
    for name, ind in _resolved(ruleset, known_measures(measures)).items():
        if ind is None:
            if name in BUILDERS:
                found["district"] |= set(DISTRICT_MEASURES)
                found["area"] |= set(AREA_MEASURES)
                found["plant"] |= set(PLANT_MEASURES)
            continue
        found[ind.kind.level] |= set(ind.measures())
        if ind.kind.reads is not None:
            for level in ("district", "area", "plant"):
                found[level] |= set(getattr(ind.kind.reads, level))
    return MeasureNeeds(district=tuple(sorted(found["district"])),
                        area=tuple(sorted(found["area"])), plant=tuple(sorted(found["plant"])))


def sample_indicators(ruleset: Ruleset) -> tuple[str, ...]:
    """The indicators of ``ruleset`` that exist on sample days only (:attr:`Kind.on_samples`)."""
    out = []
    for name in ruleset.used_indicators():
        try:
            declared = _declared(ruleset.indicator(name))
        except FieldError:
            continue
        if declared is not None and KINDS[declared[0]].on_samples:
            out.append(name)
    return tuple(out)


def compute(
    data: DistrictData, ruleset: Ruleset, measures: Mapping[str, str] | None = None
) -> dict[str, IndicatorSeries]:
    """The indicator series ``ruleset`` uses, computed for every district at once.

    Declarations are checked against :func:`known_measures` of ``measures`` (default: the
    store's catalogue as read into ``data``); the measures must have been read into ``data``
    (:func:`measure_needs`).
    """
    catalogue = data.measure_kinds if measures is None else measures
    resolved = _resolved(ruleset, known_measures(catalogue))
    unknown = [n for n, ind in resolved.items() if ind is None and n not in BUILDERS]
    if unknown:
        raise UnknownIndicatorError(sorted(unknown))
    return {
        name: ind.kind.build(data, ind) if ind is not None else BUILDERS[name](data, ruleset)
        for name, ind in sorted(resolved.items())
    }


def describe(kinds: Iterable[Kind] | None = None) -> list[str]:
    """One line per kind and parameter, for ``tierwise rules kinds`` and the docs."""
    lines = []
    for kind in kinds if kinds is not None else KINDS.values():
        lines.append(f"{kind.name}: {kind.help} (measure: {kind.default_measure}, "
                     f"{'/'.join(kind.measure_kinds)} at {kind.level} level)")
        for p in kind.params:
            bounds = "".join((
                f", >= {p.minimum:g}" if p.minimum is not None else "",
                f", > {p.above:g}" if p.above is not None else "",
                f", <= {p.maximum:g}" if p.maximum is not None else "",
                f", one of {'/'.join(p.choices)}" if p.choices else "",
            ))
            kind_name = p.type if isinstance(p.type, str) else p.type.__name__
            lines.append(f"  {p.name} ({kind_name}{bounds}; default {p.default!r}): {p.help}")
    return lines


# ------------------------------------------------------------------ kinds from name-based builders
# Builders written for district_indicators.BUILDERS (parameters read from the ruleset), each a
# kind in one line; default=True keeps a declaration named as the kind working without `kind:`.

register(from_named_builder(
    seasonal_series, name="seasonal_intensity", default_measure="gp_ari", measure_kinds=_COUNTS,
    carry=False, measure_param="measure",
    help="level of the newest complete ISO week by the moving epidemic method (0 below the "
         "epidemic threshold .. 4 very high); its own params (docs/rules.md)"), default=True)
register(from_named_builder(
    projected_share_series, name="icu_share_projected", default_measure="icu_occupied",
    measure_kinds=("level", "count"), level="area",
    help="ICU share of staffed beds expected `horizon` days ahead under a policy scenario"),
    default=True)
register(from_named_builder(
    days_to_share_series, name="icu_days_to_share", default_measure="icu_occupied",
    measure_kinds=("level", "count"), level="area",
    help="days until the expected ICU share reaches `share` per cent"), default=True)
register(from_named_builder(
    wave_phase_series, name="wave_phase", default_measure="cases", measure_kinds=_COUNTS,
    help="phase of the current wave from logistic/Richards fits (0 declining, 1 past its "
         "turning point, 2 slowing, 3 growing)"), default=True)
def _testing_check(params: Mapping[str, ParamValue]) -> None:
    if int(params["min_days"]) > int(params["compare"]):
        raise FieldError(("params", "min_days"), f"{params['min_days']} is more than compare "
                         f"{params['compare']}")


register(Kind(
    name="testing_change", builder=testing_change_series, default_measure="positives",
    measure_kinds=_COUNTS, carry=False, check=_testing_check,
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
         "against the same weekdays 1 and 2 weeks before, positivity the other way)"))
