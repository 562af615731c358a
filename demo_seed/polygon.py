"""Planar polygon helpers for the invented demo map.

All names, places and numbers are invented for the demo.

Polygons are ``(n, 2)`` float arrays of vertices in order, *without* the closing vertex; the
GeoJSON writer closes the rings. Only what the demo map needs is here: the shoelace area,
orientation, Sutherland–Hodgman clipping against a convex polygon and a convex hull.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import ConvexHull

from demo_seed.errors import GeometryError

__all__ = [
    "clip_convex",
    "convex_hull",
    "ensure_ccw",
    "signed_area",
]


def signed_area(ring: np.ndarray) -> float:
    """Signed area of a simple polygon by the shoelace formula.

    Parameters
    ----------
    ring : numpy.ndarray
        Vertices, shape ``(n, 2)``; a closing vertex equal to the first one is allowed.

    Returns
    -------
    float
        Positive for counter-clockwise vertex order, negative for clockwise.

    Notes
    -----
    .. math:: A = \\tfrac12 \\sum_{k} (x_k y_{k+1} - x_{k+1} y_k)

    References
    ----------
    .. [1] Braden, B. (1986). The surveyor's area formula. The College Mathematics Journal
       17(4), 326-337.
    """
    pts = np.asarray(ring, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 2:
        raise GeometryError("ring", pts.shape, "must have shape (n, 2)")
    x, y = pts[:, 0], pts[:, 1]
    return float(0.5 * np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def ensure_ccw(ring: np.ndarray) -> np.ndarray:
    """Return the ring in counter-clockwise order (RFC 7946 exterior rings)."""
    pts = np.asarray(ring, dtype=float)
    return pts if signed_area(pts) >= 0 else pts[::-1].copy()


def convex_hull(points: np.ndarray) -> np.ndarray:
    """Vertices of the convex hull of ``points`` in counter-clockwise order.

    Uses :class:`scipy.spatial.ConvexHull` (Qhull), whose 2-D vertices come in
    counter-clockwise order.
    """
    pts = np.asarray(points, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 2 or pts.shape[0] < 3:
        raise GeometryError("points", pts.shape, "must have shape (n >= 3, 2)")
    hull = ConvexHull(pts)
    return ensure_ccw(pts[hull.vertices])


def _inside(points: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """True where points lie left of (or on) the directed edge a -> b."""
    cross = (b[0] - a[0]) * (points[:, 1] - a[1]) - (b[1] - a[1]) * (points[:, 0] - a[0])
    return cross >= -1e-12


def _intersection(p: np.ndarray, q: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Intersection of segment p-q with the infinite line through a-b."""
    d1 = q - p
    d2 = b - a
    denom = d1[0] * d2[1] - d1[1] * d2[0]
    t = ((a[0] - p[0]) * d2[1] - (a[1] - p[1]) * d2[0]) / denom
    return p + t * d1


def clip_convex(subject: np.ndarray, clip: np.ndarray) -> np.ndarray:
    """Clip a polygon by a convex polygon (Sutherland–Hodgman).

    Parameters
    ----------
    subject : numpy.ndarray
        Polygon to clip, shape ``(n, 2)``, any orientation.
    clip : numpy.ndarray
        Convex clipping polygon, shape ``(m, 2)``.

    Returns
    -------
    numpy.ndarray
        The clipped polygon, counter-clockwise, shape ``(k, 2)``; ``k == 0`` when the polygons
        do not overlap.

    Notes
    -----
    Each edge of the clip polygon defines a half-plane; the subject is cut by one half-plane
    after the other, keeping vertices inside and adding the crossing points of edges that
    cross the boundary. Correct for a convex clip polygon [1]_.

    References
    ----------
    .. [1] Sutherland, I. E. and Hodgman, G. W. (1974). Reentrant polygon clipping.
       Communications of the ACM 17(1), 32-42.
    """
    clip_pts = ensure_ccw(np.asarray(clip, dtype=float))
    output = ensure_ccw(np.asarray(subject, dtype=float))
    m = clip_pts.shape[0]
    for k in range(m):
        if output.shape[0] == 0:
            break
        a, b = clip_pts[k], clip_pts[(k + 1) % m]
        inside = _inside(output, a, b)
        result: list[np.ndarray] = []
        n = output.shape[0]
        for j in range(n):
            cur, prev = output[j], output[j - 1]
            cur_in, prev_in = inside[j], inside[j - 1]
            if cur_in:
                if not prev_in:
                    result.append(_intersection(prev, cur, a, b))
                result.append(cur)
            elif prev_in:
                result.append(_intersection(prev, cur, a, b))
        output = np.array(result, dtype=float).reshape(-1, 2)
    if output.shape[0] < 3:
        return np.zeros((0, 2))
    return ensure_ccw(output)
