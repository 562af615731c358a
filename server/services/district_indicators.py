"""Use case: turn stored measures into the indicator series a ruleset asks for, for every district.

Reads dense (regions x days) arrays from the store (current or as of a cutoff), computes the
indicators with :mod:`server.indicators`, and hands them to the rules engine as
:class:`rules.IndicatorSeries`, each with the age of its underlying data so stale inputs are
unknown.

Two limits make old data unknown. The ruleset's ``max_age_days`` per indicator judges the age of
the data behind each value. A feed's ``stale_after`` (``docs/feeds.md``) judges the feed: given
``stale_after`` (feed name -> limit, :func:`feed_limits`), a region's measure is *stale* on every
day more than the limit after its newest reference date as known at the cutoff, and every
indicator built from it carries ``stale`` there, so the engine explains it as stale data. The
limit is the one of the feed that told the newest date (the most lenient one on a tie).

A stored value the indicators cannot take (a count that is negative, not within
:data:`~server.feeds.validation.COUNT_TOLERANCE` of a whole number or over
:data:`~server.feeds.validation.MAX_COUNT`; an infinite or negative wastewater value;
positives above tests on a day) never stops the evaluation: it is read as missing, logged with
its region, measure and date, and every indicator value built from it is ``invalid`` (the
engine treats it as unknown and explains it so) for that district only. Counts within the
tolerance are rounded, as feed validation stores them (:mod:`server.feeds.validation`); older
releases stored them unrounded.

Nowcasts. Count measures arrive late (a case tested on Monday may be reported on Thursday), so
the last days read low. :func:`nowcast_inputs` builds each count measure's reporting triangle from
the stored vintages of the last :data:`NOWCAST_WINDOW` days (one store read), estimates the
reporting delays at the cutoff (chain ladder, pooled over the parent area or all districts for
districts with few reports) and ``incidence_7d``, ``admissions_7d`` and ``tests_7d`` are computed
on the nowcast of the days still incomplete; those values carry ``nowcast`` so that a criterion
with ``use_nowcast: false`` is unknown there (``docs/rules.md``). Positivity and Rt stay on the
reports received so far.

Indicator names known here (a ruleset may use any subset): ``incidence_7d``, ``positivity_7d``,
``tests_7d``, ``admissions_7d``, ``icu_share``, ``rt``, ``ww_trend``, ``gp_aberration``. Percentages
(positivity, ICU share) are expressed in percent, as policies write them.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta, tzinfo

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from rules import IndicatorSeries, Ruleset
from server.feeds.definition import FeedDefinition
from server.feeds.validation import COUNT_TOLERANCE, MAX_COUNT
from server.indicators._arrays import trailing_sum
from server.indicators.aberration import ears
from server.indicators.hospital import admission_rate, occupancy_share
from server.indicators.nowcast import (
    POOL_ALL,
    POOL_GROUP,
    DelayModel,
    WindowNowcast,
    delay_model,
    nowcast_window,
    triangle_from_rows,
)
from server.indicators.poisson import incidence_rate, poisson_interval
from server.indicators.renewal import reproduction_number
from server.indicators.serial_interval import gamma_serial_interval
from server.indicators.wastewater import normalise, to_districts, trend
from server.indicators.wilson import positivity
from server.indicators.wilson import testing_rate as tests_per_population
from server.services.capacity_indicators import days_to_share_series, projected_share_series
from server.services.errors import ServiceError
from server.services.seasonal_indicators import seasonal_series
from server.store import read_dense
from server.store.models import Catchment, Region
from server.store.reads import feed_last_dates, read_vintage_rows

DISTRICT_MEASURES = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")
AREA_MEASURES = ("icu_occupied", "icu_staffed")
PLANT_MEASURES = ("ww_concentration", "ww_flow")
# Districts below this population are matched by overrides as level "small_district".
SMALL_DISTRICT_POPULATION = 30_000
# Days a bad input day reaches forward: 7-day windows; EARS C2 (baseline t-9 .. t-3 and the day
# itself, ``server.indicators.aberration``); the wastewater trend's 15-day window.
WEEK, EARS_C2_REACH, WW_TREND_WINDOW = 7, 10, 15

log = logging.getLogger(__name__)


@dataclass(frozen=True, kw_only=True)
class BadValue:
    """A stored value the indicators cannot take, read as missing (and logged)."""

    region: str
    measure: str
    ref_date: date
    value: float
    problem: str


def usable(
    values: NDArray[np.float64], *, count: bool
) -> tuple[NDArray[np.float64], NDArray[np.bool_], NDArray[np.str_]]:
    """``values`` with unusable entries made NaN, where they were, and why (``""``: fine).

    Counts must be whole numbers in ``[0, MAX_COUNT]``; those within ``COUNT_TOLERANCE`` of one
    are rounded to it (as feed validation stores them). Other measures must be finite and not
    negative. NaN stays NaN (a missing day).
    """
    problem = np.full(values.shape, "", dtype="<U40")
    with np.errstate(invalid="ignore"):
        problem[np.isinf(values)] = "not finite"
        problem[(values < 0) & (problem == "")] = "negative"
        if count:
            whole = np.rint(values)
            problem[(np.abs(values - whole) > COUNT_TOLERANCE) & (problem == "")] = (
                "not a whole number")
            problem[(values > MAX_COUNT) & (problem == "")] = "over the largest count"
    bad = problem != ""
    cleaned = np.where(bad, np.nan, np.rint(values) + 0.0 if count else values)
    return cleaned, bad, problem


def _clean(
    arrays: Mapping[str, NDArray[np.float64]], regions: Sequence[str],
    dates: NDArray[np.datetime64], *, count: bool, found: list[BadValue],
) -> tuple[dict[str, NDArray[np.float64]], dict[str, NDArray[np.bool_]]]:
    """:func:`usable` over each measure's (regions, days) array; bad values go to ``found``."""
    values, masks = {}, {}
    for measure, arr in arrays.items():
        values[measure], masks[measure], problem = usable(arr, count=count)
        for r, d in np.argwhere(masks[measure]).tolist():
            found.append(BadValue(region=regions[r], measure=measure,
                                  ref_date=dates[d].astype("datetime64[D]").item(),
                                  value=float(arr[r, d]), problem=str(problem[r, d])))
    return values, masks


