"""Use case: storing the forecasts, each morning after the tiers or as known on past mornings.

Every morning, after the tiers are written, :func:`store_morning_forecasts` asks the forecaster
for its :class:`~server.indicators.quantile_forecast.QuantileForecast` objects, made from the data
as known at the run's cutoff (:func:`~server.services.forecast_known.read_known`), and
:func:`store_forecasts` keeps them with that cutoff and each region's naive baseline
(:func:`baselines`: the mean of the target over the 7 days ending at the origin, as known at the
cutoff). A rerun at the same (target, scenario, cutoff) replaces the stored forecast.
:func:`store_forecasts_as_known` stores what past mornings would have made, each from the data
known that morning (the demo seeds its record so). Scoring the stored forecasts is
:mod:`server.services.forecast_record`.
"""

from __future__ import annotations

from collections.abc import Iterable
from datetime import UTC, date, datetime, tzinfo

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import delete, insert, select
from sqlalchemy.orm import Session

from server.indicators.forecast_scores import last_week_mean
from server.indicators.quantile_forecast import QuantileForecast
from server.services.forecast_known import (
    TARGET_MEASURES,
    Forecaster,
    ForecastRecordError,
    KnownData,
    as_known_mornings,
    present_measures,
    read_known,
)
from server.services.forecasters import default_forecaster
from server.store.errors import UnknownCodeError
from server.store.models import ForecastQuantiles, ForecastRun, Region

__all__ = [
    "baselines",
    "forecasts_stored",
    "store_forecasts",
    "store_forecasts_as_known",
    "store_morning_forecasts",
]


def baselines(forecast: QuantileForecast, known: KnownData) -> NDArray[np.float64]:
    """Each forecast region's mean of the target over the 7 days ending at the origin (NaN where
    ``known`` lacks the target's measures or the region)."""
    if any(m not in known.values for m in TARGET_MEASURES.get(forecast.target, ("?",))):
        return np.full(len(forecast.regions), np.nan)
    series = known.target(forecast.target)
    origin = np.datetime64(forecast.origin, "D")
    end = int((origin - known.dates[0]).astype(np.int64))
    rows = {code: i for i, code in enumerate(known.regions)}
    if end < 0 or end >= known.dates.size:
        return np.full(len(forecast.regions), np.nan)
    pick = np.array([rows.get(code, -1) for code in forecast.regions], dtype=np.int64)
    means = last_week_mean(series[:, : end + 1])
    return np.where(pick >= 0, means[np.maximum(pick, 0)], np.nan)


def store_forecasts(
    *, session: Session, forecasts: Iterable[QuantileForecast], cutoff: datetime,
    known: KnownData, forecaster: str = "",
) -> int:
    """Store ``forecasts`` made at ``cutoff`` from ``known``; returns the region rows written.

    One :class:`ForecastRun` per forecast and one :class:`ForecastQuantiles` row per region; a
    forecast already stored for the same (target, scenario, cutoff) is replaced, never
    duplicated. Does not commit.
    """
    region_ids = dict(session.execute(select(Region.code, Region.id)).all())
    written = 0
    now = datetime.now(UTC)
    for fc in _merged(forecasts):
        missing = [c for c in fc.regions if c not in region_ids]
        if missing:
            raise UnknownCodeError("region", missing)
        if fc.target not in TARGET_MEASURES:
            raise ForecastRecordError(
                f"target: {fc.target!r} is not one of {', '.join(sorted(TARGET_MEASURES))}")
        values = np.ascontiguousarray(fc.values, dtype="<f8")
        if not np.all(np.isfinite(values)):
            raise ForecastRecordError(
                f"{fc.target}/{fc.scenario}: quantiles must be finite (region "
                f"{fc.regions[int(np.argwhere(~np.isfinite(values))[0][0])]!r})")
        crossed = np.diff(values, axis=2) < 0
        if crossed.any():
            r, h, _ = np.argwhere(crossed)[0]
            raise ForecastRecordError(
                f"{fc.target}/{fc.scenario}: quantiles decrease with the level (region "
                f"{fc.regions[int(r)]!r}, horizon {int(fc.horizons[int(h)])})")
        base = baselines(fc, known)
        with session.begin_nested():
            old = select(ForecastRun.id).where(
                ForecastRun.target == fc.target, ForecastRun.scenario == fc.scenario,
                ForecastRun.data_cutoff == cutoff).scalar_subquery()
            session.execute(delete(ForecastQuantiles).where(ForecastQuantiles.run_id == old))
            session.execute(delete(ForecastRun).where(
                ForecastRun.target == fc.target, ForecastRun.scenario == fc.scenario,
                ForecastRun.data_cutoff == cutoff))
            run = ForecastRun(
                target=fc.target, scenario=fc.scenario, data_cutoff=cutoff, origin=fc.origin,
                forecaster=forecaster, horizons=[int(h) for h in fc.horizons],
                levels=[float(x) for x in fc.levels], created_at=now,
            )
            session.add(run)
            session.flush()
            rows = [
                {"run_id": run.id, "region_id": region_ids[code],
                 "baseline": float(b) if np.isfinite(b) else None,
                 "quantiles": values[i].tobytes()}
                for i, (code, b) in enumerate(zip(fc.regions, base, strict=True))
            ]
            if rows:
                session.execute(insert(ForecastQuantiles), rows)
        written += len(rows)
    return written


