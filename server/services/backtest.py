"""Use case: replay a ruleset over stored history (backtest).

Two replays:

* **latest data**: the indicators are computed once from the current data (every revision
  applied) and the ruleset runs over the whole history;
* **as known** (the honest replay): each day ``t`` is judged on the data as known on the morning
  after it, i.e. everything received up to the end of day ``t + 1`` (:func:`as_known_cutoff`),
  read from the vintages. Days are the office's local days (``time_zone``, the setting
  ``TIERWISE_TIME_ZONE``), as ingestion judges "today": a vintage received at 23:30 local time
  counts on that local day, whatever the UTC date. The hysteresis state carries from day to
  day, so day ``t`` sees exactly what a daily evaluation on that morning would have seen.

The as-known replay is vectorised: the observations are read once; one pass over the days applies
each day's new vintages to dense arrays and cuts a trailing window of ``WINDOW_DAYS`` days as
known that day; the windows of a block of days are stacked along the region axis so that each
indicator is computed once per block for all (day, district) pairs; the last column of every
window is that day's as-known value. Wastewater trends count a sample only on the day it first
becomes known.

Nowcasts in the as-known replay: every count measure's reporting triangle is built once from the
same rows (a row received on local day ``k`` is known at delay ``k - ref_day``; morning ``t`` sees
receipts up to day ``t + 1``), and each morning's windows carry the delay model estimated from
the cells observable that morning, so ``use_nowcast`` decides as it would have that morning.
:func:`nowcast_accuracy_report` scores those nowcasts: each morning's nowcast 7-day count against
the count known :data:`LATER_DAYS` days later.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime, timedelta, tzinfo
from pathlib import Path

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from rules import Evaluation, IndicatorSeries, Ruleset, evaluate
from rules.timeline import TimelineSummary, summarise_timeline
from server.indicators.nowcast import (
    DelayModel,
    delay_model,
    nowcast_accuracy,
    nowcast_window,
    triangle_from_rows,
)
from server.services.district_data import store_measures
from server.services.district_indicators import (
    AREA_MEASURES,
    DISTRICT_MEASURES,
    NOWCAST_DELAYS,
    NOWCAST_MEASURES,
    NOWCAST_PERIOD,
    NOWCAST_WINDOW,
    PLANT_MEASURES,
    DistrictData,
    MeasureNeeds,
    NowcastInput,
    district_indicators,
    load_district_data,
    nowcast_measures,
    pool_basis,
    usable,
)
from server.services.errors import ServiceError
from server.services.hierarchy import hierarchy
from server.services.indicator_kinds import measure_needs, sample_indicators
from server.services.level_data import at_level, policy_data
from server.store.models import Measure, Observation, Region, Vintage
from server.store.reads import read_dense

__all__ = [
    "WINDOW_DAYS",
    "BacktestError",
    "BacktestResult",
    "CapacityLead",
    "capacity_leads",
    "crossing_leads",
    "NowcastScore",
    "as_known_cutoff",
    "data_span",
    "nowcast_accuracy_report",
    "run_backtest",
    "write_timelines",
]

#: Days of history each as-known day's indicators are computed from (covers every window used).
WINDOW_DAYS = 56
#: Days of as-known windows stacked into one indicator pass.
BLOCK_DAYS = 32
#: A nowcast is scored against the count known this many days after its morning.
LATER_DAYS = 28


class BacktestError(ServiceError, ValueError):
    """A backtest that cannot run; names the argument."""

    def __init__(self, argument: str, message: str) -> None:
        super().__init__(f"{argument}: {message}")


@dataclass(frozen=True, kw_only=True, eq=False)
class BacktestResult:
    """A replay of one ruleset: the evaluation, the summarised period and its figures."""

    ruleset: Ruleset
    as_known: bool
    start: date
    end: date
    evaluation: Evaluation
    summary: TimelineSummary
    seconds: float
    names: dict[str, str]

    @property
    def period(self) -> slice:
        """Columns of the evaluation inside ``start..end``."""
        first = (np.datetime64(self.start, "D") - self.evaluation.dates[0]).astype(int)
        return slice(int(first), int(first) + (self.end - self.start).days + 1)


def as_known_cutoff(day: date, time_zone: tzinfo = UTC) -> datetime:
    """The data cutoff of the as-known replay for ``day``: the end of the following local day.

    The last microsecond before local midnight starting day ``day + 2`` in ``time_zone``.
    """
    midnight = datetime.combine(day + timedelta(days=2), datetime.min.time(), tzinfo=time_zone)
    return midnight - timedelta(microseconds=1)


def data_span(*, session: Session, measures: Iterable[str] | None = None) -> tuple[date, date]:
    """The first and last stored days (of ``measures`` only, when given: a policy's span is that
    of the measures it reads, so a long pathogen history does not lengthen other policies)."""
    query = select(func.min(Observation.ref_date), func.max(Observation.ref_date))
    names = None if measures is None else sorted(set(measures))
    if names:
        query = query.join(Measure, Measure.id == Observation.measure_id).where(
            Measure.name.in_(names))
    first, last = session.execute(query).one()
    if first is None:  # the first and last stored days
        raise BacktestError("database", "there are no observations to replay")
    return first, last


def run_backtest(
    *, session: Session, ruleset: Ruleset, start: date | None = None, end: date | None = None,
    as_known: bool = False, progress: Callable[[int], None] | None = None,
    lookback: int = 42, time_zone: tzinfo = UTC,
) -> BacktestResult:
    """Replay ``ruleset`` over the stored history and summarise ``start..end``.

    ``time_zone`` (the office's, ``settings.zone``) sets the local days of the as-known replay.

    The engine always starts at the first stored day (so windows and hysteresis are warmed up);
    the summary covers ``start..end`` (default: everything). ``progress(n)`` is called as blocks
    of days finish (``n`` days each; the total is the number of days replayed).
    """
    t0 = time.perf_counter()
    needs = measure_needs(ruleset, store_measures(session=session))
    first, last = data_span(session=session,
                            measures=(*needs.district, *needs.area, *needs.plant))
    start, end = start or first, end or last
    if end < start:
        raise BacktestError("--to", f"{end} is before --from {start}")
    if start < first or end > last:
        raise BacktestError("--from/--to", f"stored data cover {first}..{last} only")
    tick = progress or (lambda _n: None)
    if as_known:
        data, indicators = _as_known_indicators(session, ruleset, first, end, tick, time_zone)
    else:
        data = policy_data(session=session, ruleset=ruleset, start=first, end=end, as_of=None,
                           needs=needs)
        indicators = district_indicators(data, ruleset)
        tick((end - first).days + 1)
    ev = evaluate(
        ruleset, indicators, regions=data.regions, dates=data.dates, region_levels=data.levels
    )
    cols = slice((start - first).days, (end - first).days + 1)
    summary = summarise_timeline(
        ev.tier[:, cols], ev.prepare[:, :, cols], regions=data.regions,
        n_tiers=ruleset.n_tiers, lookback=lookback,
    )
    names = dict(session.execute(select(Region.code, Region.name)).all())
    return BacktestResult(
        ruleset=ruleset, as_known=as_known, start=start, end=end, evaluation=ev,
        summary=summary, seconds=time.perf_counter() - t0, names=names,
    )


# -- capacity prepare signals against the real crossing ------------------------------------------

#: Indicator kinds that project the ICU share towards a configured ``share`` (percent).
CAPACITY_KINDS = ("icu_days_to_share", "icu_share_projected")


@dataclass(frozen=True, kw_only=True)
class CapacityLead:
    """One real crossing of an area's ICU share and how long before it a prepare signal fired.

    ``crossed`` is a day the area's ICU share (occupied / staffed beds, as known at the end)
    reached ``share`` percent after being below it the day before; ``fired`` the signal's first
    firing day within the ``lookback`` days before (and since the share was last at or above
    ``share``), None when it did not fire; ``lead_days`` = ``crossed - fired``.
    """

    signal: str
    area: str
    share: float
    crossed: date
    fired: date | None

    @property
    def lead_days(self) -> int | None:
        return None if self.fired is None else (self.crossed - self.fired).days


def crossing_leads(
    share: NDArray[np.float64], fired: NDArray[np.bool_], threshold: float, lookback: int
) -> list[tuple[int, int, int]]:
    """(row, crossing day, first firing day or -1) for every upward crossing of ``threshold``.

    ``share`` and ``fired`` are (rows, days). A crossing is a day with ``share >= threshold``
    whose previous known day was below it (the first known day does not count); the firing day
    is the first ``fired`` day in ``max(c - lookback, day after the last day at or above the
    threshold) .. c``.
    """
    out = []
    for r in range(share.shape[0]):
        known = np.flatnonzero(np.isfinite(share[r]))
        above = share[r, known] >= threshold
        ups = known[1:][above[1:] & ~above[:-1]]
        for c in ups:
            before = known[(known < c) & (share[r, known] >= threshold)]
            lo = max(int(c) - lookback, int(before[-1]) + 1 if before.size else 0)
            hits = np.flatnonzero(fired[r, lo: int(c) + 1])
            out.append((r, int(c), lo + int(hits[0]) if hits.size else -1))
    return out


def capacity_leads(
    *, session: Session, result: BacktestResult, lookback: int | None = None
) -> list[CapacityLead]:
    """For each prepare signal on a projected-capacity indicator (:data:`CAPACITY_KINDS`), per
    area and real crossing of the indicator's ``share`` (default 85 %) within the result's
    period, how many days ahead the signal fired (:func:`crossing_leads`; ``lookback`` defaults
    to the indicator's ``horizon``, else 21 days). An area fires when any of its districts
    does (they share the area's projection)."""
    rs, ev = result.ruleset, result.evaluation
    specs = []
    for k, sig in enumerate(rs.prepare):
        spec = rs.indicator(sig.indicator)
        if (spec.kind or spec.name) in CAPACITY_KINDS:
            specs.append((k, sig, float(spec.params.get("share", 85.0)),
                          int(lookback or spec.params.get("horizon", 21))))
    if not specs:
        return []
    from server.services.capacity_forecaster import district_parents

    parent = {c: a for c, a in district_parents(session).items() if c in set(ev.regions)}
    if rs.level == "areas":  # a policy set per area: its regions are the areas themselves
        parent = {a: a for a in ev.regions}
    areas = sorted(set(parent.values()))
    if not areas:
        return []
    first = ev.dates[0].astype(date)
    last = ev.dates[-1].astype(date)
    dense = read_dense(session=session, measures=["icu_occupied", "icu_staffed"], start=first,
                       end=last, regions=areas)
    row = {c: i for i, c in enumerate(dense.regions)}
    occ, staffed = dense.values["icu_occupied"], dense.values["icu_staffed"]
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(staffed > 0, 100.0 * occ / staffed, np.nan)
    share = np.stack([share[row[a]] if a in row else np.full(ev.dates.size, np.nan)
                      for a in areas])
    member = np.array([[parent.get(c) == a for c in ev.regions] for a in areas])
    cols = result.period
    out = []
    for k, sig, threshold, days in specs:
        fired = (member.astype(np.int64) @ ev.prepare[k].astype(np.int64)) > 0
        for r, c, f in crossing_leads(share, fired, threshold, days):
            if not cols.start <= c < cols.stop:
                continue
            out.append(CapacityLead(
                signal=sig.id, area=areas[r], share=threshold,
                crossed=first + timedelta(days=c),
                fired=None if f < 0 else first + timedelta(days=f)))
    return out


# -- as-known replay -----------------------------------------------------------------------------


@dataclass(frozen=True, kw_only=True, eq=False)
class _Rows:
    """Every stored observation of the measures needed, sorted by arrival."""

    measure: NDArray[np.int64]  # index into the measure list
    row: NDArray[np.int64]  # index into the region list of that measure's group
    col: NDArray[np.int64]  # day index from the first day
    value: NDArray[np.float64]
    known_day: NDArray[np.int64]  # first as-known day (index) on which the row counts


def _read_rows(
    session: Session, measures: list[str], codes: dict[str, list[str]], first: date,
    time_zone: tzinfo, since: date | None = None,
    groups: Mapping[str, Sequence[str]] | None = None,
) -> _Rows:
    row_of = {}
    for group, group_codes in codes.items():
        for i, code in enumerate(group_codes):
            row_of[(group, code)] = i
    group_of = {m: g for g, ms in (groups or _GROUPS).items() for m in ms}
    query = (
        select(Measure.name, Region.code, Observation.ref_date, Observation.value,
               Vintage.received_at)
        .join(Measure, Measure.id == Observation.measure_id)
        .join(Region, Region.id == Observation.region_id)
        .join(Vintage, Vintage.id == Observation.vintage_id)
        .where(Measure.name.in_(measures))
        .order_by(Vintage.received_at, Vintage.id)
    )
    if since is not None:
        query = query.where(Observation.ref_date >= since)
    m_idx, r_idx, c_idx, vals, known = [], [], [], [], []
    for name, code, ref, value, received in session.execute(query):
        key = (group_of[name], code)
        if key not in row_of:
            continue
        m_idx.append(measures.index(name))
        r_idx.append(row_of[key])
        c_idx.append((ref - first).days)
        vals.append(value)
        aware = received if received.tzinfo else received.replace(tzinfo=UTC)
        # counted on day t when received by the end of local day t + 1
        known.append((aware.astimezone(time_zone).date() - first).days - 1)
    return _Rows(
        measure=np.asarray(m_idx, dtype=np.int64), row=np.asarray(r_idx, dtype=np.int64),
        col=np.asarray(c_idx, dtype=np.int64), value=np.asarray(vals, dtype=np.float64),
        known_day=np.asarray(known, dtype=np.int64),
    )


_GROUPS = {"district": DISTRICT_MEASURES, "area": AREA_MEASURES, "plant": PLANT_MEASURES}


def _stack(
    base: DistrictData, snaps: dict[str, NDArray[np.float64]], n: int,
    nowcasts: dict[str, NowcastInput] | None = None, needs: MeasureNeeds | None = None,
) -> DistrictData:
    """A DistrictData whose regions are ``n`` stacked as-known windows of ``base``'s districts
    (of the measures ``needs``; default those of earlier releases)."""
    needs = needs or MeasureNeeds()
    w = next(iter(snaps.values())).shape[1]
    served = np.kron(np.eye(n), base.served)
    # Stored values the indicators cannot take are read as missing and flagged, as the daily
    # evaluation does (district_indicators.usable); the base's own flags are for its own days.
    cleaned: dict[str, NDArray[np.float64]] = {}
    invalid: dict[str, NDArray[np.bool_]] = {}
    for m in (*needs.district, *needs.area, *needs.plant):
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
        dates=base.dates[:w],
        district={m: snaps[m] for m in needs.district},
        area_of_district={m: snaps[m] for m in needs.area},
        plant={m: snaps[m] for m in needs.plant},
        plant_population=np.tile(base.plant_population, n),
        served=served,
        nowcasts=nowcasts or {},
    )


def _triangles(
    rows: _Rows, measures: list[str], n_regions: int, n_days: int
) -> dict[str, NDArray[np.float64]]:
    """Cumulative reporting triangles of the district count measures over the whole period.

    A row counted from as-known day ``k`` was received on day ``k + 1`` (:func:`_read_rows`).
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


def _rolling_model(
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


def _as_known_indicators(
    session: Session, ruleset: Ruleset, first: date, end: date, tick: Callable[[int], None],
    time_zone: tzinfo,
) -> tuple[DistrictData, dict[str, IndicatorSeries]]:
    needs = measure_needs(ruleset, store_measures(session=session))
    base = load_district_data(session=session, start=first, end=first, needs=needs)
    tree = hierarchy(session=session).parent_of if ruleset.level != "districts" else None
    view = at_level(base, ruleset, tree)  # the regions the policy assigns tiers to
    n_days = (end - first).days + 1
    area_parent = _area_rows(session, base)
    plants = list(
        session.scalars(select(Region.code).where(Region.level == "plant").order_by(Region.code))
    )
    areas = sorted(set(area_parent.values()))
    codes = {"district": list(base.regions), "area": areas, "plant": plants}
    measures = [*needs.district, *needs.area, *needs.plant]
    groups = {"district": needs.district, "area": needs.area, "plant": needs.plant}
    rows = _read_rows(session, measures, codes, first, time_zone, groups=groups)
    size = {"district": len(base.regions), "area": len(areas), "plant": len(plants)}
    group_of = {m: g for g, ms in groups.items() for m in ms}
    on_samples = sample_indicators(ruleset)
    current = [np.full((size[group_of[m]], n_days), np.nan) for m in measures]
    pick = np.array([areas.index(area_parent[c]) if c in area_parent else -1 for c in base.regions])
    order = np.argsort(rows.known_day, kind="stable")  # arrival order kept within a day
    bounds = np.searchsorted(rows.known_day[order], np.arange(-1, n_days), side="right")
    w = WINDOW_DAYS
    wanted = sorted(ruleset.used_indicators())
    parts: dict[str, list[NDArray[np.float64]]] = {
        f"{n}.{k}": [] for n in wanted
        for k in ("estimate", "lower", "upper", "count", "age", "nowcast", "nowcast_days")
    }
    triangles = _triangles(rows, measures, len(base.regions), n_days)
    area_names: list[str | None] = [area_parent.get(c) for c in base.regions]
    # window column j of morning t is known at delay t + 1 - (t - w + 1 + j) = w - j
    window_delay = np.arange(w, 0, -1, dtype=np.int64)
    newest_prev: NDArray[np.float64] | None = None
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
        stacked = {m: np.concatenate(v, axis=0) for m, v in snaps.items()}
        n = len(days)
        cutoffs = np.asarray(days, dtype=np.int64) + 1
        nowcasts = {
            m: _stacked_input(_rolling_model(tri, cutoffs, pick), window_delay, area_names)
            for m, tri in triangles.items()
        }
        series = district_indicators(
            at_level(_stack(base, stacked, n, nowcasts, needs), ruleset, tree, blocks=n), ruleset)
        for name, s in series.items():
            r = len(view.regions)
            est = s.estimate.reshape(n, r, w)
            if name in on_samples:
                last = _newest_column(est)
                newest_prev, est_last, age = _new_samples(est, last, newest_prev, days)
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
    indicators = {}
    for name in wanted:
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


@dataclass(frozen=True, kw_only=True)
class NowcastScore:
    """Accuracy of one measure's nowcast of the last 7 days, for a district or all (``region``
    None): median absolute relative error of the nowcast and of the unadjusted count reported
    that morning, and the share of mornings whose later count fell inside the 95 % interval."""

    measure: str
    region: str | None
    error: float
    unadjusted_error: float
    coverage: float
    mornings: int

    @property
    def line(self) -> str:
        """'nowcast of the last 7 days: median error X % (unadjusted Y %), 95 % interval
        covered Z % of N mornings'."""
        if self.mornings == 0:
            return "nowcast of the last 7 days: no morning needed one"
        return (
            f"nowcast of the last 7 days: median error {100 * self.error:.1f} % (unadjusted "
            f"{100 * self.unadjusted_error:.1f} %), 95 % interval covered "
            f"{100 * self.coverage:.0f} % of {self.mornings} mornings"
        )


def nowcast_accuracy_report(
    *, session: Session, measures: tuple[str, ...] = ("cases", "hosp_admissions"),
    regions: tuple[str, ...] | None = None, later_days: int = LATER_DAYS,
    time_zone: tzinfo = UTC, last_mornings: int | None = None,
) -> list[NowcastScore]:
    """Score the nowcast each past morning made of the last 7 days against the count known
    ``later_days`` days later, per measure and district (``regions``; default all) and for all
    districts together.

    Morning ``t`` is the as-known day of the backtest: receipts up to day ``t + 1``, the newest
    day ``t``. Its nowcast is the 7-day count of days ``t - 6 .. t`` from the delay model of
    that morning (:func:`server.indicators.nowcast.nowcast_window`); the later count is the
    same days' reports received by day ``t + later_days + 1``. Mornings whose window is complete
    (nothing to nowcast) or too recent to have a later count are not scored; with
    ``last_mornings`` only that many of the newest scorable mornings are (and only the rows
    they need are read).
    """
    first, last = data_span(session=session)
    base = load_district_data(session=session, start=first, end=first, nowcast=False)
    n_days = (last - first).days + 1
    area_parent = _area_rows(session, base)
    areas = sorted(set(area_parent.values()))
    pick = np.array([areas.index(area_parent[c]) if c in area_parent else -1
                     for c in base.regions], dtype=np.int64)
    names = [m for m in measures if m in NOWCAST_MEASURES]
    codes = {"district": list(base.regions), "area": [], "plant": []}
    mornings = np.arange(6, n_days - later_days, dtype=np.int64)
    if last_mornings is not None:
        mornings = mornings[-last_mornings:] if last_mornings > 0 else mornings[:0]
    since = None
    if last_mornings is not None and mornings.size:
        since = first + timedelta(days=max(int(mornings[0]) - NOWCAST_WINDOW - 7, 0))
    rows = _read_rows(session, names, codes, first, time_zone, since=since)
    wanted = [base.regions.index(c) for c in regions] if regions is not None else list(
        range(len(base.regions)))
    out: list[NowcastScore] = []
    for k, measure in enumerate(names):
        sel = np.flatnonzero(rows.measure == k)
        tri = triangle_from_rows(
            rows.row[sel], rows.col[sel], rows.known_day[sel] + 1, rows.value[sel],
            regions=len(base.regions), days=n_days, delays=NOWCAST_DELAYS, last_receipt=n_days,
        )
        if mornings.size == 0:
            scores = nowcast_accuracy(*(np.zeros((len(base.regions), 0)),) * 6)
        else:
            model = _rolling_model(tri, mornings + 1, pick)
            days = mornings[:, None] - np.arange(6, -1, -1)[None, :]  # (mornings, 7)
            known_at = np.minimum(mornings[:, None] + 1 - days, NOWCAST_DELAYS - 1)
            later_at = np.minimum(mornings[:, None] + later_days + 1 - days, NOWCAST_DELAYS - 1)
            values = tri[:, days, known_at]  # (regions, mornings, 7)
            later = tri[:, days, later_at].sum(axis=2)
            n_r, n_m = values.shape[:2]
            stacked = DelayModel(
                model.reported.reshape(n_r * n_m, 1, -1), model.log_var.reshape(n_r * n_m, 1, -1),
                model.pool.reshape(-1, 1), model.reports.reshape(-1, 1),
            )
            nc = nowcast_window(values.reshape(n_r * n_m, 7), np.arange(7, 0, -1), stacked,
                                window=7)
            def col(a: NDArray, n_r: int = n_r, n_m: int = n_m) -> NDArray:  # type: ignore[type-arg]
                return a[:, -1].reshape(n_r, n_m)

            est, lo, hi, rep = col(nc.estimate), col(nc.lower), col(nc.upper), col(nc.known)
            scored = col(nc.nowcast)
            scores = nowcast_accuracy(est, lo, hi, rep, later, scored)
            total = nowcast_accuracy(*(a[wanted].reshape(1, -1)
                                       for a in (est, lo, hi, rep, later, scored)))
            out.append(NowcastScore(
                measure=measure, region=None, error=float(total.error[0]),
                unadjusted_error=float(total.unadjusted_error[0]),
                coverage=float(total.coverage[0]), mornings=int(total.mornings[0])))
        for r in wanted:
            out.append(NowcastScore(
                measure=measure, region=base.regions[r], error=float(scores.error[r]),
                unadjusted_error=float(scores.unadjusted_error[r]),
                coverage=float(scores.coverage[r]), mornings=int(scores.mornings[r])))
    return out


def _area_rows(session: Session, base: DistrictData) -> dict[str, str]:
    from sqlalchemy.orm import aliased

    parent = aliased(Region)
    rows = session.execute(
        select(Region.code, parent.code)
        .join(parent, parent.id == Region.parent_id)
        .where(Region.level == "district")
    ).all()
    return {code: p for code, p in rows if code in base.regions}


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


def write_timelines(result: BacktestResult, directory: Path, *, stem: str | None = None) -> Path:
    """Write one CSV row per region and day of the summarised period; returns the file.

    Columns: ``date, region, name, tier, candidate, decided`` and one 0/1 column per prepare
    signal.
    """
    directory.mkdir(parents=True, exist_ok=True)
    ev, cols = result.evaluation, result.period
    rs = result.ruleset
    path = directory / f"{stem or rs.name}-{'as-known' if result.as_known else 'latest'}.csv"
    header = ["date", "region", "name", "tier", "candidate", "decided"]
    header += [f"prepare_{s.id}" for s in rs.prepare]
    lines = [",".join(header)]
    dates = ev.dates[cols]
    for r, code in enumerate(ev.regions):
        name = result.names.get(code, "").replace('"', "'")
        tier, cand, dec = ev.tier[r, cols], ev.candidate[r, cols], ev.decided[r, cols]
        sig = ev.prepare[:, r, cols].astype(int)
        for j, day in enumerate(dates):
            cells = [str(day), code, f'"{name}"', str(tier[j]), str(cand[j]), str(dec[j])]
            cells += [str(x) for x in sig[:, j]]
            lines.append(",".join(cells))
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path
