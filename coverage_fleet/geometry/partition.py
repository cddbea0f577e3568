"""Bounded Voronoi partition of a convex region among agents, with per-cell moments.

Cell V_i = {q in region : ||q - p_i|| <= ||q - p_j|| for all j}, built exactly by clipping
the region with the bisector half-plane of each Voronoi neighbour. Neighbour candidates
come from the Delaunay triangulation (every Voronoi neighbour is a Delaunay neighbour;
Okabe, Boots, Sugihara & Chiu, "Spatial Tessellations", 2nd ed., 2000, ch. 2), so a cell
costs O(its neighbours), not O(n). Collinear or very few agents fall back to all pairs.

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
Non-finite positions raise ValueError: they are a caller fault the node must filter out.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import Delaunay, QhullError, cKDTree

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


def _neighbour_table(points: np.ndarray) -> np.ndarray:
    """(m, K) candidate Voronoi neighbours of each point, nearest first, padded with -1."""
    m = len(points)
    table = None
    if m >= 3:
        try:
            tri = Delaunay(points)
        except QhullError:  # all collinear: no triangulation exists
            tri = None
        if tri is not None and len(tri.coplanar) == 0:
            indptr, indices = tri.vertex_neighbor_vertices
            counts = np.diff(indptr)
            table = np.full((m, int(counts.max())), -1, dtype=np.int64)
            rows = np.repeat(np.arange(m), counts)
            slots = np.arange(len(indices)) - np.repeat(indptr[:-1], counts)
            table[rows, slots] = indices
    if table is None:
        table = np.array([np.delete(np.arange(m), i) for i in range(m)], dtype=np.int64)
        table = table.reshape(m, max(m - 1, 0))
    safe = np.where(table >= 0, table, 0)
    gap = points[safe] - points[:, None, :]
    distance = np.where(table >= 0, np.einsum("ijk,ijk->ij", gap, gap), np.inf)
    return np.take_along_axis(table, np.argsort(distance, axis=1, kind="stable"), axis=1)


def _clip_batch(polygons: np.ndarray, counts: np.ndarray, side: np.ndarray) -> None:
    """In place: clip polygon i to where its signed distance `side` is <= 0, for a batch
    of cells at once (Sutherland-Hodgman), so the cost is a fixed number of array
    operations per neighbour rank rather than per cell.

    Polygons are stored closed: polygons[i, counts[i]] repeats polygons[i, 0], so every
    edge s -> s + 1 is a plain slice. The width must leave room for one more vertex plus
    the closing copy (a convex polygon cut by a line gains at most one vertex)."""
    n, width, _ = polygons.shape
    edge = np.arange(width - 1)[None, :] < counts[:, None]
    start, finish = side[:, :-1], side[:, 1:]
    start_in = start <= 0.0
    crossing = edge & (start_in != (finish <= 0.0))
    t = np.divide(start, start - finish, out=np.zeros_like(start), where=crossing)
    head, tail = polygons[:, :-1], polygons[:, 1:]
    cut = head + t[..., None] * (tail - head)
    # Walk each boundary once: a vertex if kept, then the crossing on its outgoing edge.
    candidates = np.stack([head, cut], axis=2).reshape(n, -1, 2)
    keep = np.stack([start_in & edge, crossing], axis=2).reshape(n, -1)
    slot = np.cumsum(keep, axis=1) - 1
    row = np.broadcast_to(np.arange(n)[:, None], keep.shape)
    polygons[row[keep], slot[keep]] = candidates[keep]
    new_counts = keep.sum(axis=1)
    polygons[np.arange(n), new_counts] = polygons[:, 0]
    counts[:] = np.where(new_counts >= 3, new_counts, 0)


def _drop_repeated_vertices(polygons: np.ndarray, counts: np.ndarray, tol: float
                            ) -> tuple[np.ndarray, np.ndarray]:
    """Remove vertices within `tol` of their predecessor. A bisector through an existing
    vertex leaves a copy of it a rounding error away; harmless for moments, but consumers
    (markers, other geometry libraries) want simple polygons."""
    n, width, _ = polygons.shape
    slot = np.arange(width)
    valid = slot[None, :] < counts[:, None]
    previous = np.where(slot[None, :] == 0, np.maximum(counts[:, None] - 1, 0),
                        slot[None, :] - 1)
    gap = np.linalg.norm(polygons - polygons[np.arange(n)[:, None], previous], axis=2)
    keep = valid & (gap > tol)
    if np.array_equal(keep, valid):
        return polygons, counts
    order = np.argsort(~keep, axis=1, kind="stable")
    new_counts = keep.sum(axis=1)
    return (np.take_along_axis(polygons, order[..., None], axis=1),
            np.where(new_counts >= 3, new_counts, 0))


def voronoi_cells(positions: np.ndarray, region: ConvexRegion) -> list[np.ndarray]:
    """Bounded Voronoi cells (CCW vertex arrays) of positions already inside the region,
    with the coincidence tie rule applied (losers get an empty (0, 2) cell)."""
    pts = _validated_positions(positions)
    leader = _leaders(pts, COINCIDENCE_TOLERANCE * region.extent)
    index = np.flatnonzero(leader)
    kept = pts[index]
    table = _neighbour_table(kept)
    m, k = len(kept), len(region.vertices)
    # Work about each agent's own position, for precision far from the map origin.
    polygons = np.zeros((m, k + table.shape[1] + 2, 2))
    polygons[:, :k] = region.vertices[None, :, :] - kept[:, None, :]
    polygons[:, k] = polygons[:, 0]
    counts = np.full(m, k)
    # Bisector of p and p_j about p: normal . q <= |normal|^2 / 2.
    normals = kept[np.maximum(table, 0)] - kept[:, None, :]
    offsets = 0.5 * np.einsum("ijk,ijk->ij", normals, normals)
    for rank in range(table.shape[1]):
        rows = np.flatnonzero(table[:, rank] >= 0)
        if len(rows) == 0:
            break
        cell, batch_counts = polygons[rows], counts[rows]
        side = np.einsum("ivk,ik->iv", cell, normals[rows, rank]) - offsets[rows, rank, None]
        _clip_batch(cell, batch_counts, side)
        polygons[rows], counts[rows] = cell, batch_counts
    polygons, counts = _drop_repeated_vertices(polygons, counts, 1e-12 * region.extent)
    cells = [EMPTY_POLYGON] * len(pts)
    for local in range(m):
        if counts[local] >= 3:
            cells[index[local]] = polygons[local, : counts[local]] + kept[local]
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
