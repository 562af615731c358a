"""Regions, catchments and measures (server/store/catalogue.py), on every back end."""

from __future__ import annotations

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from server.store import (
    MeasureRecord,
    RegionRecord,
    replace_catchments,
    upsert_measures,
    upsert_regions,
)
from server.store.models import Catchment, Measure, Region

# invented places
COUNTY = RegionRecord(code="K0", name="Kestrelford", level="county", parent=None, population=9)
NORTH = RegionRecord(code="KN", name="Northwick", level="district", parent="K0", population=5)
PLANT = RegionRecord(code="KP", name="Kestrel works", level="plant", parent="K0", population=4)


def _tree(session: Session) -> list[tuple[str, str | None, str, int]]:
    parent = aliased(Region)
    rows = session.execute(
        select(Region.code, parent.code, Region.name, Region.population)
        .outerjoin(parent, parent.id == Region.parent_id).order_by(Region.code)
    ).all()
    return [tuple(r) for r in rows]  # type: ignore[misc]


def test_upsert_regions_children_before_parents(session: Session) -> None:
    assert upsert_regions(session=session, records=[NORTH, COUNTY]) == (2, 0)
    assert _tree(session) == [("K0", None, "Kestrelford", 9), ("KN", "K0", "Northwick", 5)]


def test_upsert_regions_updates_by_code(session: Session) -> None:
    upsert_regions(session=session, records=[COUNTY, NORTH])
    moved = RegionRecord(code="KN", name="North Wick", level="district", parent=None,
                         population=6, attributes={"note": "renamed"})
    assert upsert_regions(session=session, records=[moved]) == (0, 1)
    assert _tree(session) == [("K0", None, "Kestrelford", 9), ("KN", None, "North Wick", 6)]
    row = session.scalar(select(Region).where(Region.code == "KN"))
    assert row is not None and row.attributes == {"note": "renamed"}


def test_replace_catchments_replaces_the_whole_table(session: Session) -> None:
    upsert_regions(session=session, records=[COUNTY, NORTH, PLANT])
    assert replace_catchments(session=session, shares=[("KP", "KN", 0.4), ("KP", "K0", 1.0)]) == 2
    assert replace_catchments(session=session, shares=[("KP", "KN", 0.75)]) == 1
    plant, district = aliased(Region), aliased(Region)
    rows = session.execute(
        select(plant.code, district.code, Catchment.share)
        .join(plant, plant.id == Catchment.plant_id)
        .join(district, district.id == Catchment.district_id)
    ).all()
    assert [tuple(r) for r in rows] == [("KP", "KN", 0.75)]
    assert replace_catchments(session=session, shares=[]) == 0
    assert session.scalars(select(Catchment)).all() == []


def test_upsert_measures_adds_new_and_updates_known(session: Session) -> None:
    first = MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum")
    assert upsert_measures(session=session, records=[first]) == 1
    again = MeasureRecord(name="cases", unit="people", kind="count", aggregation="sum",
                          description="confirmed")
    level = MeasureRecord(name="icu_occupied", unit="beds", kind="level", aggregation="sum")
    assert upsert_measures(session=session, records=[again, level]) == 1
    rows = session.execute(
        select(Measure.name, Measure.unit, Measure.description).order_by(Measure.name)
    ).all()
    assert [tuple(r) for r in rows] == [
        ("cases", "people", "confirmed"), ("icu_occupied", "beds", "")]
