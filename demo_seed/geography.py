"""The invented county of the demo: districts, regions, treatment plants and their map.

All names, places and numbers are invented for the demo.

The county "Corvenmark" has 14 districts in 3 regions. District cells are Voronoi cells of
hand-placed seed points, computed in a local equirectangular plane (longitude scaled by the
cosine of the reference latitude) and clipped to an irregular convex outline with
Sutherland–Hodgman. Coordinates are WGS84 longitude/latitude rounded to 5 decimals, exterior
rings counter-clockwise and closed (RFC 7946).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy.spatial import Voronoi

from demo_seed.errors import GeometryError
from demo_seed.polygon import clip_convex, convex_hull, ensure_ccw, signed_area

__all__ = [
    "COUNTY_CODE",
    "Catchment",
    "District",
    "Geography",
    "Plant",
    "Region",
    "build_geography",
    "ring_area",
    "write_geojson",
]

COUNTY_CODE = "C0"
COUNTY_NAME = "Corvenmark"
_LON0, _LAT0 = 11.8, 48.0
_XSCALE = float(np.cos(np.deg2rad(_LAT0)))
_DECIMALS = 5

# code, name, region, population, seed lon, seed lat  (all invented)
_DISTRICTS: tuple[tuple[str, str, str, int, float, float], ...] = (
    ("D01", "Corvenstadt", "R1", 398_400, 11.62, 48.14),
    ("D02", "Ostervale", "R1", 61_200, 11.41, 48.19),
    ("D03", "Wendmarsh", "R1", 84_700, 11.70, 48.31),
    ("D04", "Lirrowby", "R1", 47_300, 11.33, 48.01),
    ("D05", "Kessanthal", "R1", 112_600, 11.55, 47.96),
    ("D06", "Pellbrook", "R2", 73_900, 11.98, 48.27),
    ("D07", "Dunmaren", "R2", 38_400, 12.22, 48.18),
    ("D08", "Astrelholm", "R2", 156_300, 12.06, 48.03),
    ("D09", "Vorwick", "R2", 12_600, 12.30, 47.96),
    ("D10", "Sallowfen", "R2", 94_200, 11.86, 48.10),
    ("D11", "Haldenmoor", "R3", 8_100, 11.42, 47.78),
    ("D12", "Grennick", "R3", 131_500, 11.76, 47.83),
    ("D13", "Morrowdale", "R3", 52_800, 12.08, 47.79),
    ("D14", "Ebbelsee", "R3", 21_400, 11.93, 47.69),
)
# code, name, staffed ICU beds (about 8-12 per 100 000)
_REGIONS: tuple[tuple[str, str, int], ...] = (
    ("R1", "Upper Corven", 74),
    ("R2", "Astrel Downs", 37),
    ("R3", "Grennwater", 24),
)
# code, name, district it sits in, lon, lat
_PLANTS: tuple[tuple[str, str, str, float, float], ...] = (
    ("WW1", "Corvenstadt Central Works", "D01", 11.64, 48.12),
    ("WW2", "Kessan Weir", "D05", 11.50, 47.99),
    ("WW3", "Astrel Basin", "D08", 12.08, 48.01),
    ("WW4", "Pell Lock", "D10", 11.92, 48.17),
    ("WW5", "Grennick Marsh", "D12", 11.80, 47.81),
)
# plant, district, share of the district's population served. D09 and D11 are unserved.
_CATCHMENTS: tuple[tuple[str, str, float], ...] = (
    ("WW1", "D01", 0.92),
    ("WW1", "D03", 0.45),
    ("WW1", "D05", 0.25),
    ("WW2", "D02", 0.40),
    ("WW2", "D04", 0.70),
    ("WW2", "D05", 0.60),
    ("WW3", "D08", 0.85),
    ("WW3", "D10", 0.30),
    ("WW3", "D06", 0.20),
    ("WW4", "D06", 0.70),
    ("WW4", "D07", 0.50),
    ("WW4", "D10", 0.60),
    ("WW5", "D12", 0.90),
    ("WW5", "D13", 0.60),
    ("WW5", "D14", 0.40),
)

Ring = tuple[tuple[float, float], ...]


@dataclass(frozen=True)
class Catchment:
    """Share of a district's population whose sewage reaches a treatment plant."""

    plant: str
    district: str
    share: float


@dataclass(frozen=True)
class District:
    """One district: the smallest unit of the demo map."""

    code: str
    name: str
    region: str
    population: int
    ring: Ring
    neighbours: tuple[str, ...]
    seed: tuple[float, float]


@dataclass(frozen=True)
class Region:
    """A group of districts with its own ICU capacity."""

    code: str
    name: str
    population: int
    districts: tuple[str, ...]
    icu_beds: int


