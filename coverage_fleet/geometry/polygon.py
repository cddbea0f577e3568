"""Small exact operations on convex polygons: half-plane clipping and uniform moments.

Vertices are (k, 2) arrays in counter-clockwise order. Moments are taken about a chosen
point `about` (the agent's position) with the vertices shifted first, so the numbers stay
well conditioned far from the map origin.
"""

from __future__ import annotations

import numpy as np

EMPTY_POLYGON = np.zeros((0, 2))
EMPTY_POLYGON.setflags(write=False)


def clip_halfplane(polygon: np.ndarray, normal: np.ndarray, offset: float) -> np.ndarray:
    """Part of a convex polygon with normal . p <= offset (Sutherland-Hodgman against one
    line, vectorised). The result is convex and counter-clockwise, possibly empty (0, 2)."""
    if len(polygon) == 0:
        return polygon
    side = polygon @ normal - offset
    inside = side <= 0.0
    if inside.all():
        return polygon
    if not inside.any():
        return EMPTY_POLYGON
    following = np.roll(polygon, -1, axis=0)
    side_next = np.roll(side, -1)
    crossing = inside != np.roll(inside, -1)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(crossing, side / (side - side_next), 0.0)
    cut = polygon + t[:, None] * (following - polygon)
    # Walk the boundary once: each vertex if kept, then the crossing on its outgoing edge.
    candidates = np.stack([polygon, cut], axis=1).reshape(-1, 2)
    keep = np.column_stack([inside, crossing]).reshape(-1)
    out = candidates[keep]
    if len(out) < 3:
        return EMPTY_POLYGON
    return out


def polygon_area(polygon: np.ndarray) -> float:
    """Shoelace area (positive for counter-clockwise order), relative to vertex 0."""
    if len(polygon) < 3:
        return 0.0
    local = polygon - polygon[0]
    x, y = local[:, 0], local[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def uniform_moments(polygon: np.ndarray, about: np.ndarray) -> tuple[float, np.ndarray, float]:
    """Area, first moment and polar second moment of a polygon about `about`, for unit
    density: (integral dq, integral (q - about) dq, integral ||q - about||^2 dq).

    Closed form via Green's theorem on each edge (the shoelace family; e.g. Bourke,
    "Calculating the area and centroid of a polygon", 1988; second moments as in Steger,
    "On the calculation of arbitrary moments of polygons", 1996). Exact up to rounding.
    """
    if len(polygon) < 3:
        return 0.0, np.zeros(2), 0.0
    local = polygon - about
    x, y = local[:, 0], local[:, 1]
    xn, yn = np.roll(x, -1), np.roll(y, -1)
    cross = x * yn - xn * y
    area = 0.5 * float(cross.sum())
    first = np.array([np.dot(x + xn, cross), np.dot(y + yn, cross)]) / 6.0
    polar = float(np.dot(x * x + x * xn + xn * xn + y * y + y * yn + yn * yn, cross)) / 12.0
    return area, first, polar
