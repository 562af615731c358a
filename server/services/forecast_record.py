"""Use case: the honest record of the stored forecasts, scored when outcomes arrive.

:func:`forecast_record` scores the stored forecasts (:mod:`server.services.forecast_store`)
whose target days have outcomes: coverage of the 50 % and 90 % central intervals, mean weighted
interval score and its ratio to the mean absolute error of the naive baseline
(server/indicators/forecast_scores.py), per target, scenario, region and horizon, over the
newest ``last`` scored forecasts. Outcomes are read *as known now* (the newest vintage of each
day: final values, revisions applied), not as known at any morning.

:func:`forecast_record_as_known` computes the same record over the past without the store:
morning ``t`` sees what was received by the end of local day ``t + 1``
(:func:`~server.services.forecast_known.as_known_mornings`), the forecaster runs on that, and the
forecasts are scored the same way. :func:`record_lines` are the page sentences of one region.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.indicators.forecast_scores import ForecastRecord, ForecastScores, score_forecasts
from server.indicators.forecast_scores import forecast_record as summarise_scores
from server.indicators.quantile_forecast import QuantileForecast
from server.services.forecast_known import (
    SUMMED_UP,
    TARGET_MEASURES,
    Forecaster,
    ForecastRecordError,
    as_known_mornings,
    present_measures,
    summed_up,
    target_values,
)
from server.services.forecast_store import baselines
from server.services.forecasters import default_forecaster
from server.services.hierarchy import hierarchy
from server.store.models import ForecastQuantiles, ForecastRun, Measure, Observation, Region
from server.store.reads import read_dense

__all__ = [
    "SCORE_CHUNK",
    "SETTLE_DAYS",
    "RecordCell",
    "RecordLine",
    "forecast_record",
    "forecast_record_as_known",
    "record_lines",
]

#: Target days this close to the newest stored day of a target are not scored yet: their counts
#: are still being reported (common practice, no source; the nowcast, docs/estimate.md, shows how
#: much of a day arrives late).
SETTLE_DAYS = 7
#: Region forecasts scored in one pass (bounds the memory of the quantile arrays).
SCORE_CHUNK = 100_000


@dataclass(frozen=True, kw_only=True)
class RecordCell:
    """How one target's forecasts for one region (None: all regions pooled) and horizon did."""

    target: str
    scenario: str
    region: str | None
    horizon: int
    forecasts: int
    inside_50: int
    inside_90: int
    coverage_50: float
    coverage_90: float
    mean_wis: float
    naive_error: float
    relative_wis: float

    @property
    def line(self) -> str:
        """'of the last 60 14-day forecasts, 52 fell inside the 90 % band; 0.8 of the naive
        error' (English, for the command line; pages use :func:`record_lines` and the catalog)."""
        if self.forecasts == 0:
            return f"no {self.horizon}-day forecast has an outcome yet"
        noun = "forecast" if self.forecasts == 1 else "forecasts"
        ratio = "n/a" if not np.isfinite(self.relative_wis) else f"{self.relative_wis:.2g}"
        return (f"of the last {self.forecasts} {self.horizon}-day {noun}, {self.inside_90} fell "
                f"inside the 90 % band; {ratio} of the naive error")


@dataclass(frozen=True, kw_only=True)
class _Made:
    """One forecast with its regions' baselines and the time it was made."""

    forecast: QuantileForecast
    baseline: NDArray[np.float64]
    cutoff: datetime


