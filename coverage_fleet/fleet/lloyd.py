"""Lloyd's algorithm for single integrators: the reference the MPC-driven fleet is judged by.

Each iteration moves every agent to the mass centroid of its current cell, then
recomputes the partition. Both half-steps lower the coverage cost H (Lloyd, "Least squares
quantization in PCM", IEEE Trans. Information Theory 28(2), 1982; Du, Faber & Gunzburger,
"Centroidal Voronoi tessellations: applications and algorithms", SIAM Review 41(4),
1999, sec. 5.2):
- cells fixed, H_i(p_i) = J_i(c_i) + M_i ||p_i - c_i||^2 (parallel-axis theorem) is least
  at p_i = c_i;
- agents fixed, the Voronoi partition is the cheapest assignment of places to agents.
So the costs it returns are non-increasing (up to integration accuracy), and its fixed
points are centroidal Voronoi configurations. Robots with real dynamics cannot jump to
their centroids; this baseline says where they should end up and what H is worth there.

Agents that lose a coincidence tie keep an empty cell whose centroid is their own
position (partition tie rule), so Lloyd never separates exactly coincident agents.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.partition import Partition, compute_partition
from coverage_fleet.geometry.region import ConvexRegion


@dataclass(frozen=True, eq=False)
class LloydResult:
    """History of a Lloyd run: positions[k] is the configuration after k iterations
    (positions[0] is the start, projected into the region), costs[k] its coverage cost."""

    positions: np.ndarray  # (iterations + 1, n, 2)
    costs: np.ndarray  # (iterations + 1,)
    converged: bool  # the last step moved no agent farther than `tolerance`
    final: Partition  # the partition at positions[-1]

    @property
    def iterations(self) -> int:
        return len(self.costs) - 1


def lloyd(
    positions: np.ndarray,
    region: ConvexRegion,
    density: Density,
    max_iterations: int = 200,
    tolerance: float = 1e-6,
) -> LloydResult:
    """Run Lloyd's iteration from `positions` (n, 2) until no agent would move farther
    than `tolerance` metres or `max_iterations` is reached."""
    if max_iterations < 0:
        raise ValueError(f"max_iterations must be >= 0, got {max_iterations}")
    if not tolerance >= 0.0:
        raise ValueError(f"tolerance must be >= 0, got {tolerance}")
    partition = compute_partition(positions, region, density)
    history = [partition.positions]
    costs = [partition.cost]
    converged = False
    for _ in range(max_iterations):
        step = np.linalg.norm(partition.centroids - partition.positions, axis=1)
        if float(step.max()) <= tolerance:
            converged = True
            break
        partition = compute_partition(partition.centroids, region, density)
        history.append(partition.positions)
        costs.append(partition.cost)
    else:
        step = np.linalg.norm(partition.centroids - partition.positions, axis=1)
        converged = float(step.max()) <= tolerance
    return LloydResult(
        positions=np.array(history), costs=np.array(costs), converged=converged,
        final=partition,
    )


def held_lloyd(
    positions: np.ndarray,
    region: ConvexRegion,
    density: Density,
    radii: np.ndarray,
    margin: float,
    pads: np.ndarray | None = None,
    max_iterations: int = 200,
    tolerance: float = 1e-6,
) -> LloydResult:
    """Lloyd's iteration constrained to buffered cells: each step moves every agent to the
    point of its buffered cell (geometry/buffered_cells.py, at the current positions, ages
    0, footprint `radii` (n,), `margin`, each cell pulled in by `pads` (n,)) nearest the
    centroid of its Voronoi cell, then recomputes the partition. Where no cell binds it is
    Lloyd's iteration itself.

    The cost still never rises while every agent is inside its own cell: with the cells
    fixed, H_i = J_i(c_i) + M_i ||p_i - c_i||^2 and the nearest point of a convex set that
    holds p_i is no farther from c_i than p_i (Euclidean projection, Boyd & Vandenberghe,
    Convex Optimization, 2004, sec. 8.1); the new partition lowers H again (Lloyd 1982;
    Du, Faber & Gunzburger 1999, sec. 5.2). Its fixed points are where every agent sits at
    the point of its buffered cell nearest its centroid: the rest a fleet of MPCs that
    honour these cells comes to (the offset cost's best admissible steady state)."""
    from coverage_fleet.geometry.buffered_cells import admissible_points

    if max_iterations < 0:
        raise ValueError(f"max_iterations must be >= 0, got {max_iterations}")
    n = len(positions)
    names = tuple(f"agent_{k}" for k in range(n))
    A, b = region.halfspaces()
    radii = np.asarray(radii, float)
    partition = compute_partition(positions, region, density)
    history = [partition.positions]
    costs = [partition.cost]
    converged = False

    def next_positions(partition: Partition) -> np.ndarray:
        points, has_cell = admissible_points(
            names, partition.positions, partition.centroids, radii, margin, region.vertices,
            A, b, pads)
        # An agent without a cell (already too close) stays where it is.
        return np.where(has_cell[:, None], points, partition.positions)

    for _ in range(max_iterations):
        moved = next_positions(partition)
        if float(np.linalg.norm(moved - partition.positions, axis=1).max()) <= tolerance:
            converged = True
            break
        partition = compute_partition(moved, region, density)
        history.append(partition.positions)
        costs.append(partition.cost)
    else:
        moved = next_positions(partition)
        converged = float(np.linalg.norm(moved - partition.positions, axis=1).max()) <= tolerance
    return LloydResult(
        positions=np.array(history), costs=np.array(costs), converged=converged,
        final=partition,
    )
