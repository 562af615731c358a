"""The data behind the district indicators: dense (regions x days) arrays read from the store.

:func:`load_district_data` reads each district's measures, its parent area's (ICU beds) and
those of the treatment plants serving it, over a date range as known at a cutoff, into a
:class:`DistrictData`; :class:`MeasureNeeds` says which measures (those a ruleset's indicators
read: :func:`server.services.indicator_kinds.measure_needs`).

Two limits make old data unknown. The ruleset's ``max_age_days`` per indicator judges the age of
the data behind each value. A feed's ``stale_after`` (``docs/feeds.md``) judges the feed: given
``stale_after`` (feed name -> limit, :func:`feed_limits`), a region's measure is *stale* on every
day more than the limit after its newest reference date as known at the cutoff, and every
indicator built from it carries ``stale`` there, so the engine explains it as stale data. The
limit is the one of the feed that told the newest date (the most lenient one on a tie).

A stored value the indicators cannot take (:mod:`server.services.stored_values`) never stops
the evaluation: it is read as missing, logged with its region, measure and date, and marked in
``invalid`` for that district only. Count measures carry their nowcast inputs
(:mod:`server.services.district_nowcasts`).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta, tzinfo

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from server.feeds.definition import FeedDefinition
from server.indicators._arrays import trailing_sum
from server.indicators.nowcast import WindowNowcast, nowcast_window
from server.services.district_nowcasts import NowcastInput, nowcast_inputs, nowcast_measures
from server.services.stored_values import BadValue, clean_arrays
from server.services.testing_reviews import dismissals
from server.store import read_dense
from server.store.models import Catchment, Measure, Region
from server.store.reads import feed_last_dates

DISTRICT_MEASURES = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")
AREA_MEASURES = ("icu_occupied", "icu_staffed")
PLANT_MEASURES = ("ww_concentration", "ww_flow")
# Districts below this population are matched by overrides as level "small_district".
SMALL_DISTRICT_POPULATION = 30_000


@dataclass(frozen=True, kw_only=True)
class MeasureNeeds:
    """The measures to read, by where they are stored: per district, per parent area (given to
    each of its districts), per treatment plant. The default: those of earlier releases."""

    district: tuple[str, ...] = DISTRICT_MEASURES
    area: tuple[str, ...] = AREA_MEASURES
    plant: tuple[str, ...] = PLANT_MEASURES


log = logging.getLogger(__name__)


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
    # missing (:func:`~server.services.stored_values.usable`); ``ww_plants``: some plant serving
    # the district had one.
    invalid: Mapping[str, NDArray[np.bool_]] = field(default_factory=dict)
    bad_values: tuple[BadValue, ...] = ()
    # The store's measure catalogue (name -> kind of measure) the declarations are checked on.
    measure_kinds: Mapping[str, str] = field(default_factory=dict)
    # Per plant measure, (plants, days): unusable values / past the feed's limit, so that each
    # wastewater target (one per pathogen) is judged on its own measures (``ww_plants``: all).
    plant_invalid: Mapping[str, NDArray[np.bool_]] = field(default_factory=dict)
    plant_stale: Mapping[str, NDArray[np.bool_]] = field(default_factory=dict)
    # Testing changes an analyst dismissed: (district code, change date, office day dismissed),
    # read as known at ``as_of`` (:mod:`server.services.testing_reviews`).
    testing_dismissals: tuple[tuple[str, date, date], ...] = ()

    def plants_invalid(self, *measures: str) -> NDArray[np.bool_]:
        """(districts, days): some plant serving the district had an unusable value of one of
        ``measures`` (``ww_plants`` when they were not read apart)."""
        if not all(m in self.plant_invalid for m in measures):
            return self.invalid.get("ww_plants", np.zeros(
                (len(self.regions), self.dates.size), dtype=bool))
        bad = np.logical_or.reduce([self.plant_invalid[m] for m in measures])
        return (self.served > 0).astype(np.float64) @ bad.astype(np.float64) > 0

    def plants_stale(self, *measures: str) -> NDArray[np.bool_] | None:
        """(districts, days): every plant serving the district is past its feed's limit for one
        of ``measures`` (None: nowhere known; ``ww_plants`` when they were not read apart)."""
        if not all(m in self.plant_stale for m in measures):
            return self.stale_of("ww_plants")
        return _all_plants_stale(
            np.logical_or.reduce([self.plant_stale[m] for m in measures]), self.served)

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


def load_district_data(
    *, session: Session, start: date, end: date, as_of: datetime | None = None,
    stale_after: Mapping[str, timedelta] | None = None, nowcast: bool = True,
    time_zone: tzinfo = UTC, needs: MeasureNeeds | None = None,
) -> DistrictData:
    """Dense district, area and plant arrays over ``start..end`` as known at ``as_of``.

    With ``stale_after`` (feed name -> staleness limit, :func:`feed_limits`), ``stale`` marks
    each measure's days past its feed's limit (:func:`stale_masks`); without it nothing is
    marked and only the ruleset's ``max_age_days`` applies. With ``nowcast`` the count
    measures carry their delay models (:func:`nowcast_inputs`, days of receipt in
    ``time_zone``). ``needs`` says which measures to read (default: :class:`MeasureNeeds`,
    those of earlier releases; :func:`server.services.indicator_kinds.measure_needs` gives
    those of a ruleset).
    """
    needs = needs or MeasureNeeds()
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
        session=session, measures=needs.district, start=start, end=end, regions=codes,
        as_of=as_of,
    )
    areas = sorted({p for p in parents if p is not None})
    area = read_dense(
        session=session, measures=needs.area, start=start, end=end, regions=areas, as_of=as_of
    )
    pick = np.array([areas.index(p) if p in areas else -1 for p in parents])
    n_days = district.dates.size
    area_of_district = {  # no area above any district: unknown (indexing an empty array fails)
        m: np.where(pick[:, None] >= 0, area[m][np.maximum(pick, 0)], np.nan) if areas
        else np.full((len(codes), n_days), np.nan)
        for m in needs.area
    }
    plant_rows = session.execute(
        select(Region.code, Region.population).where(Region.level == "plant").order_by(Region.code)
    ).all()
    plant_codes = [r[0] for r in plant_rows]
    plant = read_dense(
        session=session, measures=needs.plant, start=start, end=end, regions=plant_codes,
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
    district_values, invalid = clean_arrays(district.values, codes, district.dates, count=True,
                                      found=found)
    area_values, area_bad = clean_arrays(area.values, areas, district.dates, count=True,
                                         found=found)
    for m in needs.area:
        area_of_district[m] = np.where(
            pick[:, None] >= 0, area_values[m][np.maximum(pick, 0)], np.nan) if areas else (
            area_of_district[m])
        invalid[m] = (pick[:, None] >= 0) & area_bad[m][np.maximum(pick, 0)] if areas else (
            np.zeros((len(codes), n_days), dtype=bool))
    plant_values, plant_bad = clean_arrays(plant.values, plant_codes, district.dates, count=False,
                                     found=found)
    invalid["ww_plants"] = (served > 0).astype(np.float64) @ _any_plant(
        plant_bad, len(plant_codes), n_days).astype(np.float64) > 0
    for bad in found[:20]:
        log.warning("stored %s of %s on %s is %s (%r): read as missing, its indicators are "
                    "invalid", bad.measure, bad.region, bad.ref_date, bad.problem, bad.value)
    if len(found) > 20:
        log.warning("%d more unusable stored values", len(found) - 20)
    levels = tuple(
        "small_district" if p < SMALL_DISTRICT_POPULATION else "district" for p in population
    )
    stale: dict[str, NDArray[np.bool_]] = {}
    plants: dict[str, NDArray[np.bool_]] = {}
    if stale_after is not None:
        dates = district.dates
        stale.update(stale_masks(session=session, regions=codes, measures=needs.district,
                                 dates=dates, as_of=as_of, stale_after=stale_after))
        for m, mask in stale_masks(session=session, regions=areas, measures=needs.area,
                                   dates=dates, as_of=as_of, stale_after=stale_after).items():
            stale[m] = (pick[:, None] >= 0) & mask[np.maximum(pick, 0)] if areas else np.zeros(
                (len(codes), dates.size), dtype=bool)
        plants = stale_masks(session=session, regions=plant_codes, measures=needs.plant,
                             dates=dates, as_of=as_of, stale_after=stale_after)
        stale["ww_plants"] = _all_plants_stale(_any_plant(plants, len(plant_codes), n_days),
                                                  served)
    return DistrictData(
        regions=codes, levels=levels, population=population, dates=district.dates,
        district=district_values, area_of_district=area_of_district, plant=plant_values,
        plant_population=np.array([r[1] for r in plant_rows], dtype=np.float64),
        served=served, as_of=as_of, stale=stale, invalid=invalid, bad_values=tuple(found),
        plant_invalid=plant_bad, plant_stale=plants,
        measure_kinds=store_measures(session=session),
        testing_dismissals=dismissals(session=session, as_of=as_of),
        nowcasts=nowcast_inputs(
            session=session, regions=codes, groups=parents, dates=district.dates, as_of=as_of,
            group_names={r[2]: r[3] for r in rows if r[2] is not None}, time_zone=time_zone,
            measures=nowcast_measures(needs.district),
        ) if nowcast else {},
    )


def store_measures(*, session: Session) -> dict[str, str]:
    """The store's measure catalogue: name -> kind of measure (count, level, concentration)."""
    return {row[0]: row[1] for row in session.execute(select(Measure.name, Measure.kind))}


def _any_plant(
    masks: Mapping[str, NDArray[np.bool_]], plants: int, days: int
) -> NDArray[np.bool_]:
    """(plants, days): any of the plant measures' ``masks`` (all False without any).

    The wastewater indicators of every plant measure share it: a bad or stale value of one
    measure flags the others' districts too (as the one pair of earlier releases did)."""
    out = np.zeros((plants, days), dtype=bool)
    for mask in masks.values():
        out |= mask
    return out


def _all_plants_stale(
    plant_stale: NDArray[np.bool_], served: NDArray[np.float64]
) -> NDArray[np.bool_]:
    """(districts, days): every plant serving the district is stale (none serving: False)."""
    serving = served > 0
    fresh = serving.astype(np.float64) @ (~plant_stale).astype(np.float64)
    return serving.any(axis=1)[:, None] & (fresh == 0)