#: Count measures nowcast from their reporting triangles: those the nowcast indicators use
#: (positives and GP consultations would add triangle rows that no indicator reads).
NOWCAST_MEASURES = ("cases", "tests", "hosp_admissions")
#: Delays 0 .. NOWCAST_DELAYS - 1 in the triangle; reference days whose reports estimate them.
NOWCAST_DELAYS = 60
NOWCAST_WINDOW = 60
#: Strata of the delay estimate by reference day modulo this (7: by weekday). Measured on the
#: demo (cases, every morning against the count known 28 days later): by weekday, median error
#: 8.8 % but the 95 % interval covered 99 % (too wide); pooled over weekdays, 10.7 % and 96 %.
NOWCAST_PERIOD = 1


@dataclass(frozen=True, kw_only=True, eq=False)
class NowcastInput:
    """One count measure's delay model at the cutoff and the delay each day is known at.

    ``model`` is shaped (districts, 1, delays); ``known_delay`` (districts, days) or (days,);
    ``basis`` says per district whose reports the delays rest on.
    """

    model: DelayModel
    known_delay: NDArray[np.int64]
    basis: tuple[str, ...]


@dataclass(frozen=True, kw_only=True)
class DistrictData:
    """Everything the indicators need, read from the store for one date range and cutoff."""

    regions: tuple[str, ...]
    levels: tuple[str, ...]
    population: NDArray[np.float64]
    dates: NDArray[np.datetime64]
    district: Mapping[str, NDArray[np.float64]]
    area_of_district: Mapping[str, NDArray[np.float64]]
    plant: Mapping[str, NDArray[np.float64]]
    plant_population: NDArray[np.float64]
    served: NDArray[np.float64]  # (districts, plants): people of each district served by a plant
    as_of: datetime | None
    # Per measure, (districts, days) (area measures by district): True where the feed's
    # staleness limit is passed; ``ww_plants``: every plant serving the district is stale.
    stale: Mapping[str, NDArray[np.bool_]] = field(default_factory=dict)
    # Per measure, (districts, days): True where the stored value was unusable and read as
    # missing (:func:`usable`); ``ww_plants``: some plant serving the district had one.
    invalid: Mapping[str, NDArray[np.bool_]] = field(default_factory=dict)
    bad_values: tuple[BadValue, ...] = ()

    def invalid_of(self, *measures: str, reach: int = 1) -> NDArray[np.bool_] | None:
        """Where any of ``measures`` had an unusable value within the last ``reach`` days
        (the day itself included); None when none had any."""
        masks = [self.invalid[m] for m in measures if m in self.invalid and self.invalid[m].any()]
        if not masks:
            return None
        hit = np.logical_or.reduce(masks).astype(np.float64)
        return trailing_sum(hit, reach) > 0.5

    # Per count measure: what its nowcast needs (:func:`nowcast_inputs`); empty: no nowcasts.
    nowcasts: Mapping[str, NowcastInput] = field(default_factory=dict)

    def nowcast_of(self, measure: str, window: int = 7) -> WindowNowcast | None:
        """Nowcast of ``measure``'s trailing ``window``-day sums (None: no triangle)."""
        inp = self.nowcasts.get(measure)
        if inp is None:
            return None
        return nowcast_window(self.district[measure], inp.known_delay, inp.model, window=window)

    def stale_of(self, *measures: str) -> NDArray[np.bool_] | None:
        """Where any of ``measures`` is past its feed's staleness limit (None: nowhere known)."""
        masks = [self.stale[m] for m in measures if m in self.stale]
        return np.logical_or.reduce(masks) if masks else None


