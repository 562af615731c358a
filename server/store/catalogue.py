"""Writes and reads of the region hierarchy, catchments and the measure catalogue."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from server.store.models import Catchment, Measure, Region


@dataclass(frozen=True, kw_only=True)
class RegionRecord:
    """A region as the importers hand it to the store (parent by code)."""

    code: str
    name: str
    level: str
    parent: str | None
    population: int
    geometry: dict[str, Any] | None = None
    attributes: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True, kw_only=True)
class MeasureRecord:
    """A catalogue measure. ``pathogen`` qualifies a base measure: name ``cases.influenza`` is
    ``cases`` of pathogen ``influenza`` (the name must be ``base.pathogen``)."""

    name: str
    unit: str
    kind: str
    aggregation: str
    description: str = ""
    pathogen: str | None = None

    def __post_init__(self) -> None:
        if self.pathogen is not None and not self.name.endswith(f".{self.pathogen}"):
            raise ValueError(f"measure {self.name!r}: a measure of pathogen {self.pathogen!r} "
                             f"is named BASE.{self.pathogen}")

    @property
    def base(self) -> str:
        """The measure this one qualifies (the name itself when unqualified)."""
        return self.name[: -len(self.pathogen) - 1] if self.pathogen else self.name


def upsert_regions(*, session: Session, records: Sequence[RegionRecord]) -> tuple[int, int]:
    """Insert new regions and update existing ones (matched by code); returns (added, updated).

    Parents may be given in any order within ``records``; a parent must exist in the records or the
    database (the importer checks this beforehand and names the feature).
    """
    existing = {r.code: r for r in session.scalars(select(Region))}
    added = updated = 0
    for rec in records:
        row = existing.get(rec.code)
        if row is None:
            row = Region(code=rec.code, name=rec.name, level=rec.level, population=rec.population)
            session.add(row)
            existing[rec.code] = row
            added += 1
        else:
            updated += 1
        row.name = rec.name
        row.level = rec.level
        row.population = rec.population
        row.geometry = rec.geometry
        row.attributes = dict(rec.attributes)
    session.flush()
    for rec in records:
        parent = existing.get(rec.parent) if rec.parent else None
        existing[rec.code].parent_id = parent.id if parent is not None else None
    session.flush()
    return added, updated


def replace_catchments(
    *, session: Session, shares: Iterable[tuple[str, str, float]]
) -> int:
    """Replace the catchment table with (plant code, district code, share) triples."""
    ids = dict(session.execute(select(Region.code, Region.id)).all())
    rows = [
        {"plant_id": ids[p], "district_id": ids[d], "share": float(s)} for p, d, s in shares
    ]
    session.execute(delete(Catchment))
    if rows:
        session.execute(Catchment.__table__.insert(), rows)
    return len(rows)


def upsert_measures(*, session: Session, records: Iterable[MeasureRecord]) -> int:
    """Insert or update catalogue entries by name; returns how many were added."""
    existing = {m.name: m for m in session.scalars(select(Measure))}
    added = 0
    for rec in records:
        row = existing.get(rec.name)
        if row is None:
            row = Measure(name=rec.name, unit=rec.unit, kind=rec.kind, aggregation=rec.aggregation)
            session.add(row)
            added += 1
        row.unit, row.kind = rec.unit, rec.kind
        row.aggregation, row.description = rec.aggregation, rec.description
        row.base, row.pathogen = rec.base, rec.pathogen
    session.flush()
    return added
