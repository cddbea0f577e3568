"""Bounded Voronoi partition of a convex region among agents, with per-cell moments.

Cell V_i = {q in region : ||q - p_i|| <= ||q - p_j|| for all j}, built exactly by clipping
the region with the bisector half-plane of every agent that can still cut it; agents are
found through a grid of buckets, nearest rings first, and the search stops once the next
ring is beyond twice the cell's farthest vertex (cell_clipping.py), so a cell costs about
O(its neighbours), not O(n), for any layout of the agents (collinear ones included).

Defined behaviour at the edges of the input space (each tested):
- Coincident agents (closer than COINCIDENCE_TOLERANCE x region extent): the lower index
  wins the shared cell; every other agent of the group gets an empty cell, mass 0, polar
  moment 0 and centroid = its own position.
- Agents outside the region (beyond 1e-9 x extent): projected onto the nearest point of
  the region before anything else; `positions` holds the positions used and `projected`
  flags them, so a node can report the fault. Projection never raises, because one robot's
  bad localisation must not stop the whole fleet's partition.
- Agents on the boundary, collinear agents, a single agent (its cell is the region): no
  special case needed beyond the fallback above.
- A cell whose density mass is (numerically) zero: centroid = the cell's geometric
  centroid (a point of the cell, so a target there stays inside the region); mass 0.
- A cell with a tiny mass (a sliver between robots a micrometre apart): its centroid is
  exact to the rounding of its first moment over its mass, about 1e-15 x the region's mass
  and extent / the cell's mass, which may put it that far outside the sliver.
Non-finite positions raise ValueError: they are a caller fault the node must filter out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from coverage_fleet.geometry.cell_clipping import clip_cells
from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.polygon import (
    EMPTY_POLYGON,
    polygon_area,
    uniform_moments,
)
from coverage_fleet.geometry.region import RELATIVE_TOLERANCE, ConvexRegion

#: Agents closer than this (times the region's extent) are treated as coincident.
COINCIDENCE_TOLERANCE = 1e-9
#: A cell mass at or below this fraction of the total counts as zero (centroid rule above).
ZERO_MASS_FRACTION = 1e-12


@dataclass(frozen=True, eq=False)
class Partition:
    """The partition at one instant. Arrays are indexed by agent."""

    positions: np.ndarray  # (n, 2) positions used (after projection into the region)
    projected: np.ndarray  # (n,) True where the given position lay outside and was projected
    cells: list[np.ndarray]  # (k_i, 2) CCW vertices; (0, 2) for an empty cell
    masses: np.ndarray  # (n,) integral of phi over V_i
    centroids: np.ndarray  # (n, 2) mass centroid of V_i (rules above for empty cells)
    polar_moments: np.ndarray  # (n,) integral over V_i of ||q - p_i||^2 phi(q) dq
    cost: float  # coverage cost H = sum of polar_moments

    @property
    def count(self) -> int:
        return len(self.positions)


def _validated_positions(positions: np.ndarray) -> np.ndarray:
    pts = np.asarray(positions, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != 2 or len(pts) == 0:
        raise ValueError(f"positions must be an (n >= 1, 2) array, got shape {pts.shape}")
    bad = np.flatnonzero(~np.all(np.isfinite(pts), axis=1))
    if len(bad):
        raise ValueError(f"positions of agents {bad.tolist()} are not finite")
    return pts


def _leaders(points: np.ndarray, tol: float) -> np.ndarray:
    """True for agents that keep a cell: no lower-index agent within `tol` (tie rule)."""
    leader = np.ones(len(points), dtype=bool)
    if len(points) > 1:
        for i, j in cKDTree(points).query_pairs(tol):
            leader[max(i, j)] = False
    return leader


def voronoi_cells(positions: np.ndarray, region: ConvexRegion) -> list[np.ndarray]:
    """Bounded Voronoi cells (CCW vertex arrays) of positions already inside the region,
    with the coincidence tie rule applied (losers get an empty (0, 2) cell)."""
    pts = _validated_positions(positions)
    leader = _leaders(pts, COINCIDENCE_TOLERANCE * region.extent)
    index = np.flatnonzero(leader)
    vertices, counts = clip_cells(np.ascontiguousarray(pts[index]),
                                  np.ascontiguousarray(region.vertices, dtype=float),
                                  1e-12 * region.extent)
    cells = [EMPTY_POLYGON] * len(pts)
    ends = np.cumsum(counts).tolist()
    for owner, count, end in zip(index.tolist(), counts.tolist(), ends, strict=True):
        if count:
            cells[owner] = vertices[end - count:end]
    return cells


def compute_partition(
    positions: np.ndarray, region: ConvexRegion, density: Density
) -> Partition:
    """Partition `region` among agents at `positions` (n, 2) and integrate `density` over
    every cell: masses, centroids, polar moments about each agent and the coverage cost
    H = sum_i integral over V_i of ||q - p_i||^2 phi(q) dq (rules for degenerate inputs in
    the module docstring)."""
    given = _validated_positions(positions)
    inside = region.contains(given, tol=RELATIVE_TOLERANCE * region.extent)
    pts = given.copy()
    if not inside.all():
        pts[~inside] = region.project(given[~inside])
    cells = voronoi_cells(pts, region)
    moments = density.moments(cells, pts)
    masses = np.maximum(moments.mass, 0.0)
    total = float(masses.sum())
    has_mass = masses > ZERO_MASS_FRACTION * total
    centroids = pts.copy()
    centroids[has_mass] += moments.first[has_mass] / masses[has_mass, None]
    for i in np.flatnonzero(~has_mass):
        if len(cells[i]) >= 3 and polygon_area(cells[i]) > 0.0:
            area, first, _ = uniform_moments(cells[i], pts[i])
            centroids[i] = pts[i] + first / area
    masses = np.where(has_mass, masses, 0.0)
    polar = np.maximum(moments.polar, 0.0)
    return Partition(
        positions=pts,
        projected=~inside,
        cells=cells,
        masses=masses,
        centroids=centroids,
        polar_moments=polar,
        cost=float(polar.sum()),
    )
