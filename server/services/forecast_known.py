"""What a forecaster sees: stored measures as known at a cutoff, and the contract it fulfils.

A forecaster is anything with ``name``, ``measures`` (the stored measures it reads) and
``__call__(known: KnownData) -> Sequence[QuantileForecast]`` (:class:`Forecaster`; the ones
tierwise has are in :mod:`server.services.forecasters`). Each morning it sees the last
:data:`HISTORY_DAYS` days of its measures as known at the run's cutoff (:func:`read_known`);
replaying the past, morning ``t`` sees what was received by the end of local day ``t + 1``
(:func:`as_known_mornings`, the as-known replay of ``tierwise backtest``). A target
(:data:`TARGET_MEASURES`) is a series made of stored measures (:func:`target_values`); the
targets of :data:`SUMMED_UP` are their districts' sums at the areas and the county.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo
from typing import Protocol

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.indicators.quantile_forecast import QuantileForecast
from server.services.errors import ServiceError
from server.services.hierarchy import fill_parents, hierarchy
from server.store.models import Measure, Observation, Region, Vintage
from server.store.reads import read_dense, read_vintage_rows

__all__ = [
    "HISTORY_DAYS",
    "SUMMED_UP",
    "TARGET_MEASURES",
    "ForecastRecordError",
    "Forecaster",
    "KnownData",
    "as_known_mornings",
    "present_measures",
    "read_known",
    "summed_up",
    "target_values",
]

#: Days of history a forecaster is given, ending at the newest day known at the cutoff.
HISTORY_DAYS = 56
#: The stored measures each target is made of; ``icu_share`` is occupied / staffed beds in
#: percent, as the capacity forecasts give it (server/indicators/capacity.py).
TARGET_MEASURES: dict[str, tuple[str, ...]] = {
    "hosp_admissions": ("hosp_admissions",),
    "icu_occupied": ("icu_occupied",),
    "icu_share": ("icu_occupied", "icu_staffed"),
}
#: Measures reported per district whose area (and county) figures are their districts' sums
#: (:func:`server.services.hierarchy.fill_parents`), so that area forecasts have a baseline
#: and an outcome to be scored against.
SUMMED_UP = ("hosp_admissions",)


def summed_up(values: dict[str, NDArray[np.float64]], regions: Sequence[str],
              parent_of: Mapping[str, str | None]) -> dict[str, NDArray[np.float64]]:
    """``values`` with the :data:`SUMMED_UP` measures filled in at the parents."""
    return {m: fill_parents(v, regions, parent_of) if m in SUMMED_UP else v
            for m, v in values.items()}


class ForecastRecordError(ServiceError, ValueError):
    """A forecast that cannot be stored or scored; names what is wrong."""


def target_values(target: str, values: Mapping[str, NDArray[np.float64]]) -> NDArray[np.float64]:
    """The (regions, days) series of ``target`` from its measures (:data:`TARGET_MEASURES`)."""
    if target not in TARGET_MEASURES:
        raise ForecastRecordError(
            f"target: {target!r} is not one of {', '.join(sorted(TARGET_MEASURES))}")
    if target == "icu_share":
        with np.errstate(invalid="ignore", divide="ignore"):
            staffed = values["icu_staffed"]
            return np.where(staffed > 0, 100.0 * values["icu_occupied"] / staffed, np.nan)
    return values[TARGET_MEASURES[target][0]]


@dataclass(frozen=True, kw_only=True)
class KnownData:
    """What a forecaster sees: stored measures as known at ``cutoff``, (regions, days) each.

    ``dates`` ends at the newest day any of the measures has a value for at the cutoff; regions
    are every region in code order (NaN rows for regions that do not report a measure).
    """

    cutoff: datetime
    regions: tuple[str, ...]
    dates: NDArray[np.datetime64]
    values: dict[str, NDArray[np.float64]]

    def target(self, name: str) -> NDArray[np.float64]:
        return target_values(name, self.values)

    def last_day(self, name: str) -> int | None:
        """Index of the newest day with a value of ``name`` in any region (None: none)."""
        seen = np.flatnonzero(np.isfinite(self.target(name)).any(axis=0))
        return int(seen[-1]) if seen.size else None


class Forecaster(Protocol):
    """Makes forecasts from data as known at a cutoff (see the module docstring)."""

    @property
    def name(self) -> str: ...

    @property
    def measures(self) -> tuple[str, ...]: ...

    def __call__(self, known: KnownData) -> Sequence[QuantileForecast]: ...


def read_known(
    *, session: Session, cutoff: datetime, measures: Sequence[str], days: int = HISTORY_DAYS
) -> KnownData | None:
    """The last ``days`` days of ``measures`` as known at ``cutoff`` (None: nothing known)."""
    newest = session.scalar(
        select(func.max(Observation.ref_date))
        .join(Vintage, Vintage.id == Observation.vintage_id)
        .join(Measure, Measure.id == Observation.measure_id)
        .where(Measure.name.in_(measures), Vintage.received_at <= cutoff)
    )
    if newest is None:
        return None
    dense = read_dense(session=session, measures=list(measures),
                       start=newest - timedelta(days=days - 1), end=newest, as_of=cutoff)
    return KnownData(cutoff=cutoff, regions=dense.regions, dates=dense.dates,
                     values=summed_up(dict(dense.values), dense.regions,
                                      hierarchy(session=session).parent_of))


def present_measures(session: Session, measures: Sequence[str]) -> list[str]:
    """The measures the catalogue holds, from ``measures`` (others are left out of ``known``)."""
    have = set(session.scalars(select(Measure.name).where(Measure.name.in_(measures))))
    return [m for m in measures if m in have]


def as_known_mornings(
    *, session: Session, forecaster: Forecaster, time_zone: tzinfo, start: date | None,
    end: date | None, step: int,
) -> Iterator[tuple[KnownData, list[QuantileForecast]]]:
    """Each replayed morning's data as known (cutoff included) and the forecasts made from it.

    Morning ``t`` (every ``step`` days from ``start``, default the 8th stored day, to ``end``,
    default the last) sees the rows received by the end of local day ``t + 1``
    (:func:`server.services.backtest.as_known_cutoff`), :data:`HISTORY_DAYS` days of them.
    """
    from server.services.backtest import as_known_cutoff, data_span

    fc = forecaster
    measures = present_measures(session, fc.measures)
    first, last_day = data_span(session=session)
    start = start or first + timedelta(days=7)
    end = end or last_day
    if step < 1:
        raise ForecastRecordError(f"step: expected at least 1 day, got {step}")
    if end < start:
        raise ForecastRecordError(f"end {end} is before start {start}")
    codes = tuple(session.scalars(select(Region.code).order_by(Region.code)))
    tree = hierarchy(session=session).parent_of
    n_days = (last_day - first).days + 1
    rows = read_vintage_rows(session=session, measures=measures, regions=codes, start=first,
                             end=last_day)
    # the local day each vintage was received, less one: the morning that first knows it
    stamps, which = np.unique(rows.received_at, return_inverse=True)
    local = np.array([(s.replace(tzinfo=UTC).astimezone(time_zone).date() - first).days - 1
                      for s in stamps.astype("datetime64[us]").astype(object)], dtype=np.int64)
    m_a, r_a, c_a, v_a = rows.measure, rows.region, rows.ref_day, rows.value
    k_a = local[which] if local.size else np.zeros(0, dtype=np.int64)
    dense = np.full((len(measures), len(codes), n_days), np.nan)
    applied = 0
    dates = np.arange(np.datetime64(first, "D"), np.datetime64(last_day, "D") + 1)
    for t in range((start - first).days, (end - first).days + 1):
        # rows come in order of receipt, so their as-known days never decrease
        stop = int(np.searchsorted(k_a, t, side="right"))
        new = np.arange(applied, stop)
        dense[m_a[new], r_a[new], c_a[new]] = v_a[new]
        applied = stop
        if (t - (start - first).days) % step:
            continue
        seen = np.flatnonzero(np.isfinite(dense[:, :, : t + 1]).any(axis=(0, 1)))
        if seen.size == 0:
            continue
        newest = int(seen[-1])
        lo = max(newest - HISTORY_DAYS + 1, 0)
        cutoff = as_known_cutoff(first + timedelta(days=t), time_zone)
        known = KnownData(cutoff=cutoff, regions=codes, dates=dates[lo: newest + 1],
                          values=summed_up({m: dense[k, :, lo: newest + 1].copy()
                                            for k, m in enumerate(measures)}, codes, tree))
        yield known, list(fc(known))
