"""Buffered cells: each robot's share of the plane, such that footprints cannot touch.

Zhou, Wang, Bandyopadhyay & Schwager, "Fast, on-line collision avoidance for dynamic
vehicles using buffered Voronoi cells", IEEE Robotics and Automation Letters 2(2), 2017:
a robot's Voronoi cell with every bisector pulled back towards the robot by the safety
radius; robots that each stay inside their own buffered cell cannot collide.

Generalised here to footprints of different radii and to positions of different ages. For
the pair (i, j) with positions p_i, p_j at distance d and unit normal n = (p_j - p_i) / d:

    allowance   a_i = v_i * age_i   (how far i may have moved since its position was taken;
                                      v_i its largest planar speed), a_j likewise
    free gap    g   = d - r_i - r_j - margin - a_i - a_j
    i's side:   n . (p - p_i) <= a_i + g / 2
    j's side:   n . (p - p_i) >= d - a_j - g / 2

The two lines are r_i + r_j + margin apart, so two robots whose centres keep to their own
sides keep at least `margin` between their footprints. The separating line is shifted, not
the bisector: each side is pulled back by its own radius plus half the margin, so a 1.5 m
vessel beside a 0.3 m rover each keep their own footprint clear. With equal radii, no
margin and fresh positions, i's side is n . (p - p_i) <= d/2 - r: the buffered Voronoi
cell above. When g >= 0 each robot's true position (within its allowance of the one used)
is inside its own side; when g < 0 (already too close) the sides ask both to back off.

Everything is plain numpy: the controller's keep-apart window (control/keep_apart.py) and
the tests (against shapely) use it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Positions closer than this (metres) count as coincident: the pair is separated along a
#: fixed direction chosen by name order, the same from both sides.
COINCIDENT = 1e-9


@dataclass(frozen=True)
class FleetSnapshot:
    """Every robot's position as known at `time`, and what the cells need about each.

    names (n,), positions (n, 2) in metres (map frame), ages (n,) in seconds (how old each
    position was at `time`, >= 0), radii (n,) footprint radii in metres, speed_limits (n,)
    largest planar speeds in m/s."""

    time: float
    names: tuple[str, ...]
    positions: np.ndarray
    ages: np.ndarray
    radii: np.ndarray
    speed_limits: np.ndarray

    def __post_init__(self) -> None:
        n = len(self.names)
        for label, value, shape in (
            ("positions", self.positions, (n, 2)),
            ("ages", self.ages, (n,)),
            ("radii", self.radii, (n,)),
            ("speed_limits", self.speed_limits, (n,)),
        ):
            array = np.asarray(value, dtype=float)
            if array.shape != shape or not np.all(np.isfinite(array)):
                raise ValueError(f"snapshot {label} must be finite with shape {shape}")
            object.__setattr__(self, label, array)
        if np.any(self.ages < 0) or np.any(self.radii < 0) or np.any(self.speed_limits < 0):
            raise ValueError("snapshot ages, radii and speed limits must be >= 0")
        if len(set(self.names)) != n:
            raise ValueError("snapshot names must be distinct")

    def allowances(self) -> np.ndarray:
        """(n,) metres each robot may have moved since its position was taken."""
        return self.ages * self.speed_limits


@dataclass(frozen=True)
class HalfPlanes:
    """Rows normals @ p <= offsets (normals (m, 2) unit vectors, offsets (m,)), one per
    neighbour named in `neighbours`; `gaps` (m,) the free gaps g (metres)."""

    normals: np.ndarray
    offsets: np.ndarray
    neighbours: tuple[str, ...]
    gaps: np.ndarray

    def slack(self, point: np.ndarray) -> np.ndarray:
        """(m,) how far inside each row the point is (negative: outside), metres."""
        return self.offsets - self.normals @ np.asarray(point, float).reshape(2)


def separating_halfplanes(snapshot: FleetSnapshot, own: str, margin: float) -> HalfPlanes:
    """The side of every pair (own, j) that `own`'s centre must keep to (module docstring).

    margin: metres kept between footprints (split evenly between the two robots)."""
    if margin < 0:
        raise ValueError(f"margin must be >= 0, got {margin}")
    names = snapshot.names
    i = names.index(own)
    others = [k for k in range(len(names)) if k != i]
    if not others:
        return HalfPlanes(np.zeros((0, 2)), np.zeros(0), (), np.zeros(0))
    p = snapshot.positions
    allowance = snapshot.allowances()
    offsets_xy = p[others] - p[i]
    distances = np.hypot(offsets_xy[:, 0], offsets_xy[:, 1])
    normals = np.empty_like(offsets_xy)
    apart = distances > COINCIDENT
    normals[apart] = offsets_xy[apart] / distances[apart, None]
    for row in np.nonzero(~apart)[0]:
        # Coincident: +x for the robot whose name sorts first, -x for the other.
        normals[row] = (1.0, 0.0) if own < names[others[row]] else (-1.0, 0.0)
    gaps = (
        distances
        - snapshot.radii[i]
        - snapshot.radii[others]
        - margin
        - allowance[i]
        - allowance[others]
    )
    offsets = normals @ p[i] + allowance[i] + gaps / 2.0
    return HalfPlanes(normals, offsets, tuple(names[k] for k in others), gaps)


def cell_polygon_rows(
    halfplanes: HalfPlanes, region_A: np.ndarray, region_b: np.ndarray, shrink: float
) -> tuple[np.ndarray, np.ndarray]:
    """The buffered cell inside the region as one row set A p <= b: the region's rows
    pulled in by `shrink` (the footprint radius: the centre keeps the footprint inside),
    then the half-planes. For plotting and tests; the MPC takes the two sets separately."""
    A = np.asarray(region_A, float).reshape(-1, 2)
    b = np.asarray(region_b, float).reshape(-1) - shrink * np.linalg.norm(A, axis=1)
    return np.vstack([A, halfplanes.normals]), np.concatenate([b, halfplanes.offsets])


def buffered_cell_polygon(
    snapshot: FleetSnapshot,
    own: str,
    margin: float,
    region_vertices: np.ndarray,
    region_A: np.ndarray,
    region_b: np.ndarray,
    hold_back: float = 0.0,
) -> np.ndarray:
    """Where `own`'s centre may be: the region shrunk by its footprint radius, cut by its
    separating half-planes, everything pulled in by a further `hold_back` metres (what the
    MPC keeps clear of the rows at rest: control/mpc.py's pad). (k, 2) counter-clockwise
    vertices, (0, 2) when nothing is left."""
    from coverage_fleet.geometry.polygon import clip_halfplane

    i = snapshot.names.index(own)
    shrink = float(snapshot.radii[i]) + hold_back
    planes = separating_halfplanes(snapshot, own, margin)
    A, b = cell_polygon_rows(planes, region_A, region_b, shrink)
    b = b.copy()
    b[len(region_b):] -= hold_back
    polygon = np.asarray(region_vertices, float)
    for normal, offset in zip(A, b, strict=True):
        polygon = clip_halfplane(polygon, normal, offset)
    return polygon


def nearest_point_of_polygon(polygon: np.ndarray, point: np.ndarray) -> np.ndarray:
    """The point of a convex polygon (k >= 3 vertices, counter-clockwise) nearest `point`:
    the point itself when inside, else the nearest point of the nearest edge (the
    Euclidean projection onto a closed convex set, unique: Boyd & Vandenberghe, Convex
    Optimization, 2004, sec. 8.1)."""
    q = np.asarray(point, float).reshape(2)
    start = np.asarray(polygon, float)
    edge = np.roll(start, -1, axis=0) - start
    outward = np.column_stack([edge[:, 1], -edge[:, 0]])  # right of a CCW edge is outside
    if np.all(np.einsum("kj,kj->k", q - start, outward) <= 0.0):
        return q.copy()
    length2 = np.einsum("kj,kj->k", edge, edge)
    t = np.clip(np.einsum("kj,kj->k", q - start, edge) / np.where(length2 > 0, length2, 1.0),
                0.0, 1.0)
    nearest = start + t[:, None] * edge
    return nearest[int(np.argmin(np.linalg.norm(nearest - q, axis=1)))]


def admissible_points(
    names: tuple[str, ...],
    positions: np.ndarray,
    targets: np.ndarray,
    radii: np.ndarray,
    margin: float,
    region_vertices: np.ndarray,
    region_A: np.ndarray,
    region_b: np.ndarray,
    hold_back: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """For every robot the point of its buffered cell (fresh positions, ages 0) nearest its
    target: where a tracking MPC that honours the cell brings it to rest (the offset cost's
    best admissible steady state). Returns (points (n, 2), has_cell (n,) bool); a robot
    whose cell is empty (already too close to a neighbour) keeps its target."""
    n = len(names)
    positions = np.asarray(positions, float).reshape(n, 2)
    targets = np.asarray(targets, float).reshape(n, 2)
    hold = np.zeros(n) if hold_back is None else np.asarray(hold_back, float)
    snapshot = FleetSnapshot(0.0, tuple(names), positions, np.zeros(n),
                             np.asarray(radii, float), np.zeros(n))
    points = targets.copy()
    has_cell = targets_well_inside(snapshot, targets, margin, region_A, region_b, hold)
    for k in np.nonzero(~has_cell)[0]:
        name = names[k]
        polygon = buffered_cell_polygon(snapshot, name, margin, region_vertices, region_A,
                                        region_b, float(hold[k]))
        if len(polygon) >= 3:
            points[k] = nearest_point_of_polygon(polygon, targets[k])
            has_cell[k] = True
    return points, has_cell


#: How far inside every row of its cell (metres) a target must be for
#: `targets_well_inside` to vouch for it: far above the rounding of the clipped polygon's
#: vertices (1e-14 m at 100 m), so the polygon holds the target as surely as the rows do.
WELL_INSIDE = 1e-7


def targets_well_inside(
    snapshot: FleetSnapshot,
    targets: np.ndarray,
    margin: float,
    region_A: np.ndarray,
    region_b: np.ndarray,
    hold_back: np.ndarray,
) -> np.ndarray:
    """(n,) bool: robot k's target lies WELL_INSIDE every row of its buffered cell (as
    buffered_cell_polygon builds it, fresh positions), so the point of its cell nearest
    the target is the target itself and the cell is not empty. All robots at once (no
    polygon): the usual case of robots far apart, where clipping a polygon per robot cost
    O(n^2) small numpy calls. False where unsure (coincident positions): the caller clips."""
    p = snapshot.positions
    n = len(p)
    targets = np.asarray(targets, float).reshape(n, 2)
    A = np.asarray(region_A, float).reshape(-1, 2)
    norms = np.linalg.norm(A, axis=1)
    shrink = snapshot.radii + hold_back
    region_ok = np.all(
        targets @ A.T <= np.asarray(region_b, float)[None, :] - shrink[:, None] * norms[None, :]
        - WELL_INSIDE * norms[None, :],
        axis=1,
    )
    if n < 2:
        return region_ok
    offsets_xy = p[None, :, :] - p[:, None, :]  # [i, j] = p_j - p_i
    distances = np.hypot(offsets_xy[..., 0], offsets_xy[..., 1])
    np.fill_diagonal(distances, np.inf)
    apart = np.all(distances > COINCIDENT, axis=1)
    # (The diagonal's and coincident pairs' normals are 0: their rows are not judged here.)
    normals = offsets_xy / np.where(distances > COINCIDENT, distances, 1.0)[..., None]
    allowance = snapshot.allowances()
    gaps = (distances - snapshot.radii[:, None] - snapshot.radii[None, :] - margin
            - allowance[:, None] - allowance[None, :])
    # Row (i, j): normals[i, j] . q <= normals[i, j] . p_i + allowance_i + gap / 2 - hold_i.
    slack = (np.einsum("ijk,ik->ij", normals, p) + allowance[:, None] + gaps / 2.0
             - hold_back[:, None] - np.einsum("ijk,ik->ij", normals, targets))
    np.fill_diagonal(slack, np.inf)
    return region_ok & apart & np.all(slack >= WELL_INSIDE, axis=1)