def feed_limits(feeds: Iterable[FeedDefinition]) -> dict[str, timedelta]:
    """Feed name -> its ``stale_after``, the argument :func:`load_district_data` takes."""
    return {f.name: f.stale_after for f in feeds}


def stale_masks(
    *, session: Session, regions: Sequence[str], measures: Sequence[str],
    dates: NDArray[np.datetime64], as_of: datetime | None, stale_after: Mapping[str, timedelta],
) -> dict[str, NDArray[np.bool_]]:
    """Per measure, (regions, days): True on days past the feed limit after the newest date.

    The newest reference date of each region and measure is the one known at ``as_of``; its
    limit is that of the feed that told it (the longest when several feeds told the same date).
    Feeds without a limit in ``stale_after`` (no longer configured) never make data stale.
    """
    row = {code: i for i, code in enumerate(regions)}
    newest: dict[tuple[str, str], tuple[date, timedelta]] = {}
    for last in feed_last_dates(session=session, measures=measures, as_of=as_of):
        limit = stale_after.get(last.feed)
        if limit is None or last.region not in row:
            continue
        key = (last.region, last.measure)
        known = newest.get(key)
        if known is None or last.ref_date > known[0] or (
            last.ref_date == known[0] and limit > known[1]
        ):
            newest[key] = (last.ref_date, limit)
    days = dates.astype("datetime64[D]")
    out = {m: np.zeros((len(regions), days.size), dtype=bool) for m in measures}
    for (region, measure), (ref, limit) in newest.items():
        after = (days - np.datetime64(ref, "D")).astype(np.float64)
        out[measure][row[region]] = after > limit / timedelta(days=1)
    return out


def pool_basis(pool: NDArray[np.int8], group_names: Sequence[str | None]) -> tuple[str, ...]:
    """Per district, whose reports its delay distribution rests on (for explanations)."""
    return tuple(
        "reporting delays pooled over all districts" if p == POOL_ALL
        else f"reporting delays pooled over {name}" if p == POOL_GROUP and name
        else "the district's own reporting delays"
        for p, name in zip(pool.tolist(), group_names, strict=True)
    )


