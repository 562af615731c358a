"""GeoJSON region maps: good files parse, every kind of broken file says what and where."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from server.feeds.errors import FeedFileError
from server.feeds.geojson import check_parents, parse_regions, read_regions_geojson

SQUARE = [[[10.0, 50.0], [10.1, 50.0], [10.1, 50.1], [10.0, 50.1], [10.0, 50.0]]]


def feature(code: str = "Q1", population: object = 1200, **props: object) -> dict:
    return {
        "type": "Feature",
        "properties": {"code": code, "name": f"Quillby {code}", "population": population, **props},
        "geometry": {"type": "Polygon", "coordinates": SQUARE},
    }


def collection(*features: dict) -> dict:
    return {"type": "FeatureCollection", "features": list(features)}


def test_parse_regions_reads_code_population_and_extra_attributes() -> None:
    (rec,) = parse_regions(collection(feature(colour_hint="none", level="district")))
    assert (rec.code, rec.population, rec.level, rec.attributes) == (
        "Q1",
        1200,
        "district",
        {"colour_hint": "none"},
    )


def test_read_regions_geojson_not_json_names_line_and_column(tmp_path: Path) -> None:
    path = tmp_path / "broken.geojson"
    path.write_text('{"type": "FeatureCollection",\n  "features": [,]}')
    with pytest.raises(FeedFileError, match=r"broken\.geojson: line 2 column 16: not valid JSON"):
        read_regions_geojson(path)


def test_read_regions_geojson_accepts_utf8_bom(tmp_path: Path) -> None:
    path = tmp_path / "bom.geojson"
    path.write_bytes(b"\xef\xbb\xbf" + json.dumps(collection(feature())).encode())
    assert [r.code for r in read_regions_geojson(path)] == ["Q1"]


@pytest.mark.parametrize(
    ("document", "message"),
    [
        pytest.param({"type": "Feature"}, r"type: expected a FeatureCollection", id="wrong-type"),
        pytest.param([], r"type: expected a FeatureCollection, found 'list'", id="list"),
        pytest.param(collection(), r"features: expected a non-empty list", id="no-features"),
        pytest.param(
            collection({"type": "Feature", "properties": {"population": 5}, "geometry": None}),
            r"features\[0\]\.properties\.code: missing or empty region code",
            id="missing-code",
        ),
        pytest.param(
            collection(feature(population=None)),
            r"features\[0\] \(Q1\)\.properties\.population: population must be a positive",
            id="missing-population",
        ),
        pytest.param(
            collection(feature(population=-3)),
            r"population must be a positive whole number",
            id="negative-population",
        ),
        pytest.param(
            collection(feature(population=12.5)),
            r"got 12\.5",
            id="fractional-population",
        ),
        pytest.param(
            collection(feature(), feature()),
            r"features\[1\]\.properties\.code: code 'Q1' already",
            id="duplicate-code",
        ),
        pytest.param(
            collection(feature(level="galaxy")),
            r"unknown level 'galaxy'",
            id="unknown-level",
        ),
    ],
)
def test_parse_regions_refuses_broken_documents(document: object, message: str) -> None:
    with pytest.raises(FeedFileError, match=message):
        parse_regions(document, label="map.geojson")


def with_ring(ring: list) -> dict:
    f = feature()
    f["geometry"] = {"type": "Polygon", "coordinates": [ring]}
    return collection(f)


@pytest.mark.parametrize(
    ("ring", "message"),
    [
        pytest.param([[10, 50], [11, 50], [10, 50]], r"at least 4 positions, found 3", id="short"),
        pytest.param(
            [[10, 50], [11, 50], [11, 51], [10, 51]], r"ring is not closed", id="open-ring"
        ),
        pytest.param(
            [[10, 50], [11, 51], [11, 50], [10, 51], [10, 50]],
            r"ring edges 0 and 2 cross",
            id="bow-tie",
        ),
        pytest.param(
            [[10, 50], [11, 50], [12, 50], [10, 50]],
            r"ring has zero area",
            id="flat",
        ),
        pytest.param(
            [[10, 95], [11, 95], [11, 96], [10, 95]],
            r"latitude out of range",
            id="latitude",
        ),
        pytest.param(
            [[10, "x"], [1, 2], [3, 4], [10, "x"]],
            r"must be \[longitude, latitude\]",
            id="text-coordinate",
        ),
    ],
)
def test_parse_regions_refuses_invalid_polygons(ring: list, message: str) -> None:
    with pytest.raises(FeedFileError, match=r"features\[0\] \(Q1\)\.geometry\.coordinates\[0\]"):
        parse_regions(with_ring(ring))
    with pytest.raises(FeedFileError, match=message):
        parse_regions(with_ring(ring))


def test_parse_regions_refuses_point_geometry() -> None:
    f = feature()
    f["geometry"] = {"type": "Point", "coordinates": [10, 50]}
    with pytest.raises(FeedFileError, match=r"geometry\.type: expected Polygon or MultiPolygon"):
        parse_regions(collection(f))


def test_check_parents_unknown_parent_is_named() -> None:
    records = parse_regions(collection(feature(parent="NOWHERE")))
    with pytest.raises(FeedFileError, match=r"features\[0\]\.properties\.parent: unknown parent"):
        check_parents(records, set(), label="map.geojson")


def test_check_parents_accepts_parent_already_stored() -> None:
    records = parse_regions(collection(feature(parent="R9")))
    check_parents(records, {"R9"}, label="map.geojson")


def test_check_parents_refuses_loop() -> None:
    records = parse_regions(collection(feature("A", parent="B"), feature("B", parent="A")))
    with pytest.raises(FeedFileError, match="loops"):
        check_parents(records, set(), label="map.geojson")
