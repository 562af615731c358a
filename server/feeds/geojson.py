"""Reading a region map from an RFC 7946 GeoJSON FeatureCollection, with validation.

Each Feature is one region; its ``properties`` carry ``code`` (required, unique), ``population``
(required, positive integer), ``name`` (defaults to the code), ``level`` (defaults to ``district``),
``parent`` (code of the enclosing region, optional) and any other attributes, which are kept.
Geometries must be Polygon or MultiPolygon with closed rings of at least four positions, longitudes
in [-180, 180], latitudes in [-90, 90], non-zero area and no self-crossing edges.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import numpy as np

from server.feeds.errors import FeedFileError
from server.store.catalogue import RegionRecord

RESERVED = {"code", "name", "level", "parent", "population"}
LEVELS = ("country", "state", "county", "region", "district", "plant")


def read_regions_geojson(path: Path) -> list[RegionRecord]:
    """Parse and validate ``path``; raises :class:`FeedFileError` naming the feature and field."""
    label = str(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise FeedFileError(label, "", f"cannot read the file ({exc.strerror})") from None
    try:
        document = json.loads(raw.decode("utf-8-sig"))
    except UnicodeDecodeError as exc:
        raise FeedFileError(label, f"byte {exc.start}", "not UTF-8 text") from None
    except json.JSONDecodeError as exc:
        raise FeedFileError(
            label, f"line {exc.lineno} column {exc.colno}", f"not valid JSON ({exc.msg})"
        ) from None
    return parse_regions(document, label=label)


def parse_regions(document: Any, *, label: str = "<geojson>") -> list[RegionRecord]:
    """Validate an already-decoded GeoJSON document and return one record per feature."""
    if not isinstance(document, dict) or document.get("type") != "FeatureCollection":
        found = document.get("type") if isinstance(document, dict) else type(document).__name__
        raise FeedFileError(label, "type", f"expected a FeatureCollection, found {found!r}")
    features = document.get("features")
    if not isinstance(features, list) or not features:
        raise FeedFileError(label, "features", "expected a non-empty list of features")
    records: list[RegionRecord] = []
    seen: dict[str, int] = {}
    for index, feature in enumerate(features):
        record = _feature(feature, f"features[{index}]", label)
        if record.code in seen:
            raise FeedFileError(
                label, f"features[{index}].properties.code",
                f"code {record.code!r} already used by features[{seen[record.code]}]",
            )
        seen[record.code] = index
        records.append(record)
    return records


def check_parents(records: Sequence[RegionRecord], known: set[str], *, label: str) -> None:
    """Every parent must be in the file or already stored; a region may not be its own ancestor."""
    codes = {r.code for r in records} | known
    parent_of = {r.code: r.parent for r in records}
    for index, rec in enumerate(records):
        where = f"features[{index}].properties.parent"
        if rec.parent is not None and rec.parent not in codes:
            raise FeedFileError(label, where, f"unknown parent region {rec.parent!r}")
        seen, node = {rec.code}, rec.parent
        while node is not None and node in parent_of:
            if node in seen:
                raise FeedFileError(label, where, f"parent chain of {rec.code!r} loops")
            seen.add(node)
            node = parent_of[node]


def _feature(feature: Any, where: str, label: str) -> RegionRecord:
    if not isinstance(feature, dict) or feature.get("type") != "Feature":
        raise FeedFileError(label, f"{where}.type", "expected a Feature")
    props = feature.get("properties")
    if not isinstance(props, dict):
        raise FeedFileError(label, f"{where}.properties", "missing properties object")
    code = props.get("code")
    if not isinstance(code, str) or not code.strip():
        raise FeedFileError(label, f"{where}.properties.code", "missing or empty region code")
    where_code = f"{where} ({code})"
    population = props.get("population")
    if (
        isinstance(population, bool)
        or not isinstance(population, (int, float))
        or population != int(population)
        or population <= 0
    ):
        raise FeedFileError(
            label, f"{where_code}.properties.population",
            f"population must be a positive whole number, got {population!r}",
        )
    level = props.get("level", "district")
    if level not in LEVELS:
        raise FeedFileError(
            label, f"{where_code}.properties.level",
            f"unknown level {level!r}; expected one of {', '.join(LEVELS)}",
        )
    parent = props.get("parent")
    if parent is not None and not isinstance(parent, str):
        raise FeedFileError(label, f"{where_code}.properties.parent", "parent must be a code")
    name = props.get("name", code)
    if not isinstance(name, str):
        raise FeedFileError(label, f"{where_code}.properties.name", "name must be text")
    geometry = feature.get("geometry")
    if geometry is not None:
        _check_geometry(geometry, f"{where_code}.geometry", label)
    return RegionRecord(
        code=code.strip(), name=name, level=level, parent=parent, population=int(population),
        geometry=geometry, attributes={k: v for k, v in props.items() if k not in RESERVED},
    )


def _check_geometry(geometry: Any, where: str, label: str) -> None:
    if not isinstance(geometry, dict):
        raise FeedFileError(label, where, "geometry must be an object")
    kind, coords = geometry.get("type"), geometry.get("coordinates")
    if kind == "Polygon":
        polygons = [coords]
    elif kind == "MultiPolygon" and isinstance(coords, list):
        polygons = coords
    else:
        raise FeedFileError(
            label, f"{where}.type", f"expected Polygon or MultiPolygon, got {kind!r}"
        )
    for p, polygon in enumerate(polygons):
        if not isinstance(polygon, list) or not polygon:
            raise FeedFileError(label, f"{where}.coordinates[{p}]", "polygon has no rings")
        for r, ring in enumerate(polygon):
            path = f"{where}.coordinates" + (f"[{p}]" if kind == "MultiPolygon" else "") + f"[{r}]"
            _check_ring(ring, path, label)


def _check_ring(ring: Any, where: str, label: str) -> None:
    try:
        points = np.asarray(ring, dtype=np.float64)
    except (TypeError, ValueError):
        raise FeedFileError(
            label, where, "positions must be [longitude, latitude] numbers"
        ) from None
    if points.ndim != 2 or points.shape[1] < 2:
        raise FeedFileError(label, where, "positions must be [longitude, latitude] pairs")
    points = points[:, :2]
    if len(points) < 4:
        raise FeedFileError(label, where, f"a ring needs at least 4 positions, found {len(points)}")
    if not np.isfinite(points).all():
        raise FeedFileError(label, where, "positions must be finite numbers")
    if (np.abs(points[:, 0]) > 180).any() or (np.abs(points[:, 1]) > 90).any():
        raise FeedFileError(label, where, "longitude or latitude out of range")
    if not np.array_equal(points[0], points[-1]):
        raise FeedFileError(label, where, "ring is not closed (first and last positions differ)")
    crossing = _first_self_crossing(points)
    if crossing is not None:
        raise FeedFileError(label, where, f"ring edges {crossing[0]} and {crossing[1]} cross")
    x, y = points[:, 0], points[:, 1]
    if abs(float(np.dot(x[:-1], y[1:]) - np.dot(x[1:], y[:-1]))) < 1e-14:
        raise FeedFileError(label, where, "ring has zero area")


def _first_self_crossing(points: np.ndarray) -> tuple[int, int] | None:
    """Indices of two non-adjacent edges that properly cross, or None (vectorised O(n^2))."""
    a, b = points[:-1], points[1:]
    n = len(a)
    if n < 4 or n > 4000:  # larger rings are trusted: the check would cost too much memory
        return None

    def orient(p: np.ndarray, q: np.ndarray, r: np.ndarray) -> np.ndarray:
        return np.sign(
            (q[..., 0] - p[..., 0]) * (r[..., 1] - p[..., 1])
            - (q[..., 1] - p[..., 1]) * (r[..., 0] - p[..., 0])
        )

    i, j = np.triu_indices(n, k=2)
    keep = ~((i == 0) & (j == n - 1))  # first and last edges share the closing vertex
    i, j = i[keep], j[keep]
    d1 = orient(a[i], b[i], a[j])
    d2 = orient(a[i], b[i], b[j])
    d3 = orient(a[j], b[j], a[i])
    d4 = orient(a[j], b[j], b[i])
    hit = (d1 * d2 < 0) & (d3 * d4 < 0)
    if hit.any():
        k = int(np.argmax(hit))
        return int(i[k]), int(j[k])
    return None