def _outcomes(
    session: Session, target: str, regions: Sequence[str], start: date, end: date,
    settle_days: int,
) -> tuple[dict[str, int], NDArray[np.float64]]:
    """The target's values as known now, (regions, days) from ``start``; NaN on the last
    ``settle_days`` days of the target's stored data (not final yet)."""
    have = present_measures(session, TARGET_MEASURES[target])
    if len(have) < len(TARGET_MEASURES[target]):
        return {c: i for i, c in enumerate(regions)}, np.full((len(regions), 1), np.nan)
    measures = list(TARGET_MEASURES[target])
    summed = any(m in SUMMED_UP for m in measures)  # read the districts under areas too
    dense = read_dense(session=session, measures=measures, start=start, end=end,
                       regions=None if summed else list(regions))
    values = target_values(target, summed_up(dict(dense.values), dense.regions,
                                             hierarchy(session=session).parent_of)
                           if summed else dense.values)
    newest = session.scalar(
        select(func.max(Observation.ref_date)).join(Measure, Measure.id == Observation.measure_id)
        .where(Measure.name.in_(measures)))
    if newest is not None and settle_days > 0:
        unsettled = dense.dates > np.datetime64(newest - timedelta(days=settle_days), "D")
        values = np.where(unsettled[None, :], np.nan, values)
    return {c: i for i, c in enumerate(dense.regions)}, values


def _score(
    session: Session, made: Sequence[_Made], *, last: int | None, pooled: bool,
    settle_days: int,
) -> list[RecordCell]:
    groups: dict[tuple[str, str, tuple[int, ...], tuple[float, ...]], list[_Made]] = {}
    for m in made:
        f = m.forecast
        key = (f.target, f.scenario, tuple(int(h) for h in f.horizons),
               tuple(float(x) for x in f.levels))
        groups.setdefault(key, []).append(m)
    cells: list[RecordCell] = []
    for (target, scenario, horizons, levels), items in groups.items():
        h = np.asarray(horizons, dtype=np.int64)
        regions = sorted({c for m in items for c in m.forecast.regions})
        row_of = {c: i for i, c in enumerate(regions)}
        first = min(m.forecast.origin for m in items) + timedelta(days=int(h.min()))
        last_day = max(m.forecast.origin for m in items) + timedelta(days=int(h.max()))
        out_rows, outcome = _outcomes(session, target, regions, first, last_day, settle_days)
        region_idx = np.concatenate(
            [[row_of[c] for c in m.forecast.regions] for m in items]).astype(np.int64)
        order = np.concatenate([
            np.full(len(m.forecast.regions), m.cutoff.timestamp()) for m in items])
        parts = []
        for chunk in _chunks(items):
            baseline = np.concatenate([m.baseline for m in chunk])
            out_idx = np.concatenate([[out_rows[c] for c in m.forecast.regions] for m in chunk]
                                     ).astype(np.int64)
            day0 = np.concatenate([np.full(len(m.forecast.regions), (m.forecast.origin - first)
                                           .days) for m in chunk])
            cols = day0[:, None] + h[None, :]
            inside = (cols >= 0) & (cols < outcome.shape[1])
            observed = np.where(
                inside, outcome[out_idx[:, None], np.clip(cols, 0, outcome.shape[1] - 1)], np.nan)
            values = np.concatenate([m.forecast.values for m in chunk])
            parts.append(score_forecasts(values, levels, observed, baseline))
        scores = ForecastScores(
            scored=np.concatenate([p.scored for p in parts]),
            wis=np.concatenate([p.wis for p in parts]),
            naive_error=np.concatenate([p.naive_error for p in parts]),
            inside_50=np.concatenate([p.inside_50 for p in parts]),
            inside_90=np.concatenate([p.inside_90 for p in parts]),
            has_50=parts[0].has_50, has_90=parts[0].has_90,
        )
        rec = summarise_scores(scores, groups=region_idx, n_groups=len(regions), order=order,
                               horizons=h, last=last)
        cells.extend(_cells(rec, target, scenario, regions))
        if pooled:
            cells.extend(_cells(_pool(rec, h), target, scenario, [None]))
    return cells


def _chunks(items: Sequence[_Made]) -> Iterable[Sequence[_Made]]:
    """Consecutive runs of ``items`` holding about :data:`SCORE_CHUNK` region forecasts each."""
    size = SCORE_CHUNK
    start, n = 0, 0
    for k, m in enumerate(items):
        n += len(m.forecast.regions)
        if n >= size:
            yield items[start: k + 1]
            start, n = k + 1, 0
    if start < len(items):
        yield items[start:]


