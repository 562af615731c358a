"""Read model: the staff page of a region above the districts (an area, the county).

``/staff/district/{code}`` answers for an area's or the county's code with this page: the
region's daily cases and hospital admissions over the period shown, summed from its districts
(:func:`server.services.stream_breaks.daily_counts`: a day is known only when every district
reported it), and the breaks, events and agreement of :func:`server.readmodels.district_marks.
district_marks` for the region (its wastewater that of the plant serving most of its people,
not a sum over plants). Tiers are not shown here: a policy set at the districts assesses
districts; the tiers of policies set at an area's or the county's level are on the area's
capacity page.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.readmodels.district_marks import DistrictMarks, district_marks, members_of
from server.readmodels.dossier import check_period
from server.services.errors import ServiceError
from server.services.stream_breaks import MEASURE, daily_counts
from server.store.models import Measure, Observation, Region

__all__ = ["NoRegionDataError", "RegionBreaks", "is_above_districts", "region_breaks"]

#: Days shown when the page is asked for no period (as the district page).
DEFAULT_DAYS = 120


class NoRegionDataError(ServiceError, LookupError):
    """An area or county code without districts or without any cases of them (the page answers
    404)."""

    def __init__(self, code: str) -> None:
        super().__init__(f"no cases of the districts of region {code!r}")


@dataclass(frozen=True, kw_only=True)
class RegionBreaks:
    """What the page of an area or the county shows."""

    code: str
    name: str
    level: str
    population: int | None
    #: the region it lies in (code, name): the county of an area, None for the county
    parent: tuple[str, str] | None
    start: dt.date
    end: dt.date
    #: first and last day with cases of any of its districts
    first_day: dt.date
    last_day: dt.date
    dates: tuple[dt.date, ...]
    #: daily counts summed over its districts (None: a day not every district reported)
    cases: tuple[float | None, ...]
    admissions: tuple[float | None, ...] | None  # None: the store holds no admissions
    marks: DistrictMarks


def is_above_districts(*, session: Session, code: str) -> bool:
    """Whether ``code`` names a region with districts below it (an area, the county)."""
    level, summed, _plants = members_of(session, code)
    return level not in ("district", "plant") and bool(summed)


def _tuple(values: np.ndarray) -> tuple[float | None, ...]:
    return tuple(float(v) if np.isfinite(v) else None for v in values)


def region_breaks(*, session: Session, code: str, start: dt.date | None = None,
                  end: dt.date | None = None, days: int = DEFAULT_DAYS) -> RegionBreaks:
    """The page of area or county ``code`` for ``start..end`` (default: the last ``days`` days
    with cases). Raises :class:`NoRegionDataError` for a code that is not above the districts
    or whose districts have no cases, :class:`~server.readmodels.dossier.PeriodError` when
    ``start > end``."""
    check_period(start, end)
    level, summed, _plants = members_of(session, code)
    if level in ("district", "plant") or not summed:
        raise NoRegionDataError(code)
    regions = {r.id: r for r in session.scalars(select(Region))}
    region = next(r for r in regions.values() if r.code == code)
    mine = [r.id for r in regions.values() if r.code in dict(summed)]
    span = session.execute(
        select(func.min(Observation.ref_date), func.max(Observation.ref_date))
        .join(Measure, Measure.id == Observation.measure_id)
        .where(Measure.name == MEASURE["cases"], Observation.region_id.in_(mine))).one()
    if span[0] is None:
        raise NoRegionDataError(code)
    first, last = span
    end = min(end or last, last)
    start = min(max(start or end - dt.timedelta(days=days - 1), first), end)
    cases = daily_counts(session, MEASURE["cases"], [code], start, end, regions)
    admissions = daily_counts(session, MEASURE["admissions"], [code], start, end, regions)
    if cases is None:
        raise NoRegionDataError(code)
    marks = district_marks(session=session, code=code, start=start, end=end)
    parent = regions.get(region.parent_id) if region.parent_id is not None else None
    return RegionBreaks(
        code=region.code, name=region.name, level=region.level, population=region.population,
        parent=(parent.code, parent.name) if parent is not None else None,
        start=start, end=end, first_day=first, last_day=last,
        dates=tuple(start + dt.timedelta(days=k) for k in range((end - start).days + 1)),
        cases=_tuple(cases[0]), admissions=None if admissions is None else _tuple(admissions[0]),
        marks=marks)
