"""Tests for the invented county map (demo_seed.geography)."""

from __future__ import annotations

import json
from itertools import combinations
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.sparse.csgraph import connected_components

from demo_seed.geography import Geography, build_geography, ring_area, write_geojson
from demo_seed.polygon import clip_convex, signed_area

SHIPPED = Path(__file__).resolve().parents[2] / "demo_seed" / "county.geojson"


@pytest.fixture(scope="module")
def geo() -> Geography:
    return build_geography()


def _rings(geojson: dict) -> list[list[list[float]]]:
    rings = []
    for feature in geojson["features"]:
        geom = feature["geometry"]
        polys = [geom["coordinates"]] if geom["type"] == "Polygon" else geom["coordinates"]
        rings += [poly[0] for poly in polys]
    return rings


def test_build_geography_has_fourteen_districts_in_three_regions(geo: Geography) -> None:
    assert len(geo.districts) == 14
    assert sorted({d.region for d in geo.districts}) == ["R1", "R2", "R3"]


def test_build_geography_populations_in_range(geo: Geography) -> None:
    pops = geo.district_populations()
    assert pops.min() >= 8_000 and pops.max() <= 400_000
    assert 1_200_000 <= geo.population <= 1_400_000


def test_build_geography_region_population_is_sum(geo: Geography) -> None:
    for region in geo.regions:
        members = [d.population for d in geo.districts if d.region == region.code]
        assert region.population == sum(members)


def test_geojson_rings_closed(geo: Geography) -> None:
    for ring in _rings(geo.to_geojson()):
        assert ring[0] == ring[-1]


def test_geojson_exteriors_counter_clockwise(geo: Geography) -> None:
    # RFC 7946 section 3.1.6: exterior rings are counter-clockwise
    for ring in _rings(geo.to_geojson()):
        assert signed_area(np.array(ring)[:-1]) > 0


def test_geojson_coordinates_rounded_to_five_decimals(geo: Geography) -> None:
    coords = np.concatenate([np.array(r) for r in _rings(geo.to_geojson())])
    assert_allclose(coords, np.round(coords, 5), atol=0, rtol=0)


def test_district_cells_cover_outline(geo: Geography) -> None:
    total = sum(ring_area(d.ring) for d in geo.districts)
    # shoelace areas: the cells must tile the outline to within 1 %
    assert_allclose(total, ring_area(geo.outline), rtol=0.01)


def test_district_cells_do_not_overlap(geo: Geography) -> None:
    overlap = 0.0
    for a, b in combinations(geo.districts, 2):
        inter = clip_convex(np.array(a.ring), np.array(b.ring))
        overlap += signed_area(inter) if inter.shape[0] else 0.0
    assert overlap < 0.01 * ring_area(geo.outline)


def test_district_neighbours_symmetric(geo: Geography) -> None:
    adj = geo.adjacency()
    assert np.array_equal(adj, adj.T) and not adj.diagonal().any()


def test_regions_are_contiguous(geo: Geography) -> None:
    adj = geo.adjacency()
    idx = geo.region_index()
    for k in range(len(geo.regions)):
        sub = adj[np.ix_(idx == k, idx == k)]
        assert connected_components(sub, directed=False)[0] == 1


def test_catchment_shares_per_district_at_most_one(geo: Geography) -> None:
    served = geo.catchment_matrix().sum(axis=0)
    assert np.all((served >= 0) & (served <= 1.0 + 1e-12))


def test_catchment_unserved_are_the_smallest_districts(geo: Geography) -> None:
    served = geo.catchment_matrix().sum(axis=0)
    order = np.argsort(geo.district_populations())
    unserved = np.flatnonzero(served == 0)
    assert 2 <= unserved.size <= 3 and set(unserved) <= set(order[:3])


def test_icu_beds_per_100k_in_range(geo: Geography) -> None:
    for region in geo.regions:
        assert 8.0 <= region.icu_beds / region.population * 1e5 <= 12.0


def test_geojson_properties_contract(geo: Geography) -> None:
    features = geo.to_geojson()["features"]
    levels = [f["properties"]["level"] for f in features]
    assert levels == ["county"] + ["region"] * 3 + ["district"] * 14
    assert all(set(f["properties"]) == {"code", "name", "level", "parent", "population"}
               for f in features)
    assert features[0]["properties"]["parent"] is None


def test_shipped_geojson_equals_fresh_build(geo: Geography) -> None:
    assert json.loads(SHIPPED.read_text(encoding="utf-8")) == geo.to_geojson()


def test_write_geojson_roundtrip(tmp_path: Path, geo: Geography) -> None:
    path = write_geojson(tmp_path / "map.geojson")
    assert json.loads(path.read_text(encoding="utf-8")) == geo.to_geojson()


def test_plants_lie_in_their_host_district(geo: Geography) -> None:
    rings = {d.code: np.array(d.ring) for d in geo.districts}
    for plant in geo.plants:
        ring = rings[plant.district]
        a, b = ring, np.roll(ring, -1, axis=0)
        x, y = plant.location
        cross = (b[:, 0] - a[:, 0]) * (y - a[:, 1]) - (b[:, 1] - a[:, 1]) * (x - a[:, 0])
        # a point is inside a convex counter-clockwise polygon iff it is left of every edge
        assert np.all(cross >= 0), plant.code