@dataclass(frozen=True)
class Plant:
    """A wastewater treatment plant."""

    code: str
    name: str
    district: str
    location: tuple[float, float]
    served_population: float


@dataclass(frozen=True)
class Geography:
    """The whole invented county; build it with :func:`build_geography`."""

    county_code: str
    county_name: str
    outline: Ring
    districts: tuple[District, ...]
    regions: tuple[Region, ...]
    plants: tuple[Plant, ...]
    catchments: tuple[Catchment, ...]

    @property
    def population(self) -> int:
        """Population of the county."""
        return sum(d.population for d in self.districts)

    @property
    def district_codes(self) -> tuple[str, ...]:
        """District codes in row order."""
        return tuple(d.code for d in self.districts)

    def district_populations(self) -> np.ndarray:
        """Populations in row order, shape ``(districts,)``."""
        return np.array([d.population for d in self.districts], dtype=float)

    def region_index(self) -> np.ndarray:
        """Index into :attr:`regions` for each district, shape ``(districts,)``."""
        codes = [r.code for r in self.regions]
        return np.array([codes.index(d.region) for d in self.districts])

    def adjacency(self) -> np.ndarray:
        """Boolean neighbour matrix, shape ``(districts, districts)``."""
        codes = self.district_codes
        adj = np.zeros((len(codes), len(codes)), dtype=bool)
        for i, d in enumerate(self.districts):
            for n in d.neighbours:
                adj[i, codes.index(n)] = True
        return adj

    def catchment_matrix(self) -> np.ndarray:
        """Served shares, shape ``(plants, districts)``."""
        plants = [p.code for p in self.plants]
        codes = self.district_codes
        mat = np.zeros((len(plants), len(codes)))
        for c in self.catchments:
            mat[plants.index(c.plant), codes.index(c.district)] = c.share
        return mat

    def district_geometry(self, code: str) -> dict[str, Any]:
        """GeoJSON Polygon of one district."""
        district = next(d for d in self.districts if d.code == code)
        return {"type": "Polygon", "coordinates": [_closed(district.ring)]}

    def region_geometry(self, code: str) -> dict[str, Any]:
        """GeoJSON MultiPolygon of one region (its district cells)."""
        members = next(r for r in self.regions if r.code == code).districts
        rings = [_closed(d.ring) for d in self.districts if d.code in members]
        return {"type": "MultiPolygon", "coordinates": [[ring] for ring in rings]}

    def county_geometry(self) -> dict[str, Any]:
        """GeoJSON Polygon of the county outline."""
        return {"type": "Polygon", "coordinates": [_closed(self.outline)]}

    def to_geojson(self) -> dict[str, Any]:
        """RFC 7946 FeatureCollection: the county, then regions, then districts."""
        features = [
            _feature(self.county_code, self.county_name, "county", None, self.population,
                     self.county_geometry())
        ]
        features += [
            _feature(r.code, r.name, "region", self.county_code, r.population,
                     self.region_geometry(r.code))
            for r in self.regions
        ]
        features += [
            _feature(d.code, d.name, "district", d.region, d.population,
                     self.district_geometry(d.code))
            for d in self.districts
        ]
        return {"type": "FeatureCollection", "features": features}


def _feature(code: str, name: str, level: str, parent: str | None, population: int,
             geometry: dict[str, Any]) -> dict[str, Any]:
    props = {"code": code, "name": name, "level": level, "parent": parent,
             "population": population}
    return {"type": "Feature", "id": code, "properties": props, "geometry": geometry}


def _closed(ring: Ring) -> list[list[float]]:
    coords = [[lon, lat] for lon, lat in ring]
    return coords + [coords[0]]


def _to_plane(lonlat: np.ndarray) -> np.ndarray:
    return np.column_stack([(lonlat[:, 0] - _LON0) * _XSCALE, lonlat[:, 1] - _LAT0])


def _to_lonlat(xy: np.ndarray) -> np.ndarray:
    return np.column_stack([xy[:, 0] / _XSCALE + _LON0, xy[:, 1] + _LAT0])


def _outline_plane() -> np.ndarray:
    """An irregular convex outline in the local plane (fixed, seeded noise)."""
    rng = np.random.default_rng(1873)
    angles = np.sort(rng.uniform(0.0, 2.0 * np.pi, 30))
    radius = 0.40 * (1.0 + 0.08 * np.cos(2.0 * angles - 0.7)) * rng.uniform(0.93, 1.0, 30)
    pts = np.column_stack([0.05 + radius * np.cos(angles) * 1.05, radius * np.sin(angles)])
    return convex_hull(pts)


