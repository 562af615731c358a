"""The as-known replay of past data: each day's indicators as known on the morning after it.

Day ``t`` is judged on everything received up to the end of local day ``t + 1``
(:func:`server.services.backtest.as_known_cutoff`). The replay is vectorised: the observations
are read once (:func:`arrival_rows`); one pass over the days applies each day's new vintages to
dense arrays and cuts a trailing window of :data:`WINDOW_DAYS` days as known that day; the
windows of a block of days are stacked along the region axis so that each indicator is computed
once per block for all (day, district) pairs; the last column of every window is that day's
as-known value. Wastewater trends count a sample only on the day it first becomes known.

Nowcasts: every count measure's reporting triangle is built once from the same rows (a row
received on local day ``k`` is known at delay ``k - ref_day``; morning ``t`` sees receipts up to
day ``t + 1``), and each morning's windows carry the delay model estimated from the cells
observable that morning, so ``use_nowcast`` decides as it would have that morning.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, date, tzinfo

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import IndicatorSeries, Ruleset
from server.indicators.nowcast import DelayModel, delay_model, triangle_from_rows
from server.services.district_data import (
    AREA_MEASURES,
    DISTRICT_MEASURES,
    PLANT_MEASURES,
    DistrictData,
    MeasureNeeds,
    load_district_data,
    store_measures,
)
from server.services.district_indicators import district_indicators
from server.services.district_nowcasts import (
    NOWCAST_DELAYS,
    NOWCAST_PERIOD,
    NOWCAST_WINDOW,
    NowcastInput,
    nowcast_measures,
    pool_basis,
)
from server.services.hierarchy import hierarchy
from server.services.indicator_kinds import (
    history_indicators,
    measure_needs,
    sample_indicators,
)
from server.services.level_data import at_level
from server.services.stored_values import usable
from server.store.models import Measure, Region
from server.store.reads import district_areas, read_vintage_rows

__all__ = [
    "BLOCK_DAYS",
    "WINDOW_DAYS",
    "ArrivalRows",
    "area_parents",
    "arrival_rows",
    "as_known_indicators",
    "rolling_model",
]

#: Days of history each as-known day's indicators are computed from (covers every window used).
WINDOW_DAYS = 56
#: Days of as-known windows stacked into one indicator pass.
BLOCK_DAYS = 32
#: The measures of each region group, when a caller does not say.
_GROUPS = {"district": DISTRICT_MEASURES, "area": AREA_MEASURES, "plant": PLANT_MEASURES}


@dataclass(frozen=True, kw_only=True, eq=False)
class ArrivalRows:
    """Every stored observation of the measures needed, in arrival order within each measure."""

    measure: NDArray[np.int64]  # index into the measure list
    row: NDArray[np.int64]  # index into the region list of that measure's group
    col: NDArray[np.int64]  # day index from the first day
    value: NDArray[np.float64]
    known_day: NDArray[np.int64]  # first as-known day (index) on which the row counts


def arrival_rows(
    session: Session, measures: list[str], codes: dict[str, list[str]], first: date, end: date,
    time_zone: tzinfo, since: date | None = None,
    groups: Mapping[str, Sequence[str]] | None = None,
) -> ArrivalRows:
    """The stored rows of ``measures`` for the days ``first..end`` (from ``since`` when given),
    each measure for the regions of its group (``groups``: group -> measures, default the
    district, area and plant measures; ``codes``: group -> region codes).

    One store read per group (:func:`server.store.reads.read_vintage_rows`), rows in arrival
    order; measures not stored have no rows. A row counts from as-known day ``t`` when it was
    received by the end of local day ``t + 1`` in ``time_zone``.
    """
    group_of = {m: g for g, ms in (groups or _GROUPS).items() for m in ms}
    start = since or first
    stored = set(session.scalars(select(Measure.name).where(Measure.name.in_(measures))))
    parts = []
    for group, group_codes in codes.items():
        names = [m for m in measures if m in stored and group_of.get(m) == group]
        if not names or not group_codes or end < start:
            continue
        got = read_vintage_rows(session=session, measures=names, regions=group_codes,
                                start=start, end=end)
        index = np.array([measures.index(m) for m in names], dtype=np.int64)
        parts.append((index[got.measure], got.region, got.ref_day + (start - first).days,
                      got.value, got.received_at))
    if not parts:
        e = np.zeros(0, dtype=np.int64)
        return ArrivalRows(measure=e, row=e, col=e, value=np.zeros(0), known_day=e)
    measure, row, col, value, received = (np.concatenate(a) for a in zip(*parts, strict=True))
    # counted on day t when received by the end of local day t + 1; vintages are few, so each
    # receipt time is converted once
    stamps, which = np.unique(received, return_inverse=True)
    local = np.array([(s.replace(tzinfo=UTC).astimezone(time_zone).date() - first).days - 1
                      for s in stamps.astype("datetime64[us]").astype(object)], dtype=np.int64)
    known = local[which.reshape(-1)] if local.size else np.zeros(0, dtype=np.int64)
    return ArrivalRows(measure=measure, row=row, col=col, value=value, known_day=known)


def _stack(
    base: DistrictData, snaps: dict[str, NDArray[np.float64]], n: int,
    nowcasts: dict[str, NowcastInput] | None = None, needs: MeasureNeeds | None = None,
    dates: NDArray[np.datetime64] | None = None, bad: dict[str, NDArray[np.bool_]] | None = None,
) -> DistrictData:
    """A DistrictData whose regions are ``n`` stacked as-known windows of ``base``'s districts
    (of the measures ``needs``; default those of earlier releases), on ``dates`` (default: the
    first days of ``base``, for indicators that read no calendar). ``bad``: the windows are
    cleaned already (:func:`usable`) and these are their unusable values."""
    needs = needs or MeasureNeeds()
    w = next(iter(snaps.values())).shape[1]
    served = np.kron(np.eye(n), base.served)
    # Stored values the indicators cannot take are read as missing and flagged, as the daily
    # evaluation does (district_indicators.usable); the base's own flags are for its own days.
    cleaned: dict[str, NDArray[np.float64]] = {}
    invalid: dict[str, NDArray[np.bool_]] = {}
    for m in (*needs.district, *needs.area, *needs.plant):
        if bad is not None:
            cleaned[m], invalid[m] = snaps[m], bad[m]
        else:
            cleaned[m], invalid[m], _why = usable(snaps[m], count=m not in needs.plant)
    plant_bad = np.zeros((base.plant_population.size * n, w), dtype=bool)
    for m in needs.plant:
        plant_bad |= invalid[m]
    invalid["ww_plants"] = (served > 0).astype(np.float64) @ plant_bad.astype(np.float64) > 0
    snaps = cleaned
    return replace(
        base, invalid={m: v for m, v in invalid.items() if m not in needs.plant},
        plant_invalid={m: invalid[m] for m in needs.plant}, plant_stale={},
        bad_values=(),
        regions=tuple(f"{k}:{c}" for k in range(n) for c in base.regions),
        levels=base.levels * n,
        population=np.tile(base.population, n),
        dates=base.dates[:w] if dates is None else dates,
        district={m: snaps[m] for m in needs.district},
        area_of_district={m: snaps[m] for m in needs.area},
        plant={m: snaps[m] for m in needs.plant},
        plant_population=np.tile(base.plant_population, n),
        served=served,
        nowcasts=nowcasts or {},
    )


def _triangles(
    rows: ArrivalRows, measures: list[str], n_regions: int, n_days: int
) -> dict[str, NDArray[np.float64]]:
    """Cumulative reporting triangles of the district count measures over the whole period.

    A row counted from as-known day ``k`` was received on day ``k + 1`` (:func:`arrival_rows`).
    """
    out = {}
    for m in nowcast_measures(measures):
        k = measures.index(m)
        sel = np.flatnonzero(rows.measure == k)  # rows are in arrival order
        out[m] = triangle_from_rows(
            rows.row[sel], rows.col[sel], rows.known_day[sel] + 1, rows.value[sel],
            regions=n_regions, days=n_days, delays=NOWCAST_DELAYS, last_receipt=n_days,
        )
    return out


def rolling_model(
    tri: NDArray[np.float64], cutoffs: NDArray[np.int64], groups: NDArray[np.int64]
) -> DelayModel:
    """Delay models at ``cutoffs`` (regions, cutoffs, delays), from the rows they need only."""
    lo = max(int(cutoffs.min()) - NOWCAST_WINDOW, 0)
    hi = int(cutoffs.max()) + 1
    return delay_model(tri[:, lo:hi], cutoffs=cutoffs - lo, groups=groups, window=NOWCAST_WINDOW,
                       period=NOWCAST_PERIOD)


def _stacked_input(
    model: DelayModel, known_delay: NDArray[np.int64], group_names: list[str | None]
) -> NowcastInput:
    """A (regions, cutoffs) delay model as the input of cutoff-major stacked windows."""
    def flat(a: NDArray) -> NDArray:  # type: ignore[type-arg]
        return np.swapaxes(a, 0, 1).reshape((-1, 1) + a.shape[2:])

    pools = np.swapaxes(model.pool, 0, 1).reshape(-1)
    n = model.pool.shape[1]
    return NowcastInput(
        model=DelayModel(flat(model.reported), flat(model.log_var), flat(model.pool),
                         flat(model.reports)),
        known_delay=known_delay, basis=pool_basis(pools, group_names * n),
    )


def as_known_indicators(
    session: Session, ruleset: Ruleset, first: date, end: date, tick: Callable[[int], None],
    time_zone: tzinfo,
) -> tuple[DistrictData, dict[str, IndicatorSeries]]:
    """The regions of ``ruleset``'s level and its indicators for ``first..end``, each day's
    value as known on the morning after it (module docstring); ``tick(n)`` after each block
    of ``n`` days."""
    needs = measure_needs(ruleset, store_measures(session=session))
    base = load_district_data(session=session, start=first, end=first, needs=needs)
    tree = hierarchy(session=session).parent_of if ruleset.level != "districts" else None
    view = at_level(base, ruleset, tree)  # the regions the policy assigns tiers to
    n_days = (end - first).days + 1
    area_parent = area_parents(session, base)
    plants = list(
        session.scalars(select(Region.code).where(Region.level == "plant").order_by(Region.code))
    )
    areas = sorted(set(area_parent.values()))
    codes = {"district": list(base.regions), "area": areas, "plant": plants}
    measures = [*needs.district, *needs.area, *needs.plant]
    groups = {"district": needs.district, "area": needs.area, "plant": needs.plant}
    rows = arrival_rows(session, measures, codes, first, end, time_zone, groups=groups)
    size = {"district": len(base.regions), "area": len(areas), "plant": len(plants)}
    group_of = {m: g for g, ms in groups.items() for m in ms}
    on_samples = sample_indicators(ruleset)
    current = [np.full((size[group_of[m]], n_days), np.nan) for m in measures]
    pick = np.array([areas.index(area_parent[c]) if c in area_parent else -1 for c in base.regions])
    order = np.argsort(rows.known_day, kind="stable")  # arrival order kept within a day
    bounds = np.searchsorted(rows.known_day[order], np.arange(-1, n_days), side="right")
    w = WINDOW_DAYS
    wanted = sorted(ruleset.used_indicators())
    history = _History(base, ruleset, tree, history_indicators(ruleset), n_days, len(view.regions),
                       on_samples)
    if history.names:
        history.start(rows, measures, needs, [size[group_of[m]] for m in measures], pick)
    windowed = [n for n in wanted if n not in history.names]
    parts: dict[str, list[NDArray[np.float64]]] = {
        f"{n}.{k}": [] for n in wanted
        for k in ("estimate", "lower", "upper", "count", "age", "nowcast", "nowcast_days")
    }
    triangles = _triangles(rows, measures, len(base.regions), n_days)
    area_names: list[str | None] = [area_parent.get(c) for c in base.regions]
    # window column j of morning t is known at delay t + 1 - (t - w + 1 + j) = w - j
    window_delay = np.arange(w, 0, -1, dtype=np.int64)
    newest_prev: dict[str, NDArray[np.float64]] = {}  # kind on samples -> newest sample day
    for block_start in range(0, n_days, BLOCK_DAYS):
        days = range(block_start, min(block_start + BLOCK_DAYS, n_days))
        snaps: dict[str, list[NDArray[np.float64]]] = {m: [] for m in measures}
        for t in days:
            # apply the rows that became known on day t (the first slice holds earlier arrivals)
            lo, hi = (0 if t == 0 else bounds[t]), bounds[t + 1]
            take = order[lo:hi]
            for k in range(len(measures)):
                sel = take[rows.measure[take] == k]
                current[k][rows.row[sel], rows.col[sel]] = rows.value[sel]
            left = t - w + 1
            for k, m in enumerate(measures):
                window = np.full((current[k].shape[0], w), np.nan)
                src = current[k][:, max(left, 0) : t + 1]
                window[:, w - src.shape[1] :] = src
                if m in needs.area:
                    window = np.where(pick[:, None] >= 0, window[np.maximum(pick, 0)], np.nan)
                snaps[m].append(window)
            if history.names:
                history.apply(take)
                if bounds[t + 1] > 0:  # nothing known yet: unknown
                    history.morning(t)
        if not windowed:
            tick(len(days))
            continue
        stacked = {m: np.concatenate(v, axis=0) for m, v in snaps.items()}
        n = len(days)
        cutoffs = np.asarray(days, dtype=np.int64) + 1
        nowcasts = {
            m: _stacked_input(rolling_model(tri, cutoffs, pick), window_delay, area_names)
            for m, tri in triangles.items()
        }
        series = district_indicators(
            at_level(_stack(base, stacked, n, nowcasts, needs), ruleset, tree, blocks=n), ruleset,
            names=windowed)
        for name, s in series.items():
            r = len(view.regions)
            est = s.estimate.reshape(n, r, w)
            if name in on_samples:
                last = _newest_column(est)
                newest_prev[name], est_last, age = _new_samples(est, last,
                                                                newest_prev.get(name), days)
                parts[f"{name}.estimate"].append(est_last)
                for key, arr in (("lower", s.lower), ("upper", s.upper)):
                    if arr is not None:
                        vals = np.take_along_axis(
                            arr.reshape(n, r, w), np.maximum(last, 0)[..., None], axis=2
                        )[..., 0]
                        parts[f"{name}.{key}"].append(np.where(np.isfinite(est_last), vals, np.nan))
                parts[f"{name}.age"].append(age)
                continue
            parts[f"{name}.estimate"].append(est[:, :, -1])
            flag = (np.zeros(s.shape) if s.nowcast is None else s.nowcast.astype(np.float64))
            nc_days = np.zeros(s.shape) if s.nowcast_days is None else s.nowcast_days
            for key, arr in (("lower", s.lower), ("upper", s.upper), ("count", s.count),
                             ("age", s.age_days), ("nowcast", flag),
                             ("nowcast_days", nc_days)):
                if arr is not None:
                    parts[f"{name}.{key}"].append(arr.reshape(n, r, w)[:, :, -1])
        tick(n)
    indicators = history.series()
    for name in windowed:
        def get(key: str, name: str = name) -> NDArray[np.float64] | None:
            got = parts[f"{name}.{key}"]
            return np.concatenate(got, axis=0).T.copy() if got else None

        flags = get("nowcast") if name not in on_samples else None
        indicators[name] = IndicatorSeries(
            estimate=get("estimate"), lower=get("lower"), upper=get("upper"),  # type: ignore[arg-type]
            count=get("count"), age_days=get("age"),
            nowcast=None if flags is None else flags > 0,
            nowcast_days=get("nowcast_days") if flags is not None else None,
        )
    dates = np.arange(np.datetime64(first, "D"), np.datetime64(end, "D") + 1)
    return replace(view, dates=dates, as_of=None), indicators


class _History:
    """The as-known values of the indicators whose kinds need their calendar and a long history
    (:attr:`~server.services.kind_model.Kind.history`): each morning ``t`` they are computed
    over every day from the first up to ``t`` with the data known that morning, as the daily
    evaluation of that morning computes them, and day ``t``'s column is kept. Of a kind on
    samples (``wastewater_level``) the newest sample's value is kept instead, on the morning
    it first became known, with its age, as the windows keep it (:func:`_new_samples`);
    ``invalid`` is that morning's.

    The stored values are checked once per row (:func:`usable` is elementwise), so each
    morning only slices the arrays known so far."""

    #: The series' arrays kept (bool ones start False, the others missing).
    KEYS = ("estimate", "lower", "upper", "count", "age_days", "no_baseline", "invalid", "size")

    def __init__(self, base: DistrictData, ruleset: Ruleset,
                 tree: Mapping[str, str | None] | None, names: Sequence[str], n_days: int,
                 n_regions: int, on_samples: Sequence[str] = ()) -> None:
        self.base, self.ruleset, self.tree, self.names = base, ruleset, tree, tuple(names)
        self.on_samples = set(on_samples) & set(self.names)
        self.newest: dict[str, NDArray[np.float64]] = {}  # kind on samples -> newest sample day
        self.first = np.datetime64(base.dates[0], "D") if base.dates.size else None
        self.out: dict[str, dict[str, NDArray]] = {}  # type: ignore[type-arg]
        self.shape = (n_regions, n_days)

    def start(self, rows: ArrivalRows, measures: list[str], needs: MeasureNeeds,
              sizes: list[int], pick: NDArray[np.int64]) -> None:
        """Check every row once; no value known yet (``sizes``: regions of each measure)."""
        self.rows, self.measures, self.needs, self.pick = rows, measures, needs, pick
        plant = np.isin(rows.measure, [measures.index(m) for m in needs.plant])
        self.value = np.full(rows.value.shape, np.nan)
        self.bad = np.zeros(rows.value.shape, dtype=bool)
        for is_plant in (False, True):
            sel = plant == is_plant
            self.value[sel], self.bad[sel], _why = usable(rows.value[sel], count=not is_plant)
        n_days = self.shape[1]
        self.known = [np.full((n, n_days), np.nan) for n in sizes]
        self.known_bad = [np.zeros((n, n_days), dtype=bool) for n in sizes]

    def apply(self, take: NDArray[np.int64]) -> None:
        """Apply the rows ``take`` (in arrival order) that became known this morning."""
        r = self.rows
        for k in range(len(self.measures)):
            sel = take[r.measure[take] == k]
            self.known[k][r.row[sel], r.col[sel]] = self.value[sel]
            self.known_bad[k][r.row[sel], r.col[sel]] = self.bad[sel]

    def morning(self, t: int) -> None:
        """Compute the indicators on morning ``t`` from the values known then."""
        assert self.first is not None
        values, bad = {}, {}
        pick = self.pick
        for k, m in enumerate(self.measures):
            v, b = self.known[k][:, : t + 1], self.known_bad[k][:, : t + 1]
            if m in self.needs.area:
                v = np.where(pick[:, None] >= 0, v[np.maximum(pick, 0)], np.nan)
                b = (pick[:, None] >= 0) & b[np.maximum(pick, 0)]
            values[m], bad[m] = v, b
        dates = np.arange(self.first, self.first + np.timedelta64(t + 1, "D"))
        data = replace(_stack(self.base, values, 1, None, self.needs, dates=dates, bad=bad),
                       regions=self.base.regions)
        series = district_indicators(at_level(data, self.ruleset, self.tree), self.ruleset,
                                     names=self.names)
        for name, s in series.items():
            got = self.out.setdefault(name, {})
            if name in self.on_samples:
                self._newest_sample(got, s, t, name)
                continue
            for key in self.KEYS:
                arr = getattr(s, key)
                if arr is None:
                    continue
                if key not in got:
                    got[key] = (np.zeros(self.shape, dtype=bool) if arr.dtype == bool
                                else np.full(self.shape, np.nan))
                got[key][:, t] = arr[:, -1]

    def _newest_sample(self, got: dict[str, NDArray], s: IndicatorSeries, t: int,  # type: ignore[type-arg]
                       name: str) -> None:
        """Keep morning ``t``'s newest sample of ``s`` in ``got`` (the class docstring)."""
        est = s.estimate[None]  # one block of one morning whose window is days 0..t
        last = _newest_column(est)
        self.newest[name], value, age = _new_samples(est, last, self.newest.get(name),
                                                     range(t, t + 1))
        kept = {"estimate": value[0], "age_days": age[0]}
        for key, arr in (("lower", s.lower), ("upper", s.upper)):
            if arr is not None:
                at = np.take_along_axis(arr, np.maximum(last[0], 0)[:, None], axis=1)[:, 0]
                kept[key] = np.where(np.isfinite(value[0]), at, np.nan)
        for key, col in kept.items():
            got.setdefault(key, np.full(self.shape, np.nan))[:, t] = col
        if s.invalid is not None:
            got.setdefault("invalid", np.zeros(self.shape, dtype=bool))[:, t] = s.invalid[:, -1]

    def series(self) -> dict[str, IndicatorSeries]:
        """The as-known series of every such indicator (missing on mornings not computed)."""
        out = {}
        for name in self.names:
            got = self.out.get(name, {})
            out[name] = IndicatorSeries(
                estimate=got.get("estimate", np.full(self.shape, np.nan)),
                lower=got.get("lower"), upper=got.get("upper"), count=got.get("count"),
                age_days=got.get("age_days"), no_baseline=got.get("no_baseline"),
                invalid=got.get("invalid"), size=got.get("size"))
        return out


