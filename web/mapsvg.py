"""Server-side SVG map of the districts from their GeoJSON geometry (no tiles, no JavaScript).

Longitude and latitude (RFC 7946, WGS84) are projected equirectangularly with longitude scaled
by the cosine of the map's mean latitude, which keeps shapes true at district and county scale;
``y`` grows downwards as SVG wants. Polygons and multipolygons are drawn with their holes
(``fill-rule: evenodd``).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

__all__ = ["MapShape", "SvgMap", "svg_map"]

WIDTH = 640.0
PAD = 8.0


@dataclass(frozen=True, kw_only=True)
class MapShape:
    code: str
    path: str
    label_x: float
    label_y: float


@dataclass(frozen=True, kw_only=True)
class SvgMap:
    width: float
    height: float
    shapes: tuple[MapShape, ...]


def _rings(geometry: dict[str, Any] | None) -> list[list[Sequence[float]]]:
    if not geometry:
        return []
    kind, coords = geometry.get("type"), geometry.get("coordinates") or []
    if kind == "Polygon":
        return [list(r) for r in coords]
    if kind == "MultiPolygon":
        return [list(r) for poly in coords for r in poly]
    return []


def svg_map(items: Iterable[tuple[str, dict[str, Any] | None]], *, width: float = WIDTH) -> SvgMap:
    """Project every ``(code, geometry)`` into one SVG coordinate frame ``width`` wide."""
    rings = [(code, _rings(g)) for code, g in items]
    points = [p for _c, rs in rings for r in rs for p in r]
    if not points:
        return SvgMap(width=width, height=0.0, shapes=())
    lons = [float(p[0]) for p in points]
    lats = [float(p[1]) for p in points]
    k = math.cos(math.radians((min(lats) + max(lats)) / 2))
    span_x = max((max(lons) - min(lons)) * k, 1e-9)
    span_y = max(max(lats) - min(lats), 1e-9)
    scale = (width - 2 * PAD) / span_x
    height = span_y * scale + 2 * PAD
    x0, y1 = min(lons), max(lats)

    def xy(p: Sequence[float]) -> tuple[float, float]:
        return PAD + (float(p[0]) - x0) * k * scale, PAD + (y1 - float(p[1])) * scale

    shapes = []
    for code, rs in rings:
        if not rs:
            continue
        parts, cx, cy, area_sum = [], 0.0, 0.0, 0.0
        for ring in rs:
            pts = [xy(p) for p in ring]
            parts.append("M" + "L".join(f"{x:.1f},{y:.1f}" for x, y in pts) + "Z")
            a, sx, sy = _centroid(pts)
            cx, cy, area_sum = cx + sx, cy + sy, area_sum + a
        if abs(area_sum) > 1e-9:
            lx, ly = cx / (3 * area_sum), cy / (3 * area_sum)
        else:
            first = [xy(p) for p in rs[0]]
            lx = sum(x for x, _ in first) / len(first)
            ly = sum(y for _, y in first) / len(first)
        shapes.append(MapShape(code=code, path="".join(parts), label_x=round(lx, 1),
                               label_y=round(ly, 1)))
    return SvgMap(width=width, height=round(height, 1), shapes=tuple(shapes))


def _centroid(pts: list[tuple[float, float]]) -> tuple[float, float, float]:
    """Twice the signed area and the first moments of a ring (shoelace formula)."""
    a = sx = sy = 0.0
    for (x1, y1), (x2, y2) in zip(pts, pts[1:] + pts[:1], strict=True):
        cross = x1 * y2 - x2 * y1
        a += cross
        sx += (x1 + x2) * cross
        sy += (y1 + y2) * cross
    return a / 2, sx / 2, sy / 2