def _rounded(xy: np.ndarray) -> Ring:
    """Plane -> lon/lat, rounded, consecutive duplicates dropped, counter-clockwise."""
    ll = np.round(_to_lonlat(xy), _DECIMALS)
    keep = np.ones(len(ll), dtype=bool)
    keep[1:] = np.any(ll[1:] != ll[:-1], axis=1)
    ll = ll[keep]
    if len(ll) > 1 and np.all(ll[0] == ll[-1]):
        ll = ll[:-1]
    ll = ensure_ccw(ll)
    return tuple((float(x), float(y)) for x, y in ll)


def _shared_edge(a: np.ndarray, b: np.ndarray, tol: float = 1e-9) -> bool:
    """True when two clipped cells share at least two vertices (an edge)."""
    dist = np.linalg.norm(a[:, None, :] - b[None, :, :], axis=2)
    return int(np.sum(dist.min(axis=1) < tol)) >= 2


def _cells(seeds: np.ndarray, outline: np.ndarray) -> list[np.ndarray]:
    """Voronoi cells of the seeds clipped to the outline, in the local plane."""
    span = float(np.ptp(outline, axis=0).max())
    far = 20.0 * span
    angles = np.linspace(0.0, 2.0 * np.pi, 16, endpoint=False)
    guards = np.column_stack([far * np.cos(angles), far * np.sin(angles)])
    vor = Voronoi(np.vstack([seeds, guards]))
    cells = []
    for i in range(len(seeds)):
        region = vor.regions[vor.point_region[i]]
        if -1 in region or len(region) < 3:
            raise GeometryError("seeds", i, "Voronoi cell is unbounded")
        cell = clip_convex(vor.vertices[region], outline)
        if cell.shape[0] == 0:
            raise GeometryError("seeds", i, "seed point lies outside the county outline")
        cells.append(cell)
    return cells


def build_geography() -> Geography:
    """Build the invented county (deterministic; no arguments).

    Returns
    -------
    Geography
        Districts with polygons and neighbours, regions with ICU beds, plants and catchments.

    Notes
    -----
    Neighbours are districts whose clipped Voronoi cells share an edge. A region's
    population is the sum of its districts'; a plant's served population is
    :math:`\\sum_d s_{p,d} N_d` over its catchment shares :math:`s_{p,d}`.

    References
    ----------
    .. [1] Okabe, A., Boots, B., Sugihara, K. and Chiu, S. N. (2000). Spatial Tessellations:
       Concepts and Applications of Voronoi Diagrams, 2nd ed. Wiley.
    """
    outline = _outline_plane()
    seeds = _to_plane(np.array([[d[4], d[5]] for d in _DISTRICTS]))
    cells = _cells(seeds, outline)
    codes = [d[0] for d in _DISTRICTS]
    neighbours: list[list[str]] = [[] for _ in codes]
    for i in range(len(codes)):
        for j in range(i + 1, len(codes)):
            if _shared_edge(cells[i], cells[j]):
                neighbours[i].append(codes[j])
                neighbours[j].append(codes[i])
    districts = tuple(
        District(code=code, name=name, region=region, population=pop,
                 ring=_rounded(cells[k]), neighbours=tuple(sorted(neighbours[k])),
                 seed=(lon, lat))
        for k, (code, name, region, pop, lon, lat) in enumerate(_DISTRICTS)
    )
    regions = tuple(
        Region(code=code, name=name,
               population=sum(d.population for d in districts if d.region == code),
               districts=tuple(d.code for d in districts if d.region == code),
               icu_beds=beds)
        for code, name, beds in _REGIONS
    )
    pops = {d.code: d.population for d in districts}
    catchments = tuple(Catchment(plant=p, district=d, share=s) for p, d, s in _CATCHMENTS)
    plants = tuple(
        Plant(code=code, name=name, district=district, location=(lon, lat),
              served_population=float(sum(c.share * pops[c.district]
                                          for c in catchments if c.plant == code)))
        for code, name, district, lon, lat in _PLANTS
    )
    return Geography(county_code=COUNTY_CODE, county_name=COUNTY_NAME,
                     outline=_rounded(outline), districts=districts, regions=regions,
                     plants=plants, catchments=catchments)


def ring_area(ring: Ring) -> float:
    """Shoelace area of a ring in squared degrees (positive for counter-clockwise)."""
    return signed_area(np.array(ring, dtype=float))


def write_geojson(path: str | Path) -> Path:
    """Write the county map as GeoJSON to ``path`` and return the path.

    The shipped ``demo_seed/county.geojson`` is produced by this function.
    """
    target = Path(path)
    text = json.dumps(build_geography().to_geojson(), indent=1, ensure_ascii=False)
    target.write_text(text + "\n", encoding="utf-8")
    return target