def nowcast_inputs(
    *, session: Session, regions: Sequence[str], groups: Sequence[str | None],
    dates: NDArray[np.datetime64], as_of: datetime | None,
    group_names: Mapping[str, str] | None = None, time_zone: tzinfo = UTC,
) -> dict[str, NowcastInput]:
    """Delay models of every count measure at the cutoff, from one read of stored vintages.

    The triangle covers the last :data:`NOWCAST_WINDOW` reference days up to ``dates[-1]``;
    a row's delay is its day of receipt (the office's local day in ``time_zone``, as the
    as-known backtest counts) minus its reference day; the cutoff is the local day of ``as_of``
    (or of the newest row received). ``groups`` are the districts' parent areas,
    which small districts pool their delays over (:func:`server.indicators.nowcast.delay_model`).
    """
    if not regions or dates.size == 0:
        return {}
    end = dates[-1].astype("datetime64[D]")
    first = end - np.timedelta64(NOWCAST_WINDOW - 1, "D")
    rows = read_vintage_rows(
        session=session, measures=NOWCAST_MEASURES, regions=regions,
        start=first.astype(date), end=end.astype(date), as_of=as_of,
    )
    if len(rows) == 0:
        return {}
    local = pd.DatetimeIndex(rows.received_at).tz_localize(UTC).tz_convert(time_zone)
    local_days = local.tz_localize(None).to_numpy().astype("datetime64[D]")
    receipt = (local_days - first).astype(np.int64)
    cutoff = int(receipt.max()) if as_of is None else int(
        (np.datetime64(as_of.astimezone(time_zone).date(), "D") - first).astype(np.int64))
    names = sorted({g for g in groups if g is not None})
    group_index = np.array([names.index(g) if g is not None else -1 for g in groups])
    label = group_names or {}
    basis_names = [label.get(g, g) if g is not None else None for g in groups]
    known_delay = (np.datetime64(first, "D") + cutoff - dates.astype("datetime64[D]")).astype(
        np.int64)
    out = {}
    # A stored value the indicators cannot take (:func:`usable`) is left out of the triangle, as
    # it is read as missing everywhere else; counts within the tolerance are rounded.
    values, unusable, _why = usable(rows.value, count=True)
    for k, measure in enumerate(NOWCAST_MEASURES):
        pick = (rows.measure == k) & ~unusable
        if not pick.any():
            continue
        tri = triangle_from_rows(
            rows.region[pick], rows.ref_day[pick], receipt[pick], values[pick],
            regions=len(regions), days=NOWCAST_WINDOW, delays=NOWCAST_DELAYS, last_receipt=cutoff,
        )
        model = delay_model(tri, cutoffs=[cutoff], groups=group_index, window=NOWCAST_WINDOW,
                            period=NOWCAST_PERIOD)
        out[measure] = NowcastInput(model=model, known_delay=known_delay,
                                    basis=pool_basis(model.pool[:, 0], basis_names))
    return out


