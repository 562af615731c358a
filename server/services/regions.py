"""Use case: import a region map (GeoJSON) into the store, all or nothing."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.feeds.geojson import check_parents, read_regions_geojson
from server.services.audit import record
from server.store import RegionRecord, replace_catchments, upsert_regions

__all__ = ["RegionImport", "RegionRecord", "import_regions", "store_catchments", "store_regions"]
from server.store.models import Region


@dataclass(frozen=True, kw_only=True)
class RegionImport:
    path: str
    added: int
    updated: int


def import_regions(*, session: Session, path: Path, actor: str = "cli") -> RegionImport:
    """Validate the whole file first, then upsert every region; a broken file changes nothing."""
    records = read_regions_geojson(path)
    known = set(session.scalars(select(Region.code)))
    check_parents(records, known, label=str(path))
    return store_regions(session=session, records=records, actor=actor, source=str(path))


def store_regions(
    *, session: Session, records: list[RegionRecord], actor: str, source: str
) -> RegionImport:
    """Upsert already-validated records (parents before children is not required)."""
    added, updated = upsert_regions(session=session, records=records)
    record(
        session=session, actor=actor, action="regions.import", subject=source,
        details={"added": added, "updated": updated},
    )
    return RegionImport(path=source, added=added, updated=updated)


def store_catchments(*, session: Session, shares: list[tuple[str, str, float]]) -> int:
    """Replace the wastewater catchment table with (plant, district, share of population)."""
    return replace_catchments(session=session, shares=shares)
