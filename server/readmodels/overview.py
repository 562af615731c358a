"""Read model: which data are on hand, the newest reference date of each measure for every region.

:func:`data_overview` reads them; :func:`data_on_hand` adds each measure's label for the morning
overview and keeps both per worker under the newest vintage id (they change only with new data).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from server.readmodels.cache import BoundedCache
from server.store import latest_dates
from server.store.models import Measure, Region, Vintage

__all__ = ["DataOverview", "MeasureLabel", "RegionFreshness", "data_on_hand", "data_overview",
           "measure_label"]

LEVEL_ORDER = {"county": 0, "region": 1, "district": 2, "plant": 3}


@dataclass(frozen=True, kw_only=True)
class RegionFreshness:
    code: str
    name: str
    level: str
    parent_name: str | None
    population: int
    latest: dict[str, date]
    received: datetime | None


@dataclass(frozen=True, kw_only=True)
class DataOverview:
    measures: tuple[str, ...]
    rows: tuple[RegionFreshness, ...]
    newest_ref_date: date | None

    def at_level(self, level: str) -> list[RegionFreshness]:
        return [r for r in self.rows if r.level == level]


def _regions_with_parent(session: Session) -> list[tuple[Region, str | None]]:
    parent = aliased(Region)
    query = select(Region, parent.name).outerjoin(parent, parent.id == Region.parent_id)
    return list(session.execute(query).all())


def data_overview(*, session: Session) -> DataOverview:
    """Every region with the newest reference date of each measure it reports."""
    measures = tuple(session.scalars(select(Measure.name).order_by(Measure.id)))
    latest: dict[str, dict[str, date]] = {}
    received: dict[str, datetime] = {}
    for item in latest_dates(session=session):
        latest.setdefault(item.region, {})[item.measure] = item.ref_date
        if item.region not in received or item.received_at > received[item.region]:
            received[item.region] = item.received_at
    rows = [
        RegionFreshness(
            code=region.code, name=region.name, level=region.level, parent_name=parent_name,
            population=region.population, latest=latest.get(region.code, {}),
            received=received.get(region.code),
        )
        for region, parent_name in _regions_with_parent(session)
    ]
    rows.sort(key=lambda r: (LEVEL_ORDER.get(r.level, 9), r.code))
    newest = max((d for r in rows for d in r.latest.values()), default=None)
    return DataOverview(measures=measures, rows=tuple(rows), newest_ref_date=newest)


@dataclass(frozen=True, kw_only=True)
class MeasureLabel:
    """How the overview names a measure: a short label and the catalogue's description."""

    name: str
    label: str
    unit: str
    description: str


#: Where a measure's description stops being its name ("Confirmed cases" of "Confirmed cases
#: by test date; provisional, ...").
_LABEL_ENDS = (";", ",", " by ", " at the ", " over ", " (")


def measure_label(name: str, unit: str, description: str) -> MeasureLabel:
    """A short label from the description's first phrase (the name when it has none)."""
    label = description.strip()
    for end in _LABEL_ENDS:
        label = label.split(end, 1)[0]
    label = label.strip().rstrip(".")
    return MeasureLabel(name=name, label=label or name.replace("_", " "), unit=unit,
                        description=description.strip())


#: the newest vintage's data on hand, per worker
_ON_HAND: BoundedCache[int, tuple[DataOverview, tuple[MeasureLabel, ...]]] = BoundedCache(size=1)


def data_on_hand(*, session: Session) -> tuple[int, DataOverview, tuple[MeasureLabel, ...]]:
    """The newest reference date of each measure per region and the measures' labels, cached
    per newest vintage (the key, returned with them)."""
    key = int(session.scalar(select(func.max(Vintage.id))) or 0)

    def build() -> tuple[DataOverview, tuple[MeasureLabel, ...]]:
        overview = data_overview(session=session)
        found = {
            name: measure_label(name, unit, description or "")
            for name, unit, description in session.execute(
                select(Measure.name, Measure.unit, Measure.description))
        }
        return overview, tuple(found.get(m, measure_label(m, "", "")) for m in overview.measures)

    return key, *_ON_HAND.get_or_build(key, build)