def load_district_data(
    *, session: Session, start: date, end: date, as_of: datetime | None = None,
    stale_after: Mapping[str, timedelta] | None = None, nowcast: bool = True,
    time_zone: tzinfo = UTC,
) -> DistrictData:
    """Dense district, area and plant arrays over ``start..end`` as known at ``as_of``.

    With ``stale_after`` (feed name -> staleness limit, :func:`feed_limits`), ``stale`` marks
    each measure's days past its feed's limit (:func:`stale_masks`); without it nothing is
    marked and only the ruleset's ``max_age_days`` applies. With ``nowcast`` the count
    measures carry their delay models (:func:`nowcast_inputs`, days of receipt in
    ``time_zone``).
    """
    parent = aliased(Region)
    rows = session.execute(
        select(Region.code, Region.population, parent.code, parent.name)
        .outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.level == "district")
        .order_by(Region.code)
    ).all()
    codes = tuple(r[0] for r in rows)
    population = np.array([r[1] for r in rows], dtype=np.float64)
    parents = [r[2] for r in rows]
    district = read_dense(
        session=session, measures=DISTRICT_MEASURES, start=start, end=end, regions=codes,
        as_of=as_of,
    )
    areas = sorted({p for p in parents if p is not None})
    area = read_dense(
        session=session, measures=AREA_MEASURES, start=start, end=end, regions=areas, as_of=as_of
    )
    pick = np.array([areas.index(p) if p in areas else -1 for p in parents])
    n_days = district[DISTRICT_MEASURES[0]].shape[1]
    area_of_district = {  # no area above any district: unknown (indexing an empty array fails)
        m: np.where(pick[:, None] >= 0, area[m][np.maximum(pick, 0)], np.nan) if areas
        else np.full((len(codes), n_days), np.nan)
        for m in AREA_MEASURES
    }
    plant_rows = session.execute(
        select(Region.code, Region.population).where(Region.level == "plant").order_by(Region.code)
    ).all()
    plant_codes = [r[0] for r in plant_rows]
    plant = read_dense(
        session=session, measures=PLANT_MEASURES, start=start, end=end, regions=plant_codes,
        as_of=as_of,
    )
    served = np.zeros((len(codes), len(plant_codes)))
    plant_alias, district_alias = aliased(Region), aliased(Region)
    links = session.execute(
        select(plant_alias.code, district_alias.code, Catchment.share)
        .join(plant_alias, plant_alias.id == Catchment.plant_id)
        .join(district_alias, district_alias.id == Catchment.district_id)
    ).all()
    for plant_code, district_code, share in links:
        i, j = codes.index(district_code), plant_codes.index(plant_code)
        served[i, j] = share * population[i]
    found: list[BadValue] = []
    district_values, invalid = _clean(district.values, codes, district.dates, count=True,
                                      found=found)
    area_values, area_bad = _clean(area.values, areas, district.dates, count=True, found=found)
    for m in AREA_MEASURES:
        area_of_district[m] = np.where(
            pick[:, None] >= 0, area_values[m][np.maximum(pick, 0)], np.nan) if areas else (
            area_of_district[m])
        invalid[m] = (pick[:, None] >= 0) & area_bad[m][np.maximum(pick, 0)] if areas else (
            np.zeros((len(codes), n_days), dtype=bool))
    plant_values, plant_bad = _clean(plant.values, plant_codes, district.dates, count=False,
                                     found=found)
    invalid["ww_plants"] = (served > 0).astype(np.float64) @ (
        plant_bad["ww_concentration"] | plant_bad["ww_flow"]).astype(np.float64) > 0
    for bad in found[:20]:
        log.warning("stored %s of %s on %s is %s (%r): read as missing, its indicators are "
                    "invalid", bad.measure, bad.region, bad.ref_date, bad.problem, bad.value)
    if len(found) > 20:
        log.warning("%d more unusable stored values", len(found) - 20)
    levels = tuple(
        "small_district" if p < SMALL_DISTRICT_POPULATION else "district" for p in population
    )
    stale: dict[str, NDArray[np.bool_]] = {}
    if stale_after is not None:
        dates = district.dates
        stale.update(stale_masks(session=session, regions=codes, measures=DISTRICT_MEASURES,
                                 dates=dates, as_of=as_of, stale_after=stale_after))
        for m, mask in stale_masks(session=session, regions=areas, measures=AREA_MEASURES,
                                   dates=dates, as_of=as_of, stale_after=stale_after).items():
            stale[m] = (pick[:, None] >= 0) & mask[np.maximum(pick, 0)] if areas else np.zeros(
                (len(codes), dates.size), dtype=bool)
        plants = stale_masks(session=session, regions=plant_codes, measures=PLANT_MEASURES,
                             dates=dates, as_of=as_of, stale_after=stale_after)
        stale["ww_plants"] = _all_plants_stale(plants["ww_concentration"] | plants["ww_flow"],
                                                  served)
    return DistrictData(
        regions=codes, levels=levels, population=population, dates=district.dates,
        district=district_values, area_of_district=area_of_district, plant=plant_values,
        plant_population=np.array([r[1] for r in plant_rows], dtype=np.float64),
        served=served, as_of=as_of, stale=stale, invalid=invalid, bad_values=tuple(found),
        nowcasts=nowcast_inputs(
            session=session, regions=codes, groups=parents, dates=district.dates, as_of=as_of,
            group_names={r[2]: r[3] for r in rows if r[2] is not None}, time_zone=time_zone,
        ) if nowcast else {},
    )


def _all_plants_stale(
    plant_stale: NDArray[np.bool_], served: NDArray[np.float64]
) -> NDArray[np.bool_]:
    """(districts, days): every plant serving the district is stale (none serving: False)."""
    serving = served > 0
    fresh = serving.astype(np.float64) @ (~plant_stale).astype(np.float64)
    return serving.any(axis=1)[:, None] & (fresh == 0)


def data_age(*arrays: NDArray[np.float64]) -> NDArray[np.float64]:
    """Days since the newest day on which every one of ``arrays`` had a value (NaN before any)."""
    present = np.logical_and.reduce([np.isfinite(a) for a in arrays])
    days = np.arange(present.shape[1], dtype=np.float64)
    last = np.maximum.accumulate(np.where(present, days, -1.0), axis=1)
    return np.where(last >= 0, days - last, np.nan)


