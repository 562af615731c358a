"""Use case: projected ICU pressure as indicator series for the rules engine.

Two indicator kinds, listed in :mod:`server.services.builtin_kinds` (``from_named_builder``):

``icu_share_projected``
    The ICU share of staffed beds (percent) expected ``horizon`` days ahead (param, default 14)
    under the ruleset's scenario named by the ``scenario`` param (default: the first declared,
    or "the trend continues" when none is declared), with the 90 % interval from the growth
    rate's uncertainty.
``icu_days_to_share``
    Days until that expected share reaches ``share`` percent (param, default 85) within
    ``horizon`` days (default 21), with its 90 % interval; 0 = reached today, ``horizon + 1``
    = not within the horizon (the engine takes no infinite values).

Both are computed per *area* (the district's parent, where ICU census and staffed beds are
reported) from the area's census and staffed beds and the growth rate of the admissions of all
its districts together (:func:`server.indicators.growth.rolling_growth_rate`, 14 days, no
weekday effects; on the days still being reported the admissions are the nowcast; unknown with
fewer than :data:`MIN_ADMISSIONS` admissions in those 14 days), then given
to each district of the area. Areas are recognised as the districts whose ICU rows are the same
(the loader copies an area's rows to each of its districts, in backtests too). Only ICU beds are
projected: the store has no general-bed census or staffed general beds yet.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray

from rules import IndicatorSeries, Ruleset
from rules import Scenario as RuleScenario
from server.indicators._arrays import trailing_sum
from server.indicators.capacity import Scenario, projected_share, shrunk_growth
from server.indicators.growth import rolling_growth_rate
from server.indicators.hospital import LengthOfStay, length_of_stay

if TYPE_CHECKING:  # district_indicators registers these builders: import it lazily
    from server.services.district_indicators import DistrictData

__all__ = [
    "DEFAULT_SCENARIO",
    "admissions_with_nowcast",
    "GROWTH_WINDOW",
    "days_to_share_series",
    "forecast_scenarios",
    "projected_share_series",
]

#: Days of admissions the growth rate is fitted on.
GROWTH_WINDOW = 14
#: Fewest admissions in the growth window for a projection (fewer: unknown; a rate fitted to a
#: handful of admissions projects absurd growth). Common practice, no source.
MIN_ADMISSIONS = 10
#: The scenario used when a ruleset declares none.
DEFAULT_SCENARIO = RuleScenario(name="trend", label="if the trend continues")


def forecast_scenarios(ruleset: Ruleset | None) -> tuple[RuleScenario, ...]:
    """The ruleset's scenarios, or :data:`DEFAULT_SCENARIO` alone when it declares none."""
    if ruleset is None or not ruleset.scenarios:
        return (DEFAULT_SCENARIO,)
    return ruleset.scenarios


def as_path(sc: RuleScenario) -> Scenario:
    """The ruleset's scenario as the forecaster's growth-rate path."""
    return Scenario(name=sc.name, kind=sc.kind, value=sc.value, within_days=sc.within_days,
                    label=sc.label)


def _scenario(ruleset: Ruleset, name: str) -> RuleScenario:
    spec = ruleset.indicator(name)
    wanted = spec.params.get("scenario")
    if wanted is None:
        return forecast_scenarios(ruleset)[0]
    return ruleset.scenario(str(wanted))


def area_groups(occupied: NDArray[np.float64], staffed: NDArray[np.float64]) -> NDArray[np.int64]:
    """Per district, the index of its area: districts with the same ICU rows share one."""
    key = np.nan_to_num(np.concatenate([occupied, staffed], axis=1), nan=-1.0)
    _rows, inverse = np.unique(key, axis=0, return_inverse=True)
    return np.asarray(inverse, dtype=np.int64).reshape(-1)


def area_sum(values: NDArray[np.float64], group: NDArray[np.int64], n: int) -> NDArray[np.float64]:
    """Per area, the sum of its districts' rows (NaN when any district lacks the day)."""
    out = np.zeros((n, values.shape[1]))
    np.add.at(out, group, values)
    return out