def _pool(rec: ForecastRecord, h: NDArray[np.int64]) -> ForecastRecord:
    """All regions of ``rec`` together (each region's newest ``last`` forecasts per horizon)."""
    count = rec.forecasts.sum(axis=0, keepdims=True)
    in50 = rec.inside_50.sum(axis=0, keepdims=True)
    in90 = rec.inside_90.sum(axis=0, keepdims=True)
    wis = np.nansum(rec.mean_wis * rec.forecasts, axis=0, keepdims=True)
    naive = np.nansum(rec.naive_error * rec.forecasts, axis=0, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_wis = np.where(count > 0, wis / count, np.nan)
        mean_naive = np.where(count > 0, naive / count, np.nan)
        return ForecastRecord(
            horizons=h, forecasts=count, inside_50=in50, inside_90=in90,
            coverage_50=np.where(count > 0, in50 / count, np.nan)
            if np.isfinite(rec.coverage_50).any() else np.full(count.shape, np.nan),
            coverage_90=np.where(count > 0, in90 / count, np.nan)
            if np.isfinite(rec.coverage_90).any() else np.full(count.shape, np.nan),
            mean_wis=mean_wis, naive_error=mean_naive,
            relative_wis=np.where(mean_naive > 0, mean_wis / mean_naive, np.nan),
        )


def _cells(
    rec: ForecastRecord, target: str, scenario: str, regions: Sequence[str | None]
) -> list[RecordCell]:
    return [
        RecordCell(
            target=target, scenario=scenario, region=code, horizon=int(rec.horizons[j]),
            forecasts=int(rec.forecasts[i, j]), inside_50=int(rec.inside_50[i, j]),
            inside_90=int(rec.inside_90[i, j]), coverage_50=float(rec.coverage_50[i, j]),
            coverage_90=float(rec.coverage_90[i, j]), mean_wis=float(rec.mean_wis[i, j]),
            naive_error=float(rec.naive_error[i, j]),
            relative_wis=float(rec.relative_wis[i, j]),
        )
        for i, code in enumerate(regions) for j in range(rec.horizons.size)
    ]


def _stored(
    session: Session, *, target: str | None, scenario: str | None,
    regions: Sequence[str] | None, since: date | None,
) -> list[_Made]:
    """The stored forecasts (optionally of some regions, with origins from ``since``)."""
    runs_q = select(ForecastRun)
    if target is not None:
        runs_q = runs_q.where(ForecastRun.target == target)
    if scenario is not None:
        runs_q = runs_q.where(ForecastRun.scenario == scenario)
    if since is not None:
        runs_q = runs_q.where(ForecastRun.origin >= since)
    runs = {r.id: r for r in session.scalars(runs_q)}
    if not runs:
        return []
    rows_q = (
        select(ForecastQuantiles.run_id, Region.code, ForecastQuantiles.baseline,
               ForecastQuantiles.quantiles)
        .join(Region, Region.id == ForecastQuantiles.region_id)
        .where(ForecastQuantiles.run_id.in_(list(runs)))
        .order_by(ForecastQuantiles.run_id, Region.code)
    )
    if regions is not None:
        rows_q = rows_q.where(Region.code.in_(list(regions)))
    by_run: dict[int, list[tuple[str, float | None, bytes]]] = {}
    for run_id, code, base, blob in session.execute(rows_q):
        by_run.setdefault(run_id, []).append((code, base, blob))
    made = []
    for run_id, rows in by_run.items():
        run = runs[run_id]
        shape = (len(rows), len(run.horizons), len(run.levels))
        blob = b"".join(r[2] for r in rows)
        if len(blob) != 8 * shape[0] * shape[1] * shape[2]:
            raise ForecastRecordError(
                f"forecast_quantiles: run {run_id} ({run.target}/{run.scenario} at "
                f"{run.data_cutoff.isoformat()}) holds quantiles of the wrong size")
        values = np.frombuffer(blob, dtype="<f8").reshape(shape).astype(np.float64)
        made.append(_Made(
            forecast=QuantileForecast(
                target=run.target, scenario=run.scenario, regions=tuple(r[0] for r in rows),
                origin=run.origin, horizons=np.asarray(run.horizons, dtype=np.int64),
                levels=np.asarray(run.levels, dtype=np.float64), values=values),
            baseline=np.array([np.nan if r[1] is None else r[1] for r in rows]),
            cutoff=run.data_cutoff,
        ))
    return made


def forecast_record(
    *, session: Session, target: str | None = None, scenario: str | None = None,
    regions: Sequence[str] | None = None, last: int | None = 60, pooled: bool = False,
    since: date | None = None, settle_days: int = SETTLE_DAYS,
) -> list[RecordCell]:
    """The record of the stored forecasts, per target, scenario, region and horizon.

    Only forecasts whose target day has an outcome (as known now, and at least ``settle_days``
    before the newest stored day of the target) count; of those, each cell's
    newest ``last`` (all with None). ``pooled`` adds a row per target, scenario and horizon with
    every region's newest ``last`` together (``region`` None). Without ``since``, only runs
    whose origin is within ``last + 28 + settle_days`` days of the newest stored origin are
    read (enough for daily forecasts up to 21 days ahead).
    """
    if since is None and last is not None:
        newest = session.scalar(select(func.max(ForecastRun.origin)))
        if newest is None:
            return []
        since = newest - timedelta(days=last + 28 + settle_days)
    return _score(session, _stored(session, target=target, scenario=scenario, regions=regions,
                                   since=since), last=last, pooled=pooled,
                  settle_days=settle_days)


# -- the record over the past, as known each morning ---------------------------------------------

def forecast_record_as_known(
    *, session: Session, forecaster: Forecaster | None = None, time_zone: tzinfo = UTC,
    start: date | None = None, end: date | None = None, last: int | None = None,
    step: int = 1, settle_days: int = SETTLE_DAYS,
) -> list[RecordCell]:
    """The record of ``forecaster`` over the past, each morning on the data known that morning.

    Morning ``t`` (every ``step`` days from ``start``, default the 8th stored day, to ``end``,
    default the last) sees the rows received by the end of local day ``t + 1``
    (:func:`server.services.backtest.as_known_cutoff`), :data:`HISTORY_DAYS` days of them.
    Nothing is stored; outcomes as in :func:`forecast_record`. Returns per-region cells and the
    pooled cells (``region`` None).
    """
    made = [
        _Made(forecast=f, baseline=baselines(f, known), cutoff=known.cutoff)
        for known, forecasts in as_known_mornings(
            session=session, forecaster=forecaster or default_forecaster(session),
            time_zone=time_zone, start=start, end=end, step=step)
        for f in forecasts
    ]
    return _score(session, made, last=last, pooled=True, settle_days=settle_days)


@dataclass(frozen=True, kw_only=True)
class RecordLine:
    """The data of one page sentence: 'of the last {forecasts} {horizon}-day forecasts,
    {inside_90} fell inside the 90 % band; {relative_wis} of the naive error'. The words come
    from the catalog (``web/templates/staff/_forecast_record.html``)."""

    target: str
    scenario: str
    horizon: int
    forecasts: int
    inside_90: int
    relative_wis: float | None


def record_lines(
    *, session: Session, region: str, horizons: Sequence[int] = (7, 14),
    scenario: str | None = None, last: int = 60, settle_days: int = SETTLE_DAYS,
) -> list[RecordLine]:
    """The record sentences of one district or area: per target and chosen horizon, the newest
    ``last`` scored forecasts (targets with none scored yet are left out)."""
    cells = forecast_record(session=session, scenario=scenario, regions=[region], last=last,
                            settle_days=settle_days)
    return [
        RecordLine(target=c.target, scenario=c.scenario, horizon=c.horizon,
                   forecasts=c.forecasts, inside_90=c.inside_90,
                   relative_wis=round(c.relative_wis, 2) if np.isfinite(c.relative_wis)
                   else None)
        for c in cells if c.horizon in horizons and c.forecasts > 0
    ]