def carry_forward(series: IndicatorSeries) -> IndicatorSeries:
    """Hold each region's newest estimate on the following days that have none yet.

    The last days of a feed often lack a measure that arrives a day later (tests, admissions); a
    window then cannot be computed and the indicator would be missing exactly on the morning it is
    needed. The newest value is held instead, and ``age_days`` grows, so the ruleset's freshness
    limit (``max_age_days``) decides when it becomes stale and unknown.
    """
    est = series.estimate
    days = np.arange(est.shape[1], dtype=np.float64)
    last = np.maximum.accumulate(np.where(np.isfinite(est), days, -1.0), axis=1)
    index = np.maximum(last, 0).astype(np.int64)
    held = (last >= 0) & ~np.isfinite(est)

    def hold(values: NDArray[np.float64] | None) -> NDArray[np.float64] | None:
        if values is None:
            return None
        taken = np.take_along_axis(values, index, axis=1)
        return np.where(held, taken, values)

    base_age = series.age_days if series.age_days is not None else np.zeros_like(est)
    age = np.where(held, np.take_along_axis(base_age, index, axis=1) + (days - last), base_age)
    return IndicatorSeries(
        estimate=hold(est), lower=hold(series.lower), upper=hold(series.upper),  # type: ignore[arg-type]
        count=hold(series.count), age_days=np.where(last >= 0, age, np.nan),
        stale=series.stale, nowcast=series.nowcast, nowcast_days=series.nowcast_days,
        nowcast_basis=series.nowcast_basis, invalid=series.invalid,
    )


def _on_nowcast(
    series: IndicatorSeries, d: DistrictData, measure: str, *, per: float = 100_000,
    bounds: bool = True,
) -> IndicatorSeries:
    """``series`` (a rate per ``per`` of a 7-day count) computed on the nowcast where flagged.

    There the estimate is the nowcast 7-day count and, with ``bounds``, the interval runs from
    the exact Poisson lower bound of the nowcast's lower predictive bound to the upper bound of
    its upper one (Garwood 1936): the count noise and the unknown late reports together.
    """
    nc = d.nowcast_of(measure)
    if nc is None:
        return series
    flag = nc.nowcast & np.isfinite(nc.estimate)
    if not flag.any():
        return series
    scale = per / d.population[:, None]
    estimate = np.where(flag, nc.estimate * scale, series.estimate)
    lower, upper = series.lower, series.upper
    if bounds:
        lo = poisson_interval(np.where(flag, np.round(nc.lower), 0.0)).lower
        hi = poisson_interval(np.where(flag, np.round(nc.upper), 0.0)).upper
        lower = np.where(flag, lo * scale, series.lower)
        upper = np.where(flag, hi * scale, series.upper)
    count = None if series.count is None else np.where(flag, nc.estimate, series.count)
    return IndicatorSeries(
        estimate=estimate, lower=lower, upper=upper, count=count, age_days=series.age_days,
        stale=series.stale, nowcast=flag, nowcast_days=np.where(flag, nc.days, 0.0),
        nowcast_basis=d.nowcasts[measure].basis, invalid=series.invalid,
    )


def _incidence(d: DistrictData) -> IndicatorSeries:
    cases = d.district["cases"]
    est = incidence_rate(cases, d.population, 7)
    return _on_nowcast(IndicatorSeries(
        estimate=est.estimate, lower=est.lower, upper=est.upper, count=est.count,
        age_days=data_age(cases), stale=d.stale_of("cases"),
        invalid=d.invalid_of("cases", reach=WEEK),
    ), d, "cases")


def _positivity(d: DistrictData) -> IndicatorSeries:
    pos, tests = d.district["positives"], d.district["tests"]
    with np.errstate(invalid="ignore"):
        over = pos > tests  # a pair no check let through together (older data): unusable
    if over.any():
        pos, tests = np.where(over, np.nan, pos), np.where(over, np.nan, tests)
    est = positivity(pos, tests, 7)
    invalid = d.invalid_of("positives", "tests", reach=WEEK)
    if over.any():
        over_week = trailing_sum(over.astype(np.float64), WEEK) > 0.5
        invalid = over_week if invalid is None else invalid | over_week
    return IndicatorSeries(
        estimate=100 * est.estimate, lower=100 * est.lower, upper=100 * est.upper,
        count=est.positives, age_days=data_age(pos, tests),
        stale=d.stale_of("positives", "tests"), invalid=invalid,
    )


