"""The base station's part of a tick: partition the live robots' positions into candidate
targets, then let the reference gate decide whether to commit them.

`candidates_at` is what the partition node publishes (and what the offline step computes);
`GateKeeper` is what the gate node runs on each candidates message (and the offline step on
each tick):

- the robots in the candidates are the gate's roster: a robot the partition left out leaves
  the gate and a new one joins (both force the next commit, reason "roster");
- a robot counts for the current generation only once it has acknowledged it (its newest
  progress report names it); the gate then judges its progress from its position in the
  candidates, the very positions whose partition would be committed, so that the cost at
  successive openings falls even though reports and partitions arrive at different moments;
- a candidates message partitioned with another density than the last commit's (its
  `density_version`, see fleet/density_updates.py) makes the gate commit it (reason
  "density");
- the candidates are offered to the gate.

Offline every robot receives its target at once, so every robot acknowledges a generation
as soon as it is committed.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from coverage_fleet.control.gate import GateOpening, GateSettings, ProgressReport, ReferenceGate
from coverage_fleet.geometry.density import Density
from coverage_fleet.geometry.partition import Partition, compute_partition
from coverage_fleet.geometry.region import ConvexRegion


@dataclass(frozen=True)
class Candidates:
    """The partition at the live robots' positions: its centroids are the candidate targets.
    `time` is the time of the newest state used."""

    time: float
    cost: float
    positions: dict[str, np.ndarray]
    centroids: dict[str, np.ndarray]
    masses: dict[str, float]
    #: Which density the partition used: 0 the mission's, then one more per update.
    density_version: int = 0


def candidates_at(
    positions: Mapping[str, np.ndarray],
    time: float,
    region: ConvexRegion,
    density: Density,
    density_version: int = 0,
) -> tuple[Candidates, Partition]:
    """Partition the region among the robots at `positions` (in the mapping's order) with
    `density` (the `density_version`-th of the run)."""
    names = list(positions)
    stacked = np.array([np.asarray(positions[n], float) for n in names]).reshape(-1, 2)
    partition = compute_partition(stacked, region, density)
    candidates = Candidates(
        time=float(time),
        cost=float(partition.cost),
        positions={n: stacked[k].copy() for k, n in enumerate(names)},
        centroids={n: np.asarray(partition.centroids[k], float) for k, n in enumerate(names)},
        masses={n: float(partition.masses[k]) for k, n in enumerate(names)},
        density_version=int(density_version),
    )
    return candidates, partition


def largest_distance(
    positions: Mapping[str, np.ndarray], targets: Mapping[str, np.ndarray]
) -> float:
    """The largest distance of a robot from its committed target (0 with no targets)."""
    distances = [
        float(np.linalg.norm(np.asarray(positions[n]) - np.asarray(targets[n])))
        for n in positions
        if n in targets
    ]
    return max(distances, default=0.0)


@dataclass(frozen=True)
class GateDecision:
    opening: GateOpening | None
    joined: tuple[str, ...]
    left: tuple[str, ...]


class GateKeeper:
    """The reference gate fed with candidates and acknowledgements (see the module
    docstring)."""

    def __init__(self, settings: GateSettings) -> None:
        self.gate = ReferenceGate(settings)
        #: robot -> generation its newest progress report names
        self._acknowledged: dict[str, int] = {}
        #: density version of the candidates last committed (None before the first)
        self.density_version: int | None = None

    def acknowledge(self, name: str, generation: int | None) -> None:
        """`name`'s newest progress report names `generation` (None: a generation the gate
        does not know, or no target yet; the robot does not count until it names one)."""
        if generation is None:
            self._acknowledged.pop(name, None)
        else:
            self._acknowledged[name] = int(generation)

    def acknowledges_current(self, name: str) -> bool:
        return self._acknowledged.get(name) == self.gate.generation

    def offer(self, candidates: Candidates) -> GateDecision:
        present = list(candidates.positions)
        left = tuple(n for n in self.gate.robots if n not in present)
        for name in left:
            self.gate.remove_robot(name)
        joined = tuple(n for n in present if n not in self.gate.robots)
        for name in joined:
            self.gate.add_robot(name)
        for name in present:
            target = self.gate.targets.get(name)
            if target is not None and self.acknowledges_current(name):
                distance = float(np.linalg.norm(candidates.positions[name] - target))
                self.gate.report(ProgressReport(name, self.gate.generation, distance))
        if self.density_version is not None and candidates.density_version != \
                self.density_version:
            self.gate.change_density()
        opening = self.gate.offer(
            candidates.centroids, candidates.positions, candidates.cost, candidates.time
        )
        if opening is not None:
            self.density_version = candidates.density_version
        return GateDecision(opening, joined, left)
