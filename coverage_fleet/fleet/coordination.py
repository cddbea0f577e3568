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
- a robot that has been farther from its target than at the commit (beyond the noise
  tolerance) for `stall_timeout` seconds blocks the gate for everyone (nobody may be
  farther for it to open): it is benched, leaving the roster (reason in the decision), so
  the rest of the fleet gets new targets; it rejoins once it is back within its distance at
  the commit of that generation (it can make progress again, e.g. after the geofence
  brought it back inside);
- the candidates are offered to the gate.

Offline every robot receives its target at once, so every robot acknowledges a generation
as soon as it is committed.
"""

from __future__ import annotations

import math
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
    #: Robots benched by this offer, with the reason.
    stalled: tuple[tuple[str, str], ...] = ()
    #: Benched robots back in the roster with this offer.
    rejoined: tuple[str, ...] = ()


class GateKeeper:
    """The reference gate fed with candidates and acknowledgements (see the module
    docstring)."""

    def __init__(self, settings: GateSettings, stall_timeout: float = math.inf) -> None:
        self.gate = ReferenceGate(settings)
        self.stall_timeout = float(stall_timeout)
        #: robot -> generation its newest progress report names
        self._acknowledged: dict[str, int] = {}
        #: density version of the candidates last committed (None before the first)
        self.density_version: int | None = None
        #: robot -> time since which it has been farther than at the commit
        self._farther_since: dict[str, float] = {}
        #: benched robot -> (its target, distance at the commit) when it was benched
        self.benched: dict[str, tuple[np.ndarray, float]] = {}

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
        rejoined = self._rejoin(candidates)
        present = [n for n in candidates.positions if n not in self.benched]
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
        stalled = self._bench_stalled(candidates.time)
        offered = [n for n in present if n not in self.benched]
        opening = self.gate.offer(
            {n: candidates.centroids[n] for n in offered},
            {n: candidates.positions[n] for n in offered},
            candidates.cost,
            candidates.time,
        )
        if opening is not None:
            self.density_version = candidates.density_version
        return GateDecision(opening, joined, left, stalled, rejoined)

    def _bench_stalled(self, time: float) -> tuple[tuple[str, str], ...]:
        """Bench robots farther than at the commit for stall_timeout (module docstring)."""
        stalled = []
        for name, standing in self.gate.progress().items():
            farther = standing.distance_now is not None and not standing.no_farther
            if not farther:
                self._farther_since.pop(name, None)
                continue
            since = self._farther_since.setdefault(name, float(time))
            if time - since >= self.stall_timeout:
                self.benched[name] = (self.gate.targets[name].copy(), standing.distance_at_commit)
                stalled.append((
                    name,
                    f"farther from its target than at the commit ({standing.distance_now:.2f} "
                    f"m > {standing.distance_at_commit:.2f} m) for {time - since:.1f} s",
                ))
        for name, _ in stalled:
            self.gate.remove_robot(name)
            self._farther_since.pop(name, None)
        return tuple(stalled)

    def _rejoin(self, candidates: Candidates) -> tuple[str, ...]:
        """Benched robots that are back within their distance at the commit (or that the
        partition left out: they join afresh when they are live again)."""
        back = []
        tolerance = self.gate.settings.noise_tolerance
        for name, (target, at_commit) in list(self.benched.items()):
            position = candidates.positions.get(name)
            if position is None:
                del self.benched[name]
            elif float(np.linalg.norm(position - target)) <= at_commit + tolerance:
                del self.benched[name]
                back.append(name)
        return tuple(back)