def _tests(d: DistrictData) -> IndicatorSeries:
    tests = d.district["tests"]
    est = tests_per_population(tests, d.population, 7)
    return _on_nowcast(IndicatorSeries(estimate=est.estimate, age_days=data_age(tests),
                                       stale=d.stale_of("tests"),
                                       invalid=d.invalid_of("tests", reach=WEEK)),
                       d, "tests", bounds=False)


def _admissions(d: DistrictData) -> IndicatorSeries:
    adm = d.district["hosp_admissions"]
    est = admission_rate(adm, d.population, window=7)
    return _on_nowcast(IndicatorSeries(
        estimate=est.estimate, lower=est.lower, upper=est.upper, count=est.count,
        age_days=data_age(adm), stale=d.stale_of("hosp_admissions"),
        invalid=d.invalid_of("hosp_admissions", reach=WEEK),
    ), d, "hosp_admissions")


def _icu(d: DistrictData) -> IndicatorSeries:
    occ, staffed = d.area_of_district["icu_occupied"], d.area_of_district["icu_staffed"]
    share = occupancy_share(occ, staffed)
    return IndicatorSeries(estimate=100 * share.estimate, age_days=data_age(occ, staffed),
                           stale=d.stale_of("icu_occupied", "icu_staffed"),
                           invalid=d.invalid_of("icu_occupied", "icu_staffed"))


def _rt(d: DistrictData, ruleset: Ruleset) -> IndicatorSeries:
    params = ruleset.indicator("rt").params if "rt" in ruleset.used_indicators() else {}
    si = gamma_serial_interval(
        float(params.get("serial_interval_mean", 4.7)), float(params.get("serial_interval_sd", 2.9))
    )
    cases = d.district["cases"]
    window = int(params.get("window", 7))
    est = reproduction_number(cases, si, window)
    return IndicatorSeries(  # a day reaches the window and the serial interval's lags after it
        estimate=est.estimate, lower=est.lower, upper=est.upper, age_days=data_age(cases),
        stale=d.stale_of("cases"), invalid=d.invalid_of("cases", reach=window + si.pmf.size - 1),
    )


def _ww_trend(d: DistrictData) -> IndicatorSeries:
    conc, flow = d.plant["ww_concentration"], d.plant["ww_flow"]
    with np.errstate(over="ignore"):  # a product past the float range: that day is unusable
        norm = normalise(
            conc, ["flow"] * conc.shape[0], flow=flow, population_served=d.plant_population
        )
    log_value = norm.log_value
    overflow = np.isinf(log_value)
    if overflow.any():
        log_value = np.where(overflow, np.nan, log_value)
    per_plant = trend(log_value, window=WW_TREND_WINDOW)
    sampled = np.isfinite(log_value)
    # A district's trend is the population-weighted mean of its plants' trends on sample days.
    on_samples = np.where(sampled, per_plant.estimate, np.nan)
    estimate = to_districts(on_samples, d.served)
    lower = to_districts(np.where(sampled, per_plant.lower, np.nan), d.served)
    upper = to_districts(np.where(sampled, per_plant.upper, np.nan), d.served)
    age = data_age(to_districts(np.where(sampled, 1.0, np.nan), d.served))
    bad = d.invalid.get("ww_plants", np.zeros(estimate.shape, dtype=bool)) | (
        (d.served > 0).astype(np.float64) @ overflow.astype(np.float64) > 0)
    invalid = trailing_sum(bad.astype(np.float64), WW_TREND_WINDOW) > 0.5 if bad.any() else None
    return IndicatorSeries(estimate=estimate, lower=lower, upper=upper, age_days=age,
                           stale=d.stale_of("ww_plants"), invalid=invalid)


def _gp(d: DistrictData) -> IndicatorSeries:
    gp = d.district["gp_ari"]
    result = ears(gp, method="C2")
    alarm = np.where(np.isfinite(result.statistic), result.alarm.astype(np.float64), np.nan)
    return IndicatorSeries(estimate=alarm, age_days=data_age(gp), stale=d.stale_of("gp_ari"),
                           invalid=d.invalid_of("gp_ari", reach=EARS_C2_REACH))


