"""The forecaster of the forecast record: the capacity forecasts, made from data as known.

:class:`CapacityForecaster` fits the :class:`server.services.forecast_known.Forecaster`
protocol: from the stored measures known at a cutoff (:class:`~server.services.forecast_known.
KnownData`) it makes the same forecasts as the capacity page
(:func:`server.indicators.capacity.capacity_forecasts`): hospital admissions per district, and
per area (the districts' parent) admissions summed over its districts, ICU beds in use and their
share of staffed beds. Only the ruleset's first scenario is a forecast ("the trend continues" by
default); the others are what-ifs and are not scored. Unlike the pages, it reads admissions as
reported (no nowcast of the days still being reported), so its record is the record of what was
known, not of a correction of it.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date
from typing import TYPE_CHECKING

import numpy as np
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.indicators.capacity import Scenario, capacity_forecasts
from server.indicators.quantile_forecast import QuantileForecast
from server.services.capacity_indicators import as_path, forecast_scenarios
from server.services.hierarchy import membership, sum_up
from server.services.ruleset_cache import parsed
from server.store.models import Ruleset as RulesetRow
from server.store.reads import district_areas

if TYPE_CHECKING:
    from server.services.forecast_known import KnownData

#: Simulations per region and morning (the record needs quantiles, not a smooth fan).
RECORD_SIMS = 400
RECORD_HORIZON = 21
#: Days of admissions the growth rate is fitted on (capacity_forecasts' ``window``).
GROWTH_WINDOW = 14


@dataclass(frozen=True)
class CapacityForecaster:
    """Capacity forecasts under ``scenario`` for every district and area in ``parents``."""

    parents: Mapping[str, str]  # district code -> area code
    scenario: Scenario
    sims: int = RECORD_SIMS
    horizon: int = RECORD_HORIZON
    name: str = "capacity-growth"
    measures: tuple[str, ...] = ("hosp_admissions", "icu_occupied", "icu_staffed")

    def __call__(self, known: KnownData) -> list[QuantileForecast]:
        if "hosp_admissions" not in known.values:
            return []
        end = known.last_day("hosp_admissions")
        if end is None or end + 1 < GROWTH_WINDOW:  # too little history to fit a growth rate
            return []
        origin = known.dates[end].astype(date)
        index = {code: i for i, code in enumerate(known.regions)}
        districts = [c for c in known.regions if c in self.parents]
        rows = [index[c] for c in districts]
        adm = known.values["hosp_admissions"][rows, : end + 1]
        out = list(capacity_forecasts(adm, regions=districts, origin=origin,
                                      scenarios=[self.scenario], horizon=self.horizon,
                                      window=GROWTH_WINDOW, sims=self.sims).forecasts)
        areas = sorted({self.parents[c] for c in districts} & set(index))
        if areas:
            summed = sum_up(adm, membership(districts, self.parents, areas), areas).values
            at_origin = [index[a] for a in areas]
            occupied = staffed = None
            if "icu_occupied" in known.values and "icu_staffed" in known.values:
                occupied = known.values["icu_occupied"][at_origin, end]
                staffed = known.values["icu_staffed"][at_origin, end]
            out += capacity_forecasts(summed, regions=tuple(areas), origin=origin,
                                      scenarios=[self.scenario], occupied=occupied,
                                      staffed=staffed, horizon=self.horizon,
                                      window=GROWTH_WINDOW, sims=self.sims, seed=1).forecasts
        return [kept for f in out if (kept := _finite_rows(f)) is not None]


def _finite_rows(forecast: QuantileForecast) -> QuantileForecast | None:
    """``forecast`` without the regions it could not forecast (NaN rows: missing inputs)."""
    keep = np.flatnonzero(np.isfinite(forecast.values).all(axis=(1, 2)))
    if keep.size == 0:
        return None
    return QuantileForecast(
        target=forecast.target, scenario=forecast.scenario,
        regions=tuple(forecast.regions[i] for i in keep), origin=forecast.origin,
        horizons=forecast.horizons, levels=forecast.levels, values=forecast.values[keep],
    )


def district_parents(session: Session) -> dict[str, str]:
    """District code -> its parent area's code, for districts that have one."""
    return {r.code: r.area for r in district_areas(session=session) if r.area is not None}


def record_forecaster(session: Session) -> CapacityForecaster | None:
    """The capacity forecaster under the active ruleset's first scenario (None: no district
    has an area, so there is nothing to forecast capacity for)."""
    parents = district_parents(session)
    if not parents:
        return None
    row = session.scalar(select(RulesetRow).where(RulesetRow.status == "active")
                         .order_by(RulesetRow.id.desc()))
    scenarios: Sequence = forecast_scenarios(parsed(row) if row is not None else None)
    return CapacityForecaster(parents=parents, scenario=as_path(scenarios[0]))
