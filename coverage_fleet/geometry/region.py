"""The area a fleet covers: one convex polygon in metres, in the `map` frame (REP 103/105).

Convexity is required, not just convenient: it makes every bounded Voronoi cell convex (an
intersection of half-planes), keeps every cell centroid inside the area, and lets the MPC
state the geofence as linear inequalities A p <= b.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np

from coverage_fleet.errors import ConfigError, Problem
from coverage_fleet.inputs.fields import number_fault, type_message

#: Coordinates (m) within this distance of the map origin: a continent; beyond it a value is a
#: typing mistake, and squares of coordinates (moments, costs) stay far from overflow.
COORDINATE_MAX = 1e7

#: Relative tolerance (times the region's extent) for collinearity and containment tests.
RELATIVE_TOLERANCE = 1e-9


def signed_area(vertices: np.ndarray) -> float:
    """Shoelace formula: positive for counter-clockwise vertex order. Taken relative to
    vertex 0, so that coordinates far from the map origin do not cancel digits away."""
    local = vertices - vertices[0]
    x, y = local[:, 0], local[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _segments_cross(p1: np.ndarray, p2: np.ndarray, q1: np.ndarray, q2: np.ndarray) -> bool:
    """True if closed segments p1p2 and q1q2 share a point (orientation test, common
    practice; collinear overlaps count)."""

    def orient(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> float:
        return float((b[0] - a[0]) * (c[1] - a[1]) - (b[1] - a[1]) * (c[0] - a[0]))

    def on_segment(a: np.ndarray, b: np.ndarray, c: np.ndarray) -> bool:
        return bool(
            min(a[0], b[0]) <= c[0] <= max(a[0], b[0])
            and min(a[1], b[1]) <= c[1] <= max(a[1], b[1])
        )

    d1, d2 = orient(q1, q2, p1), orient(q1, q2, p2)
    d3, d4 = orient(p1, p2, q1), orient(p1, p2, q2)
    if ((d1 > 0 > d2) or (d1 < 0 < d2)) and ((d3 > 0 > d4) or (d3 < 0 < d4)):
        return True
    return (
        (d1 == 0 and on_segment(q1, q2, p1))
        or (d2 == 0 and on_segment(q1, q2, p2))
        or (d3 == 0 and on_segment(p1, p2, q1))
        or (d4 == 0 and on_segment(p1, p2, q2))
    )


def _self_intersections(vertices: np.ndarray) -> list[tuple[int, int]]:
    """Pairs of non-adjacent edges (edge i runs from vertex i to vertex i+1) that touch."""
    n = len(vertices)
    found = []
    for i in range(n):
        for j in range(i + 2, n):
            if i == 0 and j == n - 1:
                continue  # adjacent through the closing edge
            if _segments_cross(vertices[i], vertices[(i + 1) % n], vertices[j],
                               vertices[(j + 1) % n]):
                found.append((i, j))
    return found


@dataclass(frozen=True, eq=False)
class ConvexRegion:
    """A validated convex polygon, vertices counter-clockwise, no repeated or collinear
    vertices. Build it with `from_vertices`, which reports every problem it finds."""

    vertices: np.ndarray
    source: str = "<inline>"

    @classmethod
    def from_vertices(
        cls, vertices: Any, source: str = "<inline>", key: str = "region.vertices"
    ) -> ConvexRegion:
        """Validate and normalise a vertex list [[x, y], ...] in metres.

        Either orientation is accepted (stored counter-clockwise). Collinear vertices on an
        edge are dropped, since they add no constraint. Raises ConfigError naming `source`
        and `key` for: not a list of (x, y) pairs, non-finite values, fewer than 3 distinct
        vertices, repeated vertices, self-intersection, non-convexity, zero area.
        """
        rows = vertices.tolist() if isinstance(vertices, np.ndarray) else vertices
        if isinstance(rows, list | tuple):
            rows = [row.tolist() if isinstance(row, np.ndarray) else row for row in rows]
        if not isinstance(rows, list | tuple) or not all(
                isinstance(row, list | tuple) and len(row) == 2 for row in rows):
            raise ConfigError.single(
                source, key, type_message("a list of [x, y] pairs of numbers (metres)", vertices)
            )
        problems: list[Problem] = []
        for row, point in enumerate(rows):
            for column, value in enumerate(point):
                fault = number_fault(value, minimum=-COORDINATE_MAX, maximum=COORDINATE_MAX)
                if fault:
                    problems.append(Problem(source, f"{key}[{row}][{column}]", fault))
        if problems:
            raise ConfigError(problems)
        array = np.asarray(rows, dtype=float).reshape(-1, 2)
        if len(array) < 3:
            raise ConfigError.single(
                source, key, f"a region needs at least 3 vertices, got {len(array)}"
            )
        extent = float(np.max(np.ptp(array, axis=0)))
        if extent == 0.0:
            raise ConfigError.single(source, key, "all vertices coincide: the area is zero")
        tol = RELATIVE_TOLERANCE * extent
        n = len(array)
        for i in range(n - 1):
            if np.linalg.norm(array[i] - array[i + 1]) <= tol:
                problems.append(
                    Problem(source, f"{key}[{i + 1}]", f"repeats vertex {i} (zero-length edge)")
                )
        if np.linalg.norm(array[-1] - array[0]) <= tol:
            problems.append(Problem(
                source, f"{key}[{n - 1}]", "repeats vertex 0: list each corner once, the "
                "boundary closes by itself"))
        if problems:
            raise ConfigError(problems)
        crossings = _self_intersections(array)
        if crossings:
            pairs = ", ".join(f"edges {i} and {j}" for i, j in crossings[:5])
            raise ConfigError.single(
                source, key, f"the polygon intersects itself ({pairs}); give the vertices "
                "in order around the boundary"
            )
        area = signed_area(array)
        if abs(area) <= tol * extent:
            raise ConfigError.single(source, key, "the polygon has zero area")
        if area < 0:
            array = array[::-1].copy()
        edges = np.roll(array, -1, axis=0) - array
        previous = np.roll(edges, 1, axis=0)
        turn = previous[:, 0] * edges[:, 1] - previous[:, 1] * edges[:, 0]
        lengths = np.linalg.norm(edges, axis=1) * np.linalg.norm(previous, axis=1)
        reflex = np.flatnonzero(turn < -tol * lengths / extent)
        if len(reflex):
            original = [(n - 1 - int(i)) if area < 0 else int(i) for i in reflex]
            problems.extend(
                Problem(source, f"{key}[{i}]", "the polygon is not convex at this vertex "
                        "(coverage needs a convex region; split the area or use its hull)")
                for i in sorted(original)
            )
            raise ConfigError(problems)
        keep = turn > tol * lengths / extent
        return cls(vertices=array[keep].copy(), source=source)

    @cached_property
    def area(self) -> float:
        """Area in square metres."""
        return signed_area(self.vertices)

    @cached_property
    def centroid(self) -> np.ndarray:
        """Geometric centroid (shoelace-type first moments, relative to vertex 0 for
        precision far from the origin)."""
        local = self.vertices - self.vertices[0]
        x, y = local[:, 0], local[:, 1]
        xn, yn = np.roll(x, -1), np.roll(y, -1)
        cross = x * yn - xn * y
        factor = 1.0 / (6.0 * self.area)
        return self.vertices[0] + factor * np.array(
            [np.sum((x + xn) * cross), np.sum((y + yn) * cross)]
        )

    @cached_property
    def bounds(self) -> tuple[float, float, float, float]:
        """(x_min, y_min, x_max, y_max) in metres."""
        low = self.vertices.min(axis=0)
        high = self.vertices.max(axis=0)
        return (float(low[0]), float(low[1]), float(high[0]), float(high[1]))

    @cached_property
    def extent(self) -> float:
        """Largest side of the bounding box: the length scale for tolerances."""
        x0, y0, x1, y1 = self.bounds
        return max(x1 - x0, y1 - y0)

    @cached_property
    def _halfspaces(self) -> tuple[np.ndarray, np.ndarray]:
        edges = np.roll(self.vertices, -1, axis=0) - self.vertices
        normals = np.column_stack([edges[:, 1], -edges[:, 0]])
        normals /= np.linalg.norm(normals, axis=1, keepdims=True)
        offsets = np.einsum("ij,ij->i", normals, self.vertices)
        normals.setflags(write=False)
        offsets.setflags(write=False)
        return normals, offsets

    def halfspaces(self) -> tuple[np.ndarray, np.ndarray]:
        """(A, b) with A p <= b exactly inside; row i is edge i (vertex i to i+1), its
        outward unit normal, so b - A p is the distance to each edge line (for the MPC's
        geofence and for margins in metres)."""
        return self._halfspaces

    def contains(self, points: Sequence[float] | np.ndarray, tol: float = 0.0) -> np.ndarray:
        """Boolean per point: inside or within `tol` metres of the boundary."""
        pts = np.atleast_2d(np.asarray(points, dtype=float))
        A, b = self._halfspaces
        return np.all(pts @ A.T <= b + tol, axis=1)

    def project(self, points: np.ndarray) -> np.ndarray:
        """Nearest point of the region to each point (points inside are returned as is)."""
        pts = np.atleast_2d(np.asarray(points, dtype=float))
        out = pts.copy()
        outside = ~self.contains(pts, tol=RELATIVE_TOLERANCE * self.extent)
        if not np.any(outside):
            return out
        start = self.vertices
        edge = np.roll(self.vertices, -1, axis=0) - start
        q = pts[outside][:, None, :]
        t = np.einsum("mkj,kj->mk", q - start[None], edge) / np.einsum("kj,kj->k", edge, edge)
        t = np.clip(t, 0.0, 1.0)
        nearest = start[None] + t[..., None] * edge[None]
        distance = np.linalg.norm(nearest - q, axis=2)
        best = np.argmin(distance, axis=1)
        out[outside] = nearest[np.arange(len(best)), best]
        return out