BUILDERS: dict[str, Callable[[DistrictData, Ruleset], IndicatorSeries]] = {
    "incidence_7d": lambda d, _r: carry_forward(_incidence(d)),
    "positivity_7d": lambda d, _r: carry_forward(_positivity(d)),
    "tests_7d": lambda d, _r: carry_forward(_tests(d)),
    "admissions_7d": lambda d, _r: carry_forward(_admissions(d)),
    "icu_share": lambda d, _r: carry_forward(_icu(d)),
    "rt": lambda d, r: carry_forward(_rt(d, r)),
    # Wastewater trends exist on sample days only: prepare signals count samples, not days.
    "ww_trend": lambda d, _r: _ww_trend(d),
    "gp_aberration": lambda d, _r: carry_forward(_gp(d)),
    "seasonal_intensity": seasonal_series,  # weekly MEM levels (seasonal_indicators.py)
    # Projected ICU pressure under the ruleset's scenarios (server/services/capacity_indicators).
    "icu_share_projected": lambda d, r: carry_forward(projected_share_series(d, r)),
    "icu_days_to_share": lambda d, r: carry_forward(days_to_share_series(d, r)),
}


class UnknownIndicatorError(ServiceError, ValueError):
    def __init__(self, names: list[str]) -> None:
        super().__init__(
            f"the ruleset uses indicator(s) {', '.join(names)} that tierwise does not compute; "
            f"known: {', '.join(sorted(BUILDERS))}"
        )


def district_indicators(data: DistrictData, ruleset: Ruleset) -> dict[str, IndicatorSeries]:
    """The indicator series ``ruleset`` uses, computed for every district at once."""
    wanted = sorted(ruleset.used_indicators())
    unknown = [name for name in wanted if name not in BUILDERS]
    if unknown:
        raise UnknownIndicatorError(unknown)
    return {name: BUILDERS[name](data, ruleset) for name in wanted}


@dataclass(frozen=True, kw_only=True)
class NowcastSeries:
    """One district's daily counts as reported beside their nowcast, for the district page.

    ``nowcast``/``lower``/``upper`` (95 % predictive interval of the final count) are None on
    complete days, except the last complete one, where they equal the report so the dashed
    line joins the reported one.
    """

    measure: str
    dates: tuple[date, ...]
    reported: tuple[float | None, ...]
    nowcast: tuple[float | None, ...]
    lower: tuple[float | None, ...]
    upper: tuple[float | None, ...]
    basis: str


def district_nowcast(
    *, session: Session, code: str, end: date, as_of: datetime | None = None,
    measure: str = "cases", days: int = 42, time_zone: tzinfo = UTC,
) -> NowcastSeries | None:
    """The last ``days`` days to ``end`` of ``measure`` in district ``code``, reported and
    nowcast as known at ``as_of`` (None: nothing stored)."""
    parent = aliased(Region)
    rows = session.execute(
        select(Region.code, parent.code, parent.name)
        .outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.level == "district").order_by(Region.code)
    ).all()
    codes = tuple(r[0] for r in rows)
    if code not in codes:
        return None
    start = end - timedelta(days=days - 1)
    dense = read_dense(session=session, measures=(measure,), start=start, end=end,
                       regions=codes, as_of=as_of)
    inputs = nowcast_inputs(
        session=session, regions=codes, groups=[r[1] for r in rows], dates=dense.dates,
        as_of=as_of, group_names={r[1]: r[2] for r in rows if r[1] is not None},
        time_zone=time_zone,
    )
    if measure not in inputs:
        return None
    inp = inputs[measure]
    i = codes.index(code)
    nc = nowcast_window(dense[measure], inp.known_delay, inp.model, window=1)
    open_ = nc.incomplete[i] & np.isfinite(nc.estimate[i])
    show = open_.copy()
    before = np.flatnonzero(~open_ & np.isfinite(dense[measure][i]))
    if open_.any() and before.size:
        joined = before[before < np.flatnonzero(open_)[0]]
        if joined.size:
            show[joined[-1]] = True

    def cells(values: NDArray[np.float64]) -> tuple[float | None, ...]:
        return tuple(float(v) if s and np.isfinite(v) else None
                     for v, s in zip(values, show, strict=True))

    reported = dense[measure][i]
    return NowcastSeries(
        measure=measure, dates=tuple(d.astype(date) for d in dense.dates),
        reported=tuple(float(v) if np.isfinite(v) else None for v in reported),
        nowcast=cells(nc.estimate[i]), lower=cells(nc.lower[i]), upper=cells(nc.upper[i]),
        basis=inp.basis[i],
    )
