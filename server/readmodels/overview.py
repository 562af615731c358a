"""Which data are on hand: the newest reference date of each measure for every region."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from server.store import latest_dates
from server.store.models import Measure, Region

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