def area_parents(session: Session, base: DistrictData) -> dict[str, str]:
    """District code -> its parent area's code, for the districts of ``base`` with a parent."""
    return {d.code: d.area for d in district_areas(session=session)
            if d.area is not None and d.code in base.regions}


def _newest_column(est: NDArray[np.float64]) -> NDArray[np.int64]:
    """Index of the newest finite column of each (day, region) window, -1 when none."""
    w = est.shape[2]
    finite = np.isfinite(est)
    idx = np.where(finite, np.arange(w), -1).max(axis=2)
    return idx.astype(np.int64)


def _new_samples(
    est: NDArray[np.float64], last: NDArray[np.int64], newest_prev: NDArray[np.float64] | None,
    days: range,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """As-known sample values: the newest known sample, only on the day it first became known."""
    n, r, w = est.shape
    t = np.asarray(days, dtype=np.float64)[:, None]
    newest = np.where(last >= 0, t - (w - 1 - last), np.nan)  # absolute day of the newest sample
    prev = np.vstack(
        [np.full((1, r), -np.inf) if newest_prev is None else newest_prev[None], newest[:-1]]
    )
    with np.errstate(invalid="ignore"):
        fresh = np.isfinite(newest) & (newest > np.nan_to_num(prev, nan=-np.inf))
    value = np.take_along_axis(est, np.maximum(last, 0)[..., None], axis=2)[..., 0]
    value = np.where(fresh, value, np.nan)
    age = np.where(np.isfinite(newest), t - newest, np.nan)
    carried = np.fmax.accumulate(np.where(np.isfinite(newest), newest, -np.inf), axis=0)
    if newest_prev is not None:
        carried = np.maximum(carried, newest_prev[None])
    return carried[-1], value, age


