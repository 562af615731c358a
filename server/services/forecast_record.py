"""Use case: the honest record of the forecasts (stored each morning, scored when outcomes arrive).

Every morning, after the tiers are written, :func:`store_morning_forecasts` asks the forecaster
for its :class:`~server.indicators.quantile_forecast.QuantileForecast` objects, made from the data
as known at the run's cutoff (:func:`read_known`), and :func:`store_forecasts` keeps them with
that cutoff and each region's naive baseline (the mean of the target over the 7 days ending at
the origin, as known at the cutoff). A rerun at the same (target, scenario, cutoff) replaces the
stored forecast.

:func:`forecast_record` scores the stored forecasts whose target days have outcomes: coverage of
the 50 % and 90 % central intervals, mean weighted interval score and its ratio to the mean
absolute error of the naive baseline (server/indicators/forecast_scores.py), per target,
scenario, region and horizon, over the newest ``last`` scored forecasts. Outcomes are read *as
known now* (the newest vintage of each day: final values, revisions applied), not as known at
any morning.

:func:`forecast_record_as_known` computes the same record over the past without the store:
morning ``t`` sees what was received by the end of local day ``t + 1`` (the as-known replay of
``tierwise backtest``), the forecaster runs on that, and the forecasts are scored the same way.

The forecaster is a parameter everywhere: anything with ``name``, ``measures`` (the stored
measures it reads) and ``__call__(known) -> Sequence[QuantileForecast]``. The default is
:func:`default_forecaster` (the capacity forecaster; :class:`PoissonPersistence` where there are
no areas).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo
from typing import Protocol

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import delete, func, insert, select
from sqlalchemy.orm import Session

from server.indicators.forecast_scores import (
    ForecastRecord,
    ForecastScores,
    last_week_mean,
    poisson_persistence,
    score_forecasts,
)
from server.indicators.forecast_scores import forecast_record as summarise_scores
from server.indicators.quantile_forecast import DEFAULT_LEVELS, QuantileForecast
from server.services.capacity_forecaster import record_forecaster
from server.services.errors import ServiceError
from server.services.hierarchy import fill_parents, hierarchy
from server.store.errors import UnknownCodeError
from server.store.models import (
    ForecastQuantiles,
    ForecastRun,
    Measure,
    Observation,
    Region,
    Vintage,
)
from server.store.reads import read_dense, read_vintage_rows

__all__ = [
    "DEFAULT_FORECASTER",
    "HISTORY_DAYS",
    "TARGET_MEASURES",
    "Forecaster",
    "ForecastRecordError",
    "KnownData",
    "PoissonPersistence",
    "RecordCell",
    "RecordLine",
    "SETTLE_DAYS",
    "forecast_record",
    "forecast_record_as_known",
    "forecasts_stored",
    "read_known",
    "record_lines",
    "store_forecasts",
    "store_forecasts_as_known",
    "store_morning_forecasts",
    "target_values",
]

log = logging.getLogger(__name__)

#: Days of history a forecaster is given, ending at the newest day known at the cutoff.
HISTORY_DAYS = 56
#: Target days this close to the newest stored day of a target are not scored yet: their counts
#: are still being reported (common practice, no source; the nowcast, docs/estimate.md, shows how
#: much of a day arrives late).
SETTLE_DAYS = 7
#: Region forecasts scored in one pass (bounds the memory of the quantile arrays).
SCORE_CHUNK = 100_000
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


def _summed_up(values: dict[str, NDArray[np.float64]], regions: Sequence[str],
               parent_of: Mapping[str, str | None]) -> dict[str, NDArray[np.float64]]:
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


# -- reading what was known ---------------------------------------------------------------------

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
                     values=_summed_up(dict(dense.values), dense.regions,
                                       hierarchy(session=session).parent_of))


# -- storing ------------------------------------------------------------------------------------

def _baselines(forecast: QuantileForecast, known: KnownData) -> NDArray[np.float64]:
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
        base = _baselines(fc, known)
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
    known = read_known(session=session, cutoff=cutoff, measures=_present(session, fc.measures))
    if known is None:
        return 0
    return store_forecasts(session=session, forecasts=fc(known), cutoff=cutoff, known=known,
                           forecaster=fc.name)


def _present(session: Session, measures: Sequence[str]) -> list[str]:
    """The measures the catalogue holds, from ``measures`` (others are left out of ``known``)."""
    have = set(session.scalars(select(Measure.name).where(Measure.name.in_(measures))))
    return [m for m in measures if m in have]


def forecasts_stored(*, session: Session, cutoff: datetime) -> bool:
    """Whether any forecast was stored at ``cutoff``."""
    return session.scalar(
        select(ForecastRun.id).where(ForecastRun.data_cutoff == cutoff).limit(1)) is not None


# -- scoring ------------------------------------------------------------------------------------

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
    have = _present(session, TARGET_MEASURES[target])
    if len(have) < len(TARGET_MEASURES[target]):
        return {c: i for i, c in enumerate(regions)}, np.full((len(regions), 1), np.nan)
    measures = list(TARGET_MEASURES[target])
    summed = any(m in SUMMED_UP for m in measures)  # read the districts under areas too
    dense = read_dense(session=session, measures=measures, start=start, end=end,
                       regions=None if summed else list(regions))
    values = target_values(target, _summed_up(dict(dense.values), dense.regions,
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
        _Made(forecast=f, baseline=_baselines(f, known), cutoff=known.cutoff)
        for known, forecasts in _as_known_mornings(
            session=session, forecaster=forecaster or default_forecaster(session),
            time_zone=time_zone, start=start, end=end, step=step)
        for f in forecasts
    ]
    return _score(session, made, last=last, pooled=True, settle_days=settle_days)


def store_forecasts_as_known(
    *, session: Session, forecaster: Forecaster | None = None, time_zone: tzinfo = UTC,
    start: date | None = None, end: date | None = None, step: int = 1,
) -> int:
    """Store the forecasts past mornings would have made, each from the data known that morning.

    The same replay as :func:`forecast_record_as_known` (morning ``t``'s cutoff is
    :func:`server.services.backtest.as_known_cutoff` of ``t``), kept with
    :func:`store_forecasts` as if the morning step had run on each of those mornings; the demo
    seeds its record so (``demo_seed/seed.py``). Returns the region rows written. Does not
    commit.
    """
    fc = forecaster or default_forecaster(session)
    written = 0
    for known, forecasts in _as_known_mornings(session=session, forecaster=fc,
                                               time_zone=time_zone, start=start, end=end,
                                               step=step):
        written += store_forecasts(session=session, forecasts=forecasts, cutoff=known.cutoff,
                                   known=known, forecaster=fc.name)
    return written


def _as_known_mornings(
    *, session: Session, forecaster: Forecaster, time_zone: tzinfo, start: date | None,
    end: date | None, step: int,
) -> Iterator[tuple[KnownData, list[QuantileForecast]]]:
    """Each replayed morning's data as known (cutoff included) and the forecasts made from it."""
    from server.services.backtest import as_known_cutoff, data_span

    fc = forecaster
    measures = _present(session, fc.measures)
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
                          values=_summed_up({m: dense[k, :, lo: newest + 1].copy()
                                             for k, m in enumerate(measures)}, codes, tree))
        yield known, list(fc(known))


# -- sentences for pages ------------------------------------------------------------------------

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
