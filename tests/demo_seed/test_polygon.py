"""Tests for demo_seed.polygon, checked against scipy.spatial (Qhull)."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.spatial import ConvexHull, HalfspaceIntersection

from demo_seed.errors import GeometryError
from demo_seed.polygon import clip_convex, convex_hull, ensure_ccw, signed_area


def _halfspaces(poly: np.ndarray) -> np.ndarray:
    """Half-spaces A x + b <= 0 of a counter-clockwise convex polygon."""
    nxt = np.roll(poly, -1, axis=0)
    edge = nxt - poly
    normal = np.column_stack([edge[:, 1], -edge[:, 0]])  # outward for CCW
    offset = -np.sum(normal * poly, axis=1)
    return np.column_stack([normal, offset])


def test_signed_area_unit_square_is_one() -> None:
    square = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    # shoelace formula (Braden 1986): a unit square has area 1
    assert_allclose(signed_area(square), 1.0)


def test_signed_area_clockwise_is_negative() -> None:
    square = np.array([[0.0, 0.0], [0.0, 1.0], [1.0, 1.0], [1.0, 0.0]])
    assert_allclose(signed_area(square), -1.0)


def test_signed_area_matches_qhull_on_random_hull() -> None:
    pts = np.random.default_rng(3).normal(size=(40, 2))
    hull = convex_hull(pts)
    # scipy.spatial.ConvexHull.volume is the area in 2-D
    assert_allclose(signed_area(hull), ConvexHull(pts).volume, rtol=1e-12)


def test_ensure_ccw_reverses_clockwise_ring() -> None:
    ring = np.array([[0.0, 0.0], [0.0, 2.0], [3.0, 0.0]])
    assert signed_area(ensure_ccw(ring)) > 0


@pytest.mark.parametrize("seed", [1, 2, 3], ids=["seed1", "seed2", "seed3"])
def test_clip_convex_area_matches_scipy_halfspace_intersection(seed: int) -> None:
    rng = np.random.default_rng(seed)
    a = convex_hull(rng.normal(size=(12, 2)))
    b = convex_hull(rng.normal(0.4, 1.0, size=(12, 2)))
    clipped = clip_convex(a, b)
    interior = clipped.mean(axis=0)
    # reference: intersection of the half-spaces of both polygons (scipy / Qhull)
    inter = HalfspaceIntersection(np.vstack([_halfspaces(a), _halfspaces(b)]), interior)
    assert_allclose(signed_area(clipped), ConvexHull(inter.intersections).volume, rtol=1e-9)


def test_clip_convex_disjoint_is_empty() -> None:
    a = np.array([[0.0, 0.0], [1.0, 0.0], [1.0, 1.0], [0.0, 1.0]])
    assert clip_convex(a, a + 5.0).shape == (0, 2)


def test_signed_area_bad_shape_raises() -> None:
    with pytest.raises(GeometryError, match="ring"):
        signed_area(np.zeros((4, 3)))