def _merged(forecasts: Iterable[QuantileForecast]) -> list[QuantileForecast]:
    """One forecast per (target, scenario): a forecaster may return several (the capacity
    forecaster's districts and areas), and a run is stored per (target, scenario, cutoff)."""
    groups: dict[tuple[str, str], list[QuantileForecast]] = {}
    for fc in forecasts:
        groups.setdefault((fc.target, fc.scenario), []).append(fc)
    out = []
    for (target, scenario), items in groups.items():
        head = items[0]
        for other in items[1:]:
            if (other.origin != head.origin or not np.array_equal(other.horizons, head.horizons)
                    or not np.array_equal(other.levels, head.levels)):
                raise ForecastRecordError(
                    f"{target}/{scenario}: forecasts of one morning differ in origin, horizons "
                    "or levels")
        regions = tuple(c for f in items for c in f.regions)
        if len(set(regions)) < len(regions):
            raise ForecastRecordError(f"{target}/{scenario}: a region is forecast twice")
        out.append(head if len(items) == 1 else QuantileForecast(
            target=target, scenario=scenario, regions=regions, origin=head.origin,
            horizons=head.horizons, levels=head.levels,
            values=np.concatenate([f.values for f in items])))
    return out


def store_morning_forecasts(
    *, session: Session, cutoff: datetime, forecaster: Forecaster | None = None,
) -> int:
    """The morning step: forecasts from the data known at ``cutoff``, stored with it.

    Runs after the tiers are written (:func:`server.services.evaluation.evaluate_if_behind`).
    Returns the region rows written (0 when nothing is known yet).
    """
    fc = forecaster or default_forecaster(session)
    known = read_known(session=session, cutoff=cutoff,
                       measures=present_measures(session, fc.measures))
    if known is None:
        return 0
    return store_forecasts(session=session, forecasts=fc(known), cutoff=cutoff, known=known,
                           forecaster=fc.name)


def forecasts_stored(*, session: Session, cutoff: datetime) -> bool:
    """Whether any forecast was stored at ``cutoff``."""
    return session.scalar(
        select(ForecastRun.id).where(ForecastRun.data_cutoff == cutoff).limit(1)) is not None


def store_forecasts_as_known(
    *, session: Session, forecaster: Forecaster | None = None, time_zone: tzinfo = UTC,
    start: date | None = None, end: date | None = None, step: int = 1,
) -> int:
    """Store the forecasts past mornings would have made, each from the data known that morning.

    The same replay as
    :func:`server.services.forecast_record.forecast_record_as_known` (morning ``t``'s cutoff is
    :func:`server.services.backtest.as_known_cutoff` of ``t``), kept with
    :func:`store_forecasts` as if the morning step had run on each of those mornings; the demo
    seeds its record so (``demo_seed/seed.py``). Returns the region rows written. Does not
    commit.
    """
    fc = forecaster or default_forecaster(session)
    written = 0
    for known, forecasts in as_known_mornings(session=session, forecaster=fc,
                                               time_zone=time_zone, start=start, end=end,
                                               step=step):
        written += store_forecasts(session=session, forecasts=forecasts, cutoff=known.cutoff,
                                   known=known, forecaster=fc.name)
    return written
