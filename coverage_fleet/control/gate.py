"""The reference gate: hands out new centroid targets only when the whole fleet has progressed.

Generation k starts when targets c^k are committed; at that moment the gate records each
robot's distance d_i^k to its target. Robots then send progress reports (the generation they
refer to and their distance now). The gate opens, committing the centroids of the partition
at the robots' current positions as generation k+1, only when

    every robot:      d_i(now) <= d_i^k + noise_tolerance     ("no farther")
    at least one:     d_i(now) <= d_i^k - progress_tolerance  ("strictly closer")

With the partition W^k fixed, the coverage cost is H = sum_i [J_i(c_i) + M_i ||p_i - c_i||^2]
(parallel-axis theorem), so the condition lowers H and re-partitioning lowers it again; the
cost at successive openings therefore falls (Lloyd 1982; Cortes, Martinez, Karatas & Bullo,
IEEE T-RA 20(2), 2004). At a centroidal Voronoi configuration nobody can get closer, so the
gate stays shut. A shut gate alone does not mean the fleet is done (right after an opening
nobody can be closer yet): whether it has settled is judged by fleet/settling.py.

Robots are keyed by name so that the roster may change at run time: a robot that joins or
leaves forces the next offer to be committed (reason "roster"); the cost is not comparable
across such a change. Likewise a new density (`change_density`: a risk map updated during a
trial) forces the next offer to be committed (reason "density"): the cost is measured with
another phi, so it may jump, and the monotone decrease starts again from that opening.
Plain Python and numpy only: the ROS gate node is a thin adapter.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from coverage_fleet.control.progress import RobotProgress, judge

OpeningReason = Literal["start", "progress", "roster", "density"]


@dataclass(frozen=True)
class GateSettings:
    """Tolerances of the gate, in metres.

    noise_tolerance: how much farther than its recorded distance a robot may be and still
        count as "no farther" (absorbs localisation noise and a robot jittering at rest).
        The cost decrease at every opening is guaranteed for 0; a positive value lets a
        robot slip back by at most this much, which the mover's progress outweighs unless
        the masses of the cells differ wildly (keep it well below progress_tolerance).
    progress_tolerance: how much closer than its recorded distance a robot must be to count
        as "strictly closer" (so that noise alone never opens the gate).
    """

    noise_tolerance: float = 0.02
    progress_tolerance: float = 0.05


@dataclass(frozen=True)
class ProgressReport:
    """What a robot tells the gate: which generation it is tracking and how far it is now."""

    robot: str
    generation: int
    distance: float


@dataclass(frozen=True)
class GateOpening:
    """One commit of targets: the generation it starts, why, and the cost at the positions
    the new targets were computed from."""

    time: float
    generation: int
    reason: OpeningReason
    cost: float
    positions: dict[str, np.ndarray]
    targets: dict[str, np.ndarray]
    distances: dict[str, float]


@dataclass
class ReferenceGate:
    """Monotone-progress reference gate (see the module docstring)."""

    settings: GateSettings = field(default_factory=GateSettings)
    generation: int = -1
    targets: dict[str, np.ndarray] = field(default_factory=dict)
    openings: list[GateOpening] = field(default_factory=list)
    _robots: list[str] = field(default_factory=list)
    _distance_at_commit: dict[str, float] = field(default_factory=dict)
    _distance_now: dict[str, float] = field(default_factory=dict)
    _roster_changed: bool = False
    _density_changed: bool = False

    # --- roster -------------------------------------------------------------------------

    @property
    def robots(self) -> tuple[str, ...]:
        return tuple(self._robots)

    def add_robot(self, name: str) -> None:
        """A robot joins; the next offer is committed so that it gets a cell."""
        if name in self._robots:
            raise ValueError(f"robot {name!r} is already in the gate's roster")
        self._robots.append(name)
        self._roster_changed = True

    def remove_robot(self, name: str) -> None:
        """A robot leaves; the next offer is committed so that its cell is shared out."""
        if name not in self._robots:
            raise ValueError(f"robot {name!r} is not in the gate's roster")
        self._robots.remove(name)
        self.targets.pop(name, None)
        self._distance_at_commit.pop(name, None)
        self._distance_now.pop(name, None)
        self._roster_changed = True

    def change_density(self) -> None:
        """The density changed; the next offer (partitioned with the new one) is committed."""
        self._density_changed = True

    # --- progress -----------------------------------------------------------------------

    def report(self, report: ProgressReport) -> bool:
        """Take a progress report. Returns False (and ignores it) when it names another
        generation than the current one or a robot the gate does not know."""
        if report.generation != self.generation or report.robot not in self._distance_at_commit:
            return False
        self._distance_now[report.robot] = float(report.distance)
        return True

    def progress(self) -> dict[str, RobotProgress]:
        """Each committed robot's standing against its recorded distance."""
        tolerances = (self.settings.noise_tolerance, self.settings.progress_tolerance)
        return {
            name: judge(at_commit, self._distance_now.get(name), *tolerances)
            for name, at_commit in self._distance_at_commit.items()
        }

    def ready_to_open(self) -> bool:
        """The monotone-progress condition for the current generation."""
        if self.generation < 0 or self._roster_changed or self._density_changed:
            return True
        standing = self.progress()
        return all(s.no_farther for s in standing.values()) and any(
            s.closer for s in standing.values()
        )

    # --- opening ------------------------------------------------------------------------

    def offer(
        self,
        candidate_targets: Mapping[str, np.ndarray],
        positions: Mapping[str, np.ndarray],
        cost: float,
        time: float,
    ) -> GateOpening | None:
        """Offer the centroids of the partition at `positions` (with its coverage cost).

        They are committed as the next generation when the gate is ready to open (always for
        the first offer and after a roster or density change); otherwise nothing happens and None is
        returned. Both mappings must cover exactly the gate's roster.
        """
        if not self.ready_to_open():
            return None
        roster = set(self._robots)
        if set(candidate_targets) != roster or set(positions) != roster:
            raise ValueError(
                "candidate targets and positions must name exactly the robots "
                f"{sorted(roster)}; got {sorted(candidate_targets)} and {sorted(positions)}"
            )
        if self.generation < 0:
            reason: OpeningReason = "start"
        elif self._roster_changed:
            reason = "roster"
        elif self._density_changed:
            reason = "density"
        else:
            reason = "progress"
        targets = {n: np.asarray(candidate_targets[n], float).copy() for n in self._robots}
        where = {n: np.asarray(positions[n], float).copy() for n in self._robots}
        distances = {n: float(np.linalg.norm(where[n] - targets[n])) for n in self._robots}
        self.generation += 1
        self.targets = targets
        self._distance_at_commit = distances
        # Every robot must report on the new generation before the gate can open again: a
        # robot the gate has not heard from is never assumed to be making progress.
        self._distance_now = {}
        self._roster_changed = False
        self._density_changed = False
        opening = GateOpening(
            time=float(time),
            generation=self.generation,
            reason=reason,
            cost=float(cost),
            positions=where,
            targets=targets,
            distances=distances,
        )
        self.openings.append(opening)
        return opening