def admissions_with_nowcast(d: DistrictData) -> NDArray[np.float64]:
    """Daily hospital admissions per district, the nowcast on the days still being reported."""
    adm = d.district["hosp_admissions"]
    nc = d.nowcast_of("hosp_admissions", window=1)
    if nc is not None:
        adm = np.where(nc.nowcast & np.isfinite(nc.estimate), nc.estimate, adm)
    return adm


def _inputs(d: DistrictData) -> tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64],
                                 NDArray[np.float64], NDArray[np.float64]]:
    """Area index per district; per area census, staffed beds, growth rate and its error."""
    occ, staffed = d.area_of_district["icu_occupied"], d.area_of_district["icu_staffed"]
    group = area_groups(occ, staffed)
    n = int(group.max()) + 1 if group.size else 0
    first = np.zeros(n, dtype=np.int64)
    first[group[::-1]] = np.arange(group.size)[::-1]
    adm = admissions_with_nowcast(d)
    area_adm = area_sum(adm, group, n)
    fit = rolling_growth_rate(area_adm, GROWTH_WINDOW, day_of_week=False, max_missing=2)
    enough = trailing_sum(np.nan_to_num(area_adm), GROWTH_WINDOW) >= MIN_ADMISSIONS
    r, se = shrunk_growth(fit.estimate, fit.std_error)  # as the forecasts do
    return (group, occ[first], staffed[first], np.where(enough, r, np.nan), se)


def _series(
    d: DistrictData, est: NDArray[np.float64], lo: NDArray[np.float64], hi: NDArray[np.float64],
    group: NDArray[np.int64],
) -> IndicatorSeries:
    from server.services.district_indicators import data_age

    occ, staffed = d.area_of_district["icu_occupied"], d.area_of_district["icu_staffed"]
    return IndicatorSeries(
        estimate=est[group], lower=lo[group], upper=hi[group],
        age_days=data_age(occ, staffed),
        stale=d.stale_of("icu_occupied", "icu_staffed", "hosp_admissions"),
        invalid=d.invalid_of("icu_occupied", "icu_staffed", "hosp_admissions",
                             reach=GROWTH_WINDOW),
    )


def projected_share_series(d: DistrictData, ruleset: Ruleset, *, name: str = "icu_share_projected",
                           los: LengthOfStay | None = None) -> IndicatorSeries:
    """``icu_share_projected`` for every district and day (see the module docstring)."""
    params = ruleset.indicator(name).params if name in ruleset.used_indicators() else {}
    horizon = int(params.get("horizon", 14))
    sc = _scenario(ruleset, name) if name in ruleset.used_indicators() else DEFAULT_SCENARIO
    group, occ, staffed, r, se = _inputs(d)
    p = projected_share(occ, staffed, r, se, scenario=as_path(sc), los=los or length_of_stay(),
                        horizon=horizon, threshold=float(params.get("share", 85.0)))
    return _series(d, p.share_estimate, p.share_lower, p.share_upper, group)


def days_to_share_series(d: DistrictData, ruleset: Ruleset, *, name: str = "icu_days_to_share",
                         los: LengthOfStay | None = None) -> IndicatorSeries:
    """``icu_days_to_share`` for every district and day (see the module docstring)."""
    params = ruleset.indicator(name).params if name in ruleset.used_indicators() else {}
    horizon = int(params.get("horizon", 21))
    sc = _scenario(ruleset, name) if name in ruleset.used_indicators() else DEFAULT_SCENARIO
    group, occ, staffed, r, se = _inputs(d)
    p = projected_share(occ, staffed, r, se, scenario=as_path(sc), los=los or length_of_stay(),
                        horizon=horizon, threshold=float(params.get("share", 85.0)))

    def capped(x: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.where(np.isinf(x), float(horizon + 1), x)

    return _series(d, capped(p.days_estimate), capped(p.days_lower), capped(p.days_upper), group)


def scenario_labels(scenarios: Sequence[RuleScenario]) -> dict[str, str]:
    """Scenario name -> its label ("if the trend continues")."""
    return {s.name: s.label for s in scenarios}
