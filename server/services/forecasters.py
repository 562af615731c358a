"""The forecasters tierwise has, and the one the morning step and the record use by default.

Any :class:`~server.services.forecast_known.Forecaster` will do (a callable with ``name``,
``measures`` and ``__call__(known) -> Sequence[QuantileForecast]``). The default is
:func:`default_forecaster`: the capacity forecaster
(:mod:`server.services.capacity_forecaster`), else :data:`DEFAULT_FORECASTER`
(:class:`PoissonPersistence`) where there are no areas.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

import numpy as np
from sqlalchemy.orm import Session

from server.indicators.forecast_scores import poisson_persistence
from server.indicators.quantile_forecast import DEFAULT_LEVELS, QuantileForecast
from server.services.capacity_forecaster import record_forecaster
from server.services.forecast_known import TARGET_MEASURES, Forecaster, KnownData

__all__ = ["DEFAULT_FORECASTER", "PoissonPersistence", "default_forecaster"]


@dataclass(frozen=True)
class PoissonPersistence:
    """Poisson quantiles around the last week's mean, per region, the same for every horizon
    (:func:`server.indicators.forecast_scores.poisson_persistence`): the baseline made
    probabilistic, for count targets only. Regions without 4 known days in the last week of a
    target are left out of its forecast."""

    targets: tuple[str, ...] = ("hosp_admissions", "icu_occupied")
    horizons: tuple[int, ...] = tuple(range(1, 22))
    levels: tuple[float, ...] = DEFAULT_LEVELS
    scenario: str = "persistence"
    name: str = "poisson-persistence"

    @property
    def measures(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(m for t in self.targets for m in TARGET_MEASURES[t]))

    def __call__(self, known: KnownData) -> list[QuantileForecast]:
        out = []
        for target in self.targets:
            end = known.last_day(target)
            if end is None:
                continue
            history = known.target(target)[:, : end + 1]
            values = poisson_persistence(history, horizons=self.horizons, levels=self.levels)
            keep = np.flatnonzero(np.isfinite(values[:, 0, 0]))
            if keep.size == 0:
                continue
            out.append(QuantileForecast(
                target=target, scenario=self.scenario,
                regions=tuple(known.regions[i] for i in keep),
                origin=known.dates[end].astype(date), horizons=np.asarray(self.horizons),
                levels=np.asarray(self.levels), values=values[keep],
            ))
        return out


#: The forecaster where the capacity forecaster has nothing to forecast (no district has an area).
DEFAULT_FORECASTER: Forecaster = PoissonPersistence()


def default_forecaster(session: Session) -> Forecaster:
    """The forecaster of the morning's stored forecasts and of ``tierwise backtest``: the
    capacity forecaster under the active ruleset's first scenario
    (:mod:`server.services.capacity_forecaster`), else :data:`DEFAULT_FORECASTER`."""
    return record_forecaster(session) or DEFAULT_FORECASTER
